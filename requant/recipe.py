"""The recipe: everything that decides the output bits, in one frozen object.

A :class:`Recipe` holds the target word length, the quantizer, the dither,
the noise shaping (:class:`Shaping`), the seed and whether to dither audio
that already lies on the target grid. It validates itself when it is made,
in this module only, and it has one dictionary form (:meth:`Recipe.to_dict`,
:meth:`Recipe.from_dict`) that the report's ``settings`` block, the batch
manifest's settings id, delivery profiles and cluster tasks all use.

How the output is *written* (paths, overwrite, container, block size,
progress) is not part of the recipe: the same recipe gives the same codes
whatever the block size or the destination.

Validation errors are :class:`RecipeError` (a :class:`~requant.errors.UsageError`):
one sentence naming the field, the value and what is allowed. They keep the
three parts apart (``field``, ``value``, ``problem``) so that a profile can
say the same thing in its own words (``profile 'x.toml': dither = 'tpfd' is
not known ...``).

>>> r = Recipe(bits=12, shaping="hearing")
>>> r.bits, r.shaping.kind, r.shaping.order, r.shaping.limit_db
(12, 'hearing', 9, 13.0)
>>> Recipe.from_dict(r.to_dict()) == r
True
"""

from __future__ import annotations

import dataclasses
import difflib
import json
import math
import numbers
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import ClassVar

from requant.errors import InputError, UsageError

__all__ = [
    "QUANTIZERS",
    "DITHERS",
    "SHAPING_KINDS",
    "SHAPING_NAMES",
    "MAX_TAPS",
    "DEFAULT_ORDER",
    "DEFAULT_LIMIT_DB",
    "MAX_LIMIT_DB",
    "SEED_MAX",
    "SILENCE_MODES",
    "DEFAULT_SILENCE_MIN_MS",
    "MAX_SILENCE_MIN_MS",
    "MAX_GAIN_DB",
    "MIN_CEILING_DBTP",
    "MAX_CEILING_DBTP",
    "DOWNMIX_LAWS",
    "MIN_RATE",
    "MAX_RATE",
    "RECIPE_KEYS",
    "RecipeError",
    "RecipeTypeError",
    "Shaping",
    "Recipe",
    "parse_coefficients",
    "load_coefficients",
    "check_bits",
    "check_shaping_order",
    "check_shaping_limit",
    "check_dither_in_loop",
    "describe_value",
    "silence_min_frames",
]

#: Quantizers: ``round`` (nearest, mid-tread, ties up) and ``truncate`` (toward minus infinity).
QUANTIZERS = ("round", "truncate")
#: Dithers. Each has its kernel mode and error model in :mod:`requant.dsp.quantizer`
#: (checked there at import: a name missing from either place is an error, not a silent
#: wrong model).
DITHERS = ("none", "rpdf", "tpdf", "tpdf-hp")
#: Kinds of noise shaping; ``custom`` holds the user's own coefficients.
SHAPING_KINDS = ("none", "first-order", "hearing", "custom")
#: Shaping names a user may type (a file or a list of numbers gives ``custom``).
SHAPING_NAMES = ("none", "first-order", "hearing")
#: Most feedback taps of any shaping filter.
MAX_TAPS = 64
#: Default order of the ``hearing`` design.
DEFAULT_ORDER = 9
#: Default limit on the ``hearing`` design's total noise power gain 10·log10 Σ n_k², dB.
DEFAULT_LIMIT_DB = 13.0
#: Largest allowed limit on the total noise power gain, dB.
MAX_LIMIT_DB = 30.0
#: Largest seed (63 bits, so it fits every signed 64-bit store).
SEED_MAX = 2**63 - 1
#: What to do with digital silence: ``keep`` writes runs of exact zeros as exact zeros,
#: ``dither`` treats them like any other quiet passage.
SILENCE_MODES = ("keep", "dither")
#: Shortest run of exact zeros (ms) that counts as digital silence, by default. 20 ms is far
#: longer than the zero runs inside music (a 20 Hz tone of one 24-bit LSB amplitude is within
#: half an LSB of zero, so coded 0, for 8.3 ms, a sixth of its 50 ms period, at each
#: crossing; a zero crossing of anything louder is one or two samples), and shorter than any
#: gap a listener hears as silence rather than as a click (gaps of a few ms are detected as
#: gaps, common practice) or than the tail of a one-shot.
DEFAULT_SILENCE_MIN_MS = 20.0
#: Longest allowed minimum silent run, ms (the requantizer holds back that much audio).
MAX_SILENCE_MIN_MS = 10_000.0
#: Largest gain before requantizing, dB either way (a bigger change is a mistake, not a delivery).
MAX_GAIN_DB = 60.0
#: Lowest and highest true-peak ceiling, dBTP.
MIN_CEILING_DBTP = -60.0
MAX_CEILING_DBTP = 0.0
#: How several channels become one: ``mean`` (the channels' average: a full-scale correlated
#: stereo file cannot clip), ``-3db`` (the sum times 1/√N: each of two channels at −3.01 dB,
#: equal power for uncorrelated channels, so a correlated full-scale stereo file peaks at +3 dB).
DOWNMIX_LAWS = ("mean", "-3db")
#: Lowest and highest delivery sample rate, Hz.
MIN_RATE = 8000
MAX_RATE = 384000
#: Largest magnitude of a user coefficient: beyond it the loop cannot be useful, and
#: sums of such numbers overflow.
MAX_COEFFICIENT = 1e6

#: The recipe's keys in its dictionary form, and what each holds (used in messages).
RECIPE_KEYS = {
    "bits": "an integer word length from 1 to 32",
    "quantizer": "one of " + ", ".join(QUANTIZERS),
    "dither": "one of " + ", ".join(DITHERS),
    "shaping": "none, first-order, hearing, a .json file, or a list of coefficients",
    "shaping_order": f"an integer between 1 and {MAX_TAPS} (the order of the 'hearing' design)",
    "shaping_limit_db": f"a number of dB above 0 and at most {MAX_LIMIT_DB:g} (the limit on the "
                        "total noise gain of the 'hearing' design)",
    "shaping_coeffs": f"a list of 1 to {MAX_TAPS} finite feedback coefficients h1, h2, ...",
    "shaping_source": "the file the coefficients came from, or null",
    "shaping_rate": "the sample rate in Hz the coefficients were made for, or null",
    "seed": "an integer from 0 to 2**63 - 1, or null for a fresh one",
    "force_dither": "true or false",
    "silence": "one of " + ", ".join(SILENCE_MODES),
    "silence_min_ms": f"a number of ms above 0 and at most {MAX_SILENCE_MIN_MS:g} (the shortest "
                      "run of exact zeros kept silent)",
    "channels": "1 or 2 (the delivered channels), or null to keep the source's",
    "downmix": "one of " + ", ".join(DOWNMIX_LAWS),
    "rate": f"a sample rate in Hz from {MIN_RATE} to {MAX_RATE}, or null to keep the source's",
    "gain_db": f"a gain in dB from {-MAX_GAIN_DB:g} to {MAX_GAIN_DB:g}, applied before dither",
    "peak_ceiling_dbtp": f"a true-peak ceiling in dBTP from {MIN_CEILING_DBTP:g} to "
                         f"{MAX_CEILING_DBTP:g}, or null for none",
}


# --------------------------------------------------------------------------- errors

def describe_value(value):
    """A value as a sentence names it: ``the string '16'``, ``the boolean true``."""
    if isinstance(value, bool):
        return f"the boolean {str(value).lower()}"
    if isinstance(value, int):
        return f"the integer {value}"
    if isinstance(value, float):
        return f"the number {value!r}"
    if isinstance(value, str):
        return f"the string {value!r}"
    if isinstance(value, (list, tuple)):
        return "a list"
    if isinstance(value, dict):
        return "a table"
    if value is None:
        return "nothing (null)"
    return f"a {type(value).__name__}"


class RecipeError(UsageError):
    """A recipe field with a value that is not allowed.

    Attributes
    ----------
    field : str
        The key, as in :data:`RECIPE_KEYS`.
    value : object
        The value given.
    problem : str
        The rest of the sentence, e.g. ``is out of range; it must be ...``.
    typed : bool
        True when the value is of the wrong kind: the sentence then reads
        ``{field} must be ..., not {value}`` and does not repeat the value.
    """

    def __init__(self, field, value, problem, *, typed=False):
        self.field = field
        self.value = value
        self.problem = problem
        self.typed = typed
        super().__init__(self.sentence())

    def sentence(self, *, spaced=False, where=None):
        """The message; ``spaced`` writes ``key = value`` (as a TOML file does)."""
        if self.typed:
            text = f"{self.field} {self.problem}"
        else:
            eq = " = " if spaced else "="
            text = f"{self.field}{eq}{self.value!r} {self.problem}"
        return f"{where}: {text}" if where else text


class RecipeTypeError(RecipeError, TypeError):
    """A recipe field given a value of the wrong kind (also a :class:`TypeError`)."""


def _typed(field, value):
    return RecipeTypeError(field, value, f"must be {RECIPE_KEYS[field]}, not "
                                         f"{describe_value(value)}", typed=True)


def _is_int(value):
    return isinstance(value, numbers.Integral) and not isinstance(value, bool)


def _is_number(value):
    return isinstance(value, numbers.Real) and not isinstance(value, bool)


def _choice(field, value, choices):
    if not isinstance(value, str):
        raise _typed(field, value)
    if value not in choices:
        hint = difflib.get_close_matches(value, choices, n=1)
        did = f" (did you mean {hint[0]!r}?)" if hint else ""
        raise RecipeError(field, value, f"is not known{did}; choose one of {', '.join(choices)}")
    return value


def check_bits(bits):
    """``bits`` as an int 1..32; :class:`RecipeError` otherwise."""
    if not _is_int(bits):
        raise _typed("bits", bits)
    if not 1 <= bits <= 32:
        raise RecipeError("bits", bits, f"is out of range; it must be {RECIPE_KEYS['bits']}")
    return int(bits)


def check_shaping_order(order):
    """The order of the ``hearing`` design as an int 1..64."""
    if not _is_int(order):
        raise _typed("shaping_order", order)
    if not 1 <= order <= MAX_TAPS:
        raise RecipeError("shaping_order", order,
                          f"is out of range; it must be {RECIPE_KEYS['shaping_order']}")
    return int(order)


def check_shaping_limit(limit_db):
    """The ``hearing`` design's total-gain limit as a float in (0, 30] dB."""
    if not _is_number(limit_db):
        raise _typed("shaping_limit_db", limit_db)
    if not (math.isfinite(limit_db) and 0.0 < float(limit_db) <= MAX_LIMIT_DB):
        raise RecipeError("shaping_limit_db", limit_db,
                          f"is out of range; it must be {RECIPE_KEYS['shaping_limit_db']}")
    return float(limit_db)


def check_dither_in_loop(dither, shaped):
    """Refuse a dither that is not independent from sample to sample inside a shaping loop.

    The loop's noise model, (Δ²/4)·Σ n_k², assumes i.i.d. dither (Lipshitz,
    Wannamaker & Vanderkooy, "Dithered noise shapers and recursive digital
    filters", JAES 52(11), 2004); high-passed TPDF is not.
    """
    if shaped and dither == "tpdf-hp":
        raise RecipeError("dither", dither,
                          "is not independent from sample to sample, so it does not belong "
                          "inside a noise-shaping loop; use --dither tpdf with --shaping")


def _check_seed(seed):
    if seed is None:
        return None
    if not _is_int(seed):
        raise _typed("seed", seed)
    if not 0 <= seed <= SEED_MAX:
        raise RecipeError("seed", seed, f"is out of range; it must be {RECIPE_KEYS['seed']}")
    return int(seed)


def silence_min_frames(ms, sample_rate):
    """``ms`` milliseconds as a whole number of frames at ``sample_rate``: rounded up, at
    least 1 (a run this long or longer counts as digital silence)."""
    return max(1, math.ceil(float(ms) * float(sample_rate) / 1000.0 - 1e-9))


def _check_silence_min(ms):
    if not _is_number(ms):
        raise _typed("silence_min_ms", ms)
    if not (math.isfinite(ms) and 0.0 < float(ms) <= MAX_SILENCE_MIN_MS):
        raise RecipeError("silence_min_ms", ms,
                          f"is out of range; it must be {RECIPE_KEYS['silence_min_ms']}")
    return float(ms)


def _check_gain(gain_db):
    if not _is_number(gain_db):
        raise _typed("gain_db", gain_db)
    if not (math.isfinite(gain_db) and abs(float(gain_db)) <= MAX_GAIN_DB):
        raise RecipeError("gain_db", gain_db,
                          f"is out of range; it must be {RECIPE_KEYS['gain_db']}")
    return float(gain_db)


def _check_ceiling(ceiling):
    if ceiling is None:
        return None
    if not _is_number(ceiling):
        raise _typed("peak_ceiling_dbtp", ceiling)
    if not (math.isfinite(ceiling) and MIN_CEILING_DBTP <= float(ceiling) <= MAX_CEILING_DBTP):
        raise RecipeError("peak_ceiling_dbtp", ceiling,
                          f"is out of range; it must be {RECIPE_KEYS['peak_ceiling_dbtp']}")
    return float(ceiling)


def _check_channels(channels):
    if channels is None:
        return None
    if not _is_int(channels):
        raise _typed("channels", channels)
    if channels not in (1, 2):
        raise RecipeError("channels", channels,
                          f"is not allowed; it must be {RECIPE_KEYS['channels']}")
    return int(channels)


def _check_rate(rate):
    if rate is None:
        return None
    if _is_number(rate) and not _is_int(rate) and math.isfinite(rate) and rate == int(rate):
        rate = int(rate)
    if not _is_int(rate):
        raise _typed("rate", rate)
    if not MIN_RATE <= rate <= MAX_RATE:
        raise RecipeError("rate", rate, f"is out of range; it must be {RECIPE_KEYS['rate']}")
    return int(rate)


def _check_bool(field, value):
    if not isinstance(value, bool):
        raise _typed(field, value)
    return value


# --------------------------------------------------------------------------- coefficients

def _validate_values(values, source):
    """1..64 finite numbers of sane size, as a tuple of float."""
    if not 1 <= len(values) <= MAX_TAPS:
        raise UsageError(f"{source} has {len(values)} coefficients; give between 1 and {MAX_TAPS}")
    out = []
    for i, v in enumerate(values):
        if not _is_number(v):
            raise UsageError(f"{source}: coefficient {i + 1} is {v!r}, not a number; give 1 to "
                             f"{MAX_TAPS} finite numbers such as 1.2 or -0.4")
        if not math.isfinite(v):
            raise UsageError(f"{source}: coefficient {i + 1} is {v!r}; give finite numbers")
        if abs(v) > MAX_COEFFICIENT:
            raise UsageError(f"{source}: coefficient {i + 1} is {v!r}; a feedback coefficient "
                             f"beyond ±{MAX_COEFFICIENT:g} cannot shape noise usefully; give "
                             "smaller numbers")
        out.append(float(v))
    return tuple(out)


def parse_coefficients(text):
    """Parse a comma-separated list of feedback coefficients.

    Parameters
    ----------
    text : str
        For example ``"1.2, -0.4"``; 1 to 64 finite numbers.

    Returns
    -------
    tuple of float
        The coefficients ``h``.

    Raises
    ------
    TypeError
        If ``text`` is not a string.
    UsageError
        If an entry is empty or not a finite number, or the count is out of
        range.

    Examples
    --------
    >>> parse_coefficients("1.2, -0.4")
    (1.2, -0.4)
    """
    if not isinstance(text, str):
        raise TypeError(f"coefficients must be given as a str, got {type(text).__name__}")
    items = [s.strip() for s in text.split(",")]
    if items == [""]:
        raise UsageError(f"coefficient list {text!r} is empty; give numbers separated by "
                         "commas, e.g. '1.2,-0.4'")
    values = []
    for i, item in enumerate(items):
        if not item:
            raise UsageError(f"coefficient list {text!r} has an empty entry at position "
                             f"{i + 1}; give numbers separated by commas, e.g. '1.2,-0.4'")
        try:
            values.append(float(item))
        except ValueError:
            raise UsageError(f"coefficient list {text!r}: entry {i + 1} ({item!r}) is not a "
                             "number; give numbers separated by commas, e.g. '1.2,-0.4'") from None
    return _validate_values(values, f"coefficient list {text!r}")


def load_coefficients(path, *, sample_rate=None):
    """Read feedback coefficients from a JSON file.

    Parameters
    ----------
    path : str or os.PathLike
        A JSON file holding either a list of numbers or an object with a
        ``"coefficients"`` list (as ``requant shaper show --json`` writes).
    sample_rate : float, Hz, optional
        If given and the file records a different ``"sample_rate"``, refuse:
        a filter designed for one rate puts its noise at the wrong
        frequencies at another.

    Returns
    -------
    tuple of float
        The coefficients ``h`` (1 to 64 finite numbers).

    Raises
    ------
    InputError
        If the file cannot be read, is not JSON, or holds no coefficient list.
    UsageError
        If a coefficient is invalid, or the sample rate does not match.
    """
    h, recorded = _read_coefficient_file(path)
    if sample_rate is not None and recorded is not None:
        _check_design_rate(recorded, sample_rate, str(Path(path)))
    return h


def _read_coefficient_file(path):
    """(coefficients, recorded sample rate or None) of a JSON coefficient file."""
    p = Path(path)
    where = f"shaping file {str(p)!r}"
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read {where} ({exc.__class__.__name__}: "
                         f"{getattr(exc, 'strerror', None) or exc}); check the path") from None
    try:
        data = json.loads(text)
    except (json.JSONDecodeError, RecursionError) as exc:
        pos = (f"line {exc.lineno}, column {exc.colno}: {exc.msg}"
               if isinstance(exc, json.JSONDecodeError) else "nested too deeply")
        raise InputError(f"{where} is not valid JSON ({pos}); write a list of numbers or "
                         '{"coefficients": [...]}') from None
    recorded = None
    if isinstance(data, dict):
        if "coefficients" not in data:
            raise InputError(f'{where} has no "coefficients" entry; write a list of numbers or '
                             '{"coefficients": [...]}')
        recorded = data.get("sample_rate")
        if recorded is not None and (not _is_number(recorded) or not math.isfinite(recorded)
                                     or recorded <= 0):
            raise InputError(f"{where} has sample_rate {recorded!r}; it must be a number in Hz")
        data = data["coefficients"]
    if not isinstance(data, list):
        raise InputError(f"{where} holds {type(data).__name__} where a list of coefficients "
                         'belongs; write a list of numbers or {"coefficients": [...]}')
    return _validate_values(data, where), (None if recorded is None else float(recorded))


def _check_design_rate(recorded, sample_rate, source):
    if float(recorded) != float(sample_rate):
        raise UsageError(
            f"shaping file {source!r} was made for {recorded:g} Hz but the audio is "
            f"{float(sample_rate):g} Hz; use 'hearing' to design for this rate, or remove "
            '"sample_rate" from the file to use it anyway')


# --------------------------------------------------------------------------- shaping

@dataclass(frozen=True)
class Shaping:
    """Noise shaping: which filter feeds the quantizer's error back.

    Parameters
    ----------
    kind : {'none', 'first-order', 'hearing', 'custom'}, default 'none'
        ``first-order``: NTF = 1 − z⁻¹. ``hearing``: designed for each
        file's own sample rate from Terhardt's (1979) threshold in quiet
        (:func:`requant.dsp.shaping.design_hearing`). ``custom``: the
        coefficients given.
    order : int, 1..64, default 9 for ``hearing`` (None otherwise)
        Order of the ``hearing`` design.
    limit_db : float, dB, (0, 30], default 13 for ``hearing`` (None otherwise)
        Limit on the ``hearing`` design's total noise power gain.
    coeffs : tuple of float, for ``custom``
        Feedback coefficients h_1..h_K (1 to 64); NTF(z) = 1 − Σ h_k z⁻ᵏ.
    source : str, optional
        The JSON file the coefficients came from (for people; not part of
        what decides the output).
    rate : float, Hz, optional
        The sample rate the coefficients were made for; audio at another
        rate is refused. None: any rate.

    Use :meth:`parse` to turn what a user typed into a ``Shaping``.
    """

    kind: str = "none"
    order: int | None = None
    limit_db: float | None = None
    coeffs: tuple[float, ...] = ()
    source: str | None = None
    rate: float | None = None

    def __post_init__(self):
        kind = _choice("shaping", self.kind, SHAPING_KINDS)
        if kind == "hearing":
            order = DEFAULT_ORDER if self.order is None else check_shaping_order(self.order)
            limit = (DEFAULT_LIMIT_DB if self.limit_db is None
                     else check_shaping_limit(self.limit_db))
        else:
            order = limit = None  # they belong to the hearing design only
        if kind == "custom":
            if isinstance(self.coeffs, (str, bytes)) or not hasattr(self.coeffs, "__len__"):
                raise _typed("shaping_coeffs", self.coeffs)
            coeffs = _validate_values(list(self.coeffs), "shaping coefficients")
            rate = self.rate
            if rate is not None and (not _is_number(rate) or not math.isfinite(rate) or rate <= 0):
                raise RecipeError("shaping_rate", rate, f"must be {RECIPE_KEYS['shaping_rate']}")
            rate = None if rate is None else float(rate)
            source = None if self.source is None else str(self.source)
        else:
            if self.coeffs:
                raise RecipeError("shaping_coeffs", list(self.coeffs),
                                  f"belongs to custom shaping, not {kind!r}")
            coeffs, rate, source = (), None, None
        for name, value in (("order", order), ("limit_db", limit), ("coeffs", coeffs),
                            ("rate", rate), ("source", source)):
            object.__setattr__(self, name, value)

    @classmethod
    def parse(cls, spec, *, order=None, limit_db=None, base_dir=None):
        """What a user typed, as a ``Shaping``.

        Parameters
        ----------
        spec : str, os.PathLike, sequence of float or Shaping
            ``none``, ``first-order``, ``hearing``, a path ending in ``.json``
            (read now: the recipe holds the coefficients), a comma list
            ``h1,h2,...``, or a list of numbers.
        order, limit_db : optional
            The ``hearing`` design's order and limit (ignored for other kinds).
        base_dir : str, optional
            Folder against which a relative ``.json`` path is resolved (a
            profile's own folder).

        Raises
        ------
        UsageError, InputError
            One sentence naming what is wrong.
        """
        if isinstance(spec, Shaping):
            if spec.kind == "hearing" and (order is not None or limit_db is not None):
                return dataclasses.replace(spec, order=spec.order if order is None else order,
                                           limit_db=spec.limit_db if limit_db is None else limit_db)
            return spec
        if spec is None:
            spec = "none"
        if isinstance(spec, (list, tuple)):
            return cls("custom", coeffs=_validate_values(list(spec), "shaping coefficients"))
        if not isinstance(spec, (str, os.PathLike)):
            raise _typed("shaping", spec)
        text = os.fspath(spec).strip()
        if text in ("none", "first-order"):
            return cls(text)
        if text == "hearing":
            return cls("hearing", order=order, limit_db=limit_db)
        if text.lower().endswith(".json"):
            path = text
            if base_dir is not None and not os.path.isabs(path):
                path = os.path.join(base_dir, path)
            path = os.path.abspath(path)
            coeffs, rate = _read_coefficient_file(path)
            return cls("custom", coeffs=coeffs, source=path, rate=rate)
        if any(c.isdigit() for c in text):
            return cls("custom", coeffs=parse_coefficients(text))
        hint = difflib.get_close_matches(text, SHAPING_NAMES, n=1)
        did = f" (did you mean {hint[0]!r}?)" if hint else ""
        raise RecipeError("shaping", text, f"is not known; use one of {', '.join(SHAPING_NAMES)}, "
                                           "a .json file, or coefficients separated by commas"
                                           f"{did}")

    @property
    def name(self):
        """How reports and people name it: the kind, or the file for coefficients from one."""
        if self.kind == "custom" and self.source:
            return self.source
        return self.kind

    @property
    def label(self):
        """A short ASCII label: ``none``, ``first-order``, ``hearing``, ``file`` or ``custom``."""
        if self.kind == "custom" and self.source:
            return "file"
        return self.kind

    def check_rate(self, sample_rate):
        """Refuse audio at another rate than the one the coefficients were made for."""
        if self.rate is not None:
            _check_design_rate(self.rate, sample_rate, self.source or "coefficients")

    def describe(self):
        """One phrase: ``hearing (order 9, limit 13 dB)``, ``custom (3 taps)``."""
        if self.kind == "hearing":
            return f"hearing (order {self.order}, limit {self.limit_db:g} dB)"
        if self.kind == "custom":
            where = f" from {self.source}" if self.source else ""
            return f"custom ({len(self.coeffs)} taps{where})"
        return self.kind


# --------------------------------------------------------------------------- the recipe

#: The keys of the stages before the quantizer (channels, rate, gain).
_PREPARE_KEYS = ("channels", "downmix", "rate", "gain_db", "peak_ceiling_dbtp")

_FLAT_SHAPING = ("shaping", "shaping_order", "shaping_limit_db", "shaping_coeffs",
                 "shaping_source", "shaping_rate")


@dataclass(frozen=True)
class Recipe:
    """Everything that decides the output bits of a requantization.

    Parameters
    ----------
    bits : int, 1..32, default 16
        Target word length. One LSB is Δ = 2^−(bits−1), full scale 1.0.
    quantizer : {'round', 'truncate'}, default 'round'
        ``round``: nearest code, mid-tread, Δ·⌊x/Δ + ½⌋ (exact halves go up).
        ``truncate``: toward minus infinity, as dropping two's-complement bits
        does.
    dither : {'none', 'rpdf', 'tpdf', 'tpdf-hp'}, default 'tpdf'
        Added before quantizing: rectangular (1 LSB peak to peak),
        triangular (2 LSB p-p), or high-passed triangular r[n] − r[n−1].
        Predicted error power: Δ²/12, Δ²/6, Δ²/4, Δ²/4 (Lipshitz, Wannamaker
        & Vanderkooy 1992); truncation adds Δ²/4 of bias.
    shaping : Shaping or str, default 'none'
        Noise shaping; a string or a list of numbers goes through
        :meth:`Shaping.parse`. High-passed TPDF is refused inside a shaping
        loop (it is not independent from sample to sample).
    seed : int, 0..2**63−1, or None, default None
        The same seed gives bit-identical output. None: a fresh seed is drawn
        at conversion time and recorded in the report. In a library batch it
        is the run seed, from which each file's seed derives.
    force_dither : bool, default False
        Dither even when the input already lies on the target grid (otherwise
        such input is written unchanged).
    silence : {'keep', 'dither'}, default 'keep'
        ``keep``: in every run of at least ``silence_min_ms`` of exact zeros,
        per channel, the output is exact zeros and the error is zero (no
        dither hiss out of nothing; the shaping filter's and the high-passed
        dither's memory are cleared there). ``dither``: zeros are dithered
        like any other sample.
    silence_min_ms : float, ms, (0, 10000], default 20
        The shortest run of exact zeros kept silent
        (:data:`DEFAULT_SILENCE_MIN_MS` says why 20); in frames, see
        :meth:`silence_frames`.
    channels : {1, 2} or None, default None
        The delivered channels; None keeps the source's. Several channels
        become one by ``downmix``; one becomes two by copying it. Applied first.
    downmix : {'mean', '-3db'}, default 'mean'
        How several channels become one (:data:`DOWNMIX_LAWS`).
    rate : int, Hz, 8000..384000, or None, default None
        The delivered sample rate; None keeps the source's. Converted in
        float64 (:mod:`requant.dsp.resample`) after the channels, before the
        gain; dither, shaping, the error signal and the report are those of
        the new rate.
    gain_db : float, dB, −60..+60, default 0
        A gain applied in float64 before dither: the error signal is the
        output minus the *gained* input.
    peak_ceiling_dbtp : float, dBTP, −60..0, or None, default None
        A true-peak ceiling (ITU-R BS.1770-4 true peak): the file is measured
        first, and if its true peak after ``gain_db`` is above the ceiling
        the gain is lowered by the difference (one gain for the whole file;
        never a limiter, never a raise).

    Notes
    -----
    A ``Recipe`` is frozen and validated when made; invalid values raise
    :class:`RecipeError` with one sentence. ``to_dict``/``from_dict`` give
    its JSON form; :meth:`identity` is what a batch hashes into its settings
    id. Use :meth:`replace` for a changed copy.
    """

    bits: int = 16
    quantizer: str = "round"
    dither: str = "tpdf"
    shaping: Shaping = field(default_factory=Shaping)
    seed: int | None = None
    force_dither: bool = False
    silence: str = "keep"
    silence_min_ms: float = DEFAULT_SILENCE_MIN_MS
    channels: int | None = None
    downmix: str = "mean"
    rate: int | None = None
    gain_db: float = 0.0
    peak_ceiling_dbtp: float | None = None

    #: Dictionary keys that are not fields of their own (the shaping's parts).
    FLAT_SHAPING_KEYS: ClassVar[tuple[str, ...]] = _FLAT_SHAPING

    def __post_init__(self):
        object.__setattr__(self, "bits", check_bits(self.bits))
        _choice("quantizer", self.quantizer, QUANTIZERS)
        _choice("dither", self.dither, DITHERS)
        if not isinstance(self.shaping, Shaping):
            object.__setattr__(self, "shaping", Shaping.parse(self.shaping))
        object.__setattr__(self, "seed", _check_seed(self.seed))
        _check_bool("force_dither", self.force_dither)
        _choice("silence", self.silence, SILENCE_MODES)
        object.__setattr__(self, "silence_min_ms", _check_silence_min(self.silence_min_ms))
        object.__setattr__(self, "channels", _check_channels(self.channels))
        _choice("downmix", self.downmix, DOWNMIX_LAWS)
        object.__setattr__(self, "rate", _check_rate(self.rate))
        object.__setattr__(self, "gain_db", _check_gain(self.gain_db))
        object.__setattr__(self, "peak_ceiling_dbtp", _check_ceiling(self.peak_ceiling_dbtp))
        check_dither_in_loop(self.dither, self.shaping.kind != "none")

    @property
    def lsb(self):
        """One LSB at :attr:`bits`, full scale 1.0: 2^−(bits−1)."""
        return 2.0 ** -(self.bits - 1)

    def silence_frames(self, sample_rate):
        """The shortest silent run in frames at ``sample_rate`` (at least 1); 0 when
        silence is dithered."""
        if self.silence != "keep":
            return 0
        return silence_min_frames(self.silence_min_ms, sample_rate)

    def replace(self, **changes):
        """A copy with some fields changed (validated again)."""
        return dataclasses.replace(self, **changes)

    def with_seed(self, seed):
        """A copy with ``seed``."""
        return dataclasses.replace(self, seed=seed)

    def to_dict(self):
        """The recipe as plain JSON data (flat keys, see :data:`RECIPE_KEYS`)."""
        s = self.shaping
        return {
            "bits": self.bits,
            "quantizer": self.quantizer,
            "dither": self.dither,
            "shaping": s.kind,
            "shaping_order": s.order,
            "shaping_limit_db": s.limit_db,
            "shaping_coeffs": list(s.coeffs),
            "shaping_source": s.source,
            "shaping_rate": s.rate,
            "seed": self.seed,
            "force_dither": self.force_dither,
            "silence": self.silence,
            "silence_min_ms": self.silence_min_ms,
            "channels": self.channels,
            "downmix": self.downmix,
            "rate": self.rate,
            "gain_db": self.gain_db,
            "peak_ceiling_dbtp": self.peak_ceiling_dbtp,
        }

    @classmethod
    def from_dict(cls, data, *, base=None, base_dir=None):
        """A recipe from its dictionary form, or from part of one.

        Parameters
        ----------
        data : mapping
            Keys of :data:`RECIPE_KEYS`; missing keys come from ``base``.
            ``shaping`` may be a kind, a ``.json`` path, a comma list or a
            list of numbers (as in a profile); ``shaping_coeffs`` with
            ``shaping = 'custom'`` gives the coefficients directly.
        base : Recipe, optional
            Where missing keys come from (default: the library defaults).
        base_dir : str, optional
            Folder for a relative ``.json`` shaping file.

        Raises
        ------
        RecipeError
            For an unknown key or a value that is not allowed.
        """
        base = base or cls()
        unknown = [k for k in data if k not in RECIPE_KEYS]
        if unknown:
            hint = difflib.get_close_matches(unknown[0], list(RECIPE_KEYS), n=1)
            did = f" (did you mean {hint[0]!r}?)" if hint else ""
            raise RecipeError(unknown[0], data[unknown[0]],
                              f"is not a recipe setting{did}; known settings are "
                              f"{', '.join(RECIPE_KEYS)}")
        fields = {k: data[k] for k in ("bits", "quantizer", "dither", "seed", "force_dither",
                                        "silence", "silence_min_ms", *_PREPARE_KEYS)
                  if k in data}
        if any(k in data for k in _FLAT_SHAPING):
            fields["shaping"] = _shaping_from_flat(data, base.shaping, base_dir)
        return dataclasses.replace(base, **fields)

    @classmethod
    def from_settings(cls, settings):
        """The recipe of a report's or a batch summary's ``settings`` block (the keys they
        add beside the recipe's, such as ``dither_applied``, are left out)."""
        return cls.from_dict({k: v for k, v in settings.items() if k in RECIPE_KEYS})

    def identity(self):
        """What decides the output bits, for hashing: :meth:`to_dict` without the
        file name a custom filter came from (its coefficients are there)."""
        d = self.to_dict()
        d.pop("shaping_source")
        if self.silence != "keep":
            d.pop("silence_min_ms")  # it decides nothing then
        # the stages before the quantizer count only when they do something, so a library
        # converted before they existed keeps its settings id
        if not self.changes_input:
            for key in _PREPARE_KEYS:
                d.pop(key)
        elif self.channels != 1:
            d.pop("downmix")
        return d

    @property
    def changes_input(self):
        """Whether anything happens to the input before the quantizer (channels, rate,
        gain, ceiling). Whether a change is needed for a given file (its channels or
        rate may already be the target's) is decided by :mod:`requant.dsp.prepare`."""
        return (self.channels is not None or self.rate is not None or self.gain_db != 0.0
                or self.peak_ceiling_dbtp is not None)

    def describe(self):
        """One line for people: ``16-bit, round, dither tpdf, shaping none, seed 7``."""
        seed = "fresh seed" if self.seed is None else f"seed {self.seed}"
        forced = ", dither forced" if self.force_dither else ""
        silence = (f"silence kept (>= {self.silence_min_ms:g} ms)" if self.silence == "keep"
                   else "silence dithered")
        before = ""
        if self.channels is not None:
            before += (f", mono ({self.downmix} downmix)" if self.channels == 1
                       else ", stereo")
        if self.rate is not None:
            before += f", {self.rate} Hz"
        if self.gain_db:
            before += f", gain {self.gain_db:+g} dB"
        if self.peak_ceiling_dbtp is not None:
            before += f", true peak at most {self.peak_ceiling_dbtp:g} dBTP"
        return (f"{self.bits}-bit, {self.quantizer}, dither {self.dither}, shaping "
                f"{self.shaping.describe()}, {seed}{forced}, {silence}{before}")


def _shaping_from_flat(data, current, base_dir):
    """The Shaping a flat dict describes (keys left out keep ``current``'s values)."""
    kind = data.get("shaping", current.kind if "shaping" not in data else None)
    order = data.get("shaping_order")
    limit = data.get("shaping_limit_db")
    if order is not None:  # out of range is wrong whatever the shaping (it is ignored otherwise)
        order = check_shaping_order(order)
    if limit is not None:
        limit = check_shaping_limit(limit)
    if kind == "custom" or ("shaping_coeffs" in data and data.get("shaping_coeffs")
                            and "shaping" not in data):
        return Shaping("custom", coeffs=data.get("shaping_coeffs", current.coeffs),
                       source=data.get("shaping_source"), rate=data.get("shaping_rate"))
    if kind == current.kind and "shaping" not in data:
        if kind == "hearing":
            return Shaping("hearing", order=current.order if order is None else order,
                           limit_db=current.limit_db if limit is None else limit)
        return current
    return Shaping.parse(kind, order=order, limit_db=limit, base_dir=base_dir)
