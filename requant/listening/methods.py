"""The methods a listening kit compares: ``tpdf``, ``truncate``, ``tpdf+hearing``, ..."""

import re
from dataclasses import dataclass

from requant.errors import UsageError
from requant.recipe import DITHERS, Shaping

__all__ = ["Method", "METHOD_HEADS", "METHOD_SHAPINGS", "DEFAULT_METHODS", "parse_method",
           "parse_methods"]

#: Methods rendered when none is named: the plain cut, the textbook cure, and the cure
#: with noise shaping.
DEFAULT_METHODS = ("truncate", "tpdf", "tpdf+hearing")

#: Heads of a method string and the (quantizer, dither) each stands for: the two
#: quantizers without dither, and every dither of the recipe with rounding.
METHOD_HEADS = {
    "truncate": ("truncate", "none"),
    "round": ("round", "none"),
    **{d: ("round", d) for d in DITHERS if d != "none"},
}


#: Shapings that may follow a ``+``.
METHOD_SHAPINGS = ("first-order", "hearing")


_ALLOWED_FORMS = (", ".join(list(METHOD_HEADS)[:-1]) + f" or {list(METHOD_HEADS)[-1]}, "
                  "optionally followed by +first-order or +hearing (for example tpdf+hearing)")


@dataclass(frozen=True)
class Method:
    """One way of requantizing, as named on the command line.

    Attributes
    ----------
    label : str
        The method string in canonical form, e.g. ``'tpdf+hearing'``.
    quantizer : {'round', 'truncate'}
    dither : {'none', 'rpdf', 'tpdf', 'tpdf-hp'}
    shaping : {'none', 'first-order', 'hearing'}
    """

    label: str
    quantizer: str
    dither: str
    shaping: str

    def recipe(self, base):
        """This method's :class:`~requant.recipe.Recipe`: word length, seed and the
        ``hearing`` design from ``base``, quantizer, dither and shaping from the method."""
        if self.shaping == "hearing" and base.shaping.kind == "hearing":
            shaping = base.shaping
        else:
            shaping = Shaping.parse(self.shaping)
        return base.replace(quantizer=self.quantizer, dither=self.dither, shaping=shaping)

    @property
    def slug(self):
        """A file-name-safe form of the label (``tpdf+hearing`` -> ``tpdf_hearing``)."""
        return re.sub(r"[^a-z0-9-]+", "_", self.label)


def parse_method(text):
    """Parse a method string: a quantizer or a dither, optionally ``+`` a shaping.

    Parameters
    ----------
    text : str
        ``truncate``, ``round``, ``rpdf``, ``tpdf``, ``tpdf-hp``, each
        optionally followed by ``+first-order`` or ``+hearing``. A dither
        implies the ``round`` quantizer; ``truncate`` and ``round`` imply no
        dither. Case and surrounding spaces are ignored.

    Returns
    -------
    Method

    Raises
    ------
    TypeError
        If ``text`` is not a str.
    UsageError
        For anything else, in one line that lists the allowed forms.

    Examples
    --------
    >>> parse_method("tpdf+hearing")
    Method(label='tpdf+hearing', quantizer='round', dither='tpdf', shaping='hearing')
    """
    if not isinstance(text, str):
        raise TypeError(f"method must be a str, not {type(text).__name__} {text!r}")
    norm = text.strip().lower()
    head, plus, shaping = norm.partition("+")
    if head not in METHOD_HEADS or (plus and shaping not in METHOD_SHAPINGS):
        raise UsageError(f"unknown method {text!r}: use {_ALLOWED_FORMS}")
    quantizer, dither = METHOD_HEADS[head]
    return Method(label=norm, quantizer=quantizer, dither=dither,
                  shaping=shaping if plus else "none")


def parse_methods(texts):
    """Parse several method strings; refuse an empty list and repeats.

    Returns
    -------
    list of Method
    """
    if isinstance(texts, str):
        texts = [texts]
    methods = [parse_method(t) for t in texts]
    if not methods:
        raise UsageError(f"no method given: name at least one with --method, using "
                         f"{_ALLOWED_FORMS}")
    seen = set()
    for m in methods:
        if m.label in seen:
            raise UsageError(f"method {m.label!r} is given twice; name each method once")
        seen.add(m.label)
    return methods


