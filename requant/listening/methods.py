"""The methods a listening kit compares: ``tpdf``, ``truncate``, ``tpdf+hearing``,
``tpdf@12``, ..., and the pairs of methods it tests against each other."""

import re
from dataclasses import dataclass, replace

from requant.errors import UsageError
from requant.recipe import DITHERS, Shaping

__all__ = ["Method", "METHOD_HEADS", "METHOD_SHAPINGS", "DEFAULT_METHODS", "parse_method",
           "parse_methods", "parse_pair", "plan_methods"]

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
                  "optionally followed by +first-order or +hearing and by @BITS (for example "
                  "tpdf+hearing or tpdf@12)")


@dataclass(frozen=True)
class Method:
    """One way of requantizing, as named on the command line.

    Attributes
    ----------
    label : str
        The method string in canonical form, e.g. ``'tpdf+hearing'`` or ``'tpdf@12'``.
    quantizer : {'round', 'truncate'}
    dither : {'none', 'rpdf', 'tpdf', 'tpdf-hp'}
    shaping : {'none', 'first-order', 'hearing'}
    bits : int, 1..32, optional
        Its own word length; None: the kit's.
    """

    label: str
    quantizer: str
    dither: str
    shaping: str
    bits: int | None = None

    def recipe(self, base):
        """This method's :class:`~requant.recipe.Recipe`: word length (unless the method
        has its own), seed and the ``hearing`` design from ``base``; quantizer, dither and
        shaping from the method."""
        if self.shaping == "hearing" and base.shaping.kind == "hearing":
            shaping = base.shaping
        else:
            shaping = Shaping.parse(self.shaping)
        return base.replace(quantizer=self.quantizer, dither=self.dither, shaping=shaping,
                            bits=base.bits if self.bits is None else self.bits)

    def key(self, bits):
        """What decides this method's output with the kit's word length ``bits``."""
        return (self.quantizer, self.dither, self.shaping, bits if self.bits is None else self.bits)

    @property
    def slug(self):
        """A file-name-safe form of the label (``tpdf+hearing@12`` -> ``tpdf_hearing_12bit``)."""
        head, _, bits = self.label.partition("@")
        slug = re.sub(r"[^a-z0-9-]+", "_", head)
        return f"{slug}_{bits}bit" if bits else slug


def parse_method(text):
    """Parse a method string: a quantizer or a dither, optionally ``+`` a shaping.

    Parameters
    ----------
    text : str
        ``truncate``, ``round``, ``rpdf``, ``tpdf``, ``tpdf-hp``, each
        optionally followed by ``+first-order`` or ``+hearing``, then
        optionally by ``@BITS`` (a word length of its own, 1 to 32). A dither
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
    Method(label='tpdf+hearing', quantizer='round', dither='tpdf', shaping='hearing', bits=None)
    >>> parse_method("tpdf@12").bits
    12
    """
    if not isinstance(text, str):
        raise TypeError(f"method must be a str, not {type(text).__name__} {text!r}")
    norm = text.strip().lower()
    body, at, bits_text = norm.partition("@")
    head, plus, shaping = body.partition("+")
    if head not in METHOD_HEADS or (plus and shaping not in METHOD_SHAPINGS):
        raise UsageError(f"unknown method {text!r}: use {_ALLOWED_FORMS}")
    bits = None
    if at:
        if not re.fullmatch(r"[0-9]{1,2}", bits_text) or not 1 <= int(bits_text) <= 32:
            raise UsageError(f"method {text!r}: the word length after @ must be a whole number "
                             "of bits from 1 to 32, e.g. tpdf@12")
        bits = int(bits_text)
    quantizer, dither = METHOD_HEADS[head]
    label = body if bits is None else f"{body}@{bits}"
    return Method(label=label, quantizer=quantizer, dither=dither,
                  shaping=shaping if plus else "none", bits=bits)


def parse_methods(texts, bits=None):
    """Parse several method strings; refuse an empty list and repeats.

    Parameters
    ----------
    texts : sequence of str
    bits : int, optional
        The kit's word length: ``tpdf`` and ``tpdf@16`` are then the same method.

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
    seen = {}
    for m in methods:
        key = m.label if bits is None else m.key(bits)
        if key in seen:
            same = "" if seen[key] == m.label else f" (as {seen[key]!r})"
            raise UsageError(f"method {m.label!r} is given twice{same}; name each method once")
        seen[key] = m.label
    return methods


def parse_pair(text):
    """Parse a pair of methods to test against each other: ``'A,B'``.

    Returns
    -------
    (Method, Method)

    Raises
    ------
    UsageError
        Unless ``text`` is two different method strings separated by one comma.
    """
    if not isinstance(text, str):
        raise TypeError(f"pair must be a str, not {type(text).__name__} {text!r}")
    parts = text.split(",")
    if len(parts) != 2 or not all(p.strip() for p in parts):
        raise UsageError(f"pair {text!r}: give two methods separated by a comma, e.g. "
                         "tpdf,tpdf+hearing or tpdf@12,tpdf@16")
    return parse_method(parts[0]), parse_method(parts[1])


def plan_methods(methods, pairs, bits):
    """The methods a kit renders, and the pairs it compares, as indices.

    Parameters
    ----------
    methods : sequence of str or None
        Method strings; None: :data:`DEFAULT_METHODS` when no pair is given,
        else only the methods the pairs name.
    pairs : sequence of str
        ``'A,B'`` strings (:func:`parse_pair`); methods they name that are not
        in ``methods`` are added.
    bits : int
        The kit's word length.

    Returns
    -------
    methods : list of Method
        When the methods do not all share one word length, every label names
        its own (``tpdf`` becomes ``tpdf@16``).
    pairs : list of (int, int)
        Indices into ``methods``.

    Raises
    ------
    UsageError
        For a bad method or pair, a repeated method or pair, or a pair of one
        method with itself.
    """
    pairs = [parse_pair(p) for p in (pairs or ())]
    if methods is None:
        methods = () if pairs else DEFAULT_METHODS
    out = parse_methods(list(methods), bits) if methods else []
    index = {m.key(bits): i for i, m in enumerate(out)}
    planned = []
    for a, b in pairs:
        if a.key(bits) == b.key(bits):
            raise UsageError(f"pair {a.label},{b.label} compares a method with itself; name two "
                             "different methods")
        ends = []
        for m in (a, b):
            if m.key(bits) not in index:
                index[m.key(bits)] = len(out)
                out.append(m)
            ends.append(index[m.key(bits)])
        if tuple(ends) in planned or tuple(ends[::-1]) in planned:
            raise UsageError(f"pair {a.label},{b.label} is given twice; name each pair once")
        planned.append(tuple(ends))
    if len({m.key(bits)[3] for m in out}) > 1:
        out = [m if m.bits is not None else replace(m, label=f"{m.label}@{bits}", bits=bits)
               for m in out]
    return out, planned


