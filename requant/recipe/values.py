"""The recipe's names, limits and checks: each allowed value, one sentence for each wrong one."""

from __future__ import annotations

import difflib
import math
import numbers

from requant.errors import UsageError

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
    return _check_number("shaping_limit_db", limit_db, 0.0, MAX_LIMIT_DB, above_lo=True)


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


def _check_number(field, value, lo, hi, *, above_lo=False, optional=False):
    """A finite number in [lo, hi] (or (lo, hi] with ``above_lo``) as a float; None when
    ``optional`` and not given; :class:`RecipeError` naming ``field`` otherwise."""
    if value is None and optional:
        return None
    if not _is_number(value):
        raise _typed(field, value)
    v = float(value) if math.isfinite(value) else math.nan
    if not ((lo < v if above_lo else lo <= v) and v <= hi):
        raise RecipeError(field, value, f"is out of range; it must be {RECIPE_KEYS[field]}")
    return v


def _check_silence_min(ms):
    return _check_number("silence_min_ms", ms, 0.0, MAX_SILENCE_MIN_MS, above_lo=True)


def _check_gain(gain_db):
    return _check_number("gain_db", gain_db, -MAX_GAIN_DB, MAX_GAIN_DB)


def _check_ceiling(ceiling):
    return _check_number("peak_ceiling_dbtp", ceiling, MIN_CEILING_DBTP, MAX_CEILING_DBTP,
                         optional=True)


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
