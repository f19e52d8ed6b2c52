"""Delivery profiles: a team's saved batch settings, in TOML.

A profile is a flat TOML file whose keys are the batch settings, with the
command-line option names written with underscores::

    description = "Game SFX: 16-bit FLAC"
    bits = 16
    quantizer = "round"
    dither = "tpdf"
    shaping = "hearing"
    shaping_order = 9
    shaping_limit_db = 13.0
    force_dither = false
    analyze = false
    format = "flac"
    include = ["*.wav"]
    exclude = ["scratch/*"]
    seed = 20240501

Every key is optional. Options given on the command line override the
profile, and the profile overrides the library defaults. ``shaping`` may also
be an array of feedback coefficients; a relative ``.json`` shaping file is
found beside the profile. ``jobs`` is not a profile key: the number of worker
processes belongs to the machine, not to the delivery.

The file is read with :mod:`tomllib` (TOML 1.0). Every problem (a syntax
error, an unknown key, a wrong type, a value out of range) raises
:class:`ProfileError` with one sentence that names the file, the key and the
fix.
"""

import difflib
import math
import os
import tomllib

from requant.errors import UsageError

__all__ = ["PROFILE_KEYS", "OUTPUT_CHOICES", "ProfileError", "load_profile", "parse_profile"]

#: Allowed values of ``format`` (``same`` keeps WAV, FLAC and AIFF sources in their format).
OUTPUT_CHOICES = ("same", "wav", "flac", "aiff")

#: Profile keys and what each holds (used in messages).
PROFILE_KEYS = {
    "description": "free text for people; requant ignores it",
    "bits": "an integer word length from 1 to 32",
    "quantizer": "one of: round, truncate",
    "dither": "one of: none, rpdf, tpdf, tpdf-hp",
    "shaping": "none, first-order, hearing, a .json file, or an array of coefficients",
    "shaping_order": "an integer from 1 to 64 (order of the 'hearing' design)",
    "shaping_limit_db": "a number of dB in (0, 30] (limit on the total noise gain of the "
                        "'hearing' design)",
    "force_dither": "true or false",
    "analyze": "true or false (measure weighted noise, signal-correlated error, true peak)",
    "format": "one of: " + ", ".join(OUTPUT_CHOICES),
    "include": "an array of glob patterns, such as [\"*.wav\"]",
    "exclude": "an array of glob patterns, such as [\"scratch/*\"]",
    "seed": "an integer from 0 to 2**63 - 1 (the run seed)",
}

SEED_MAX = 2**63 - 1


class ProfileError(UsageError):
    """A profile file that cannot be used; the message names the key and the fix."""


def _kind(value):
    if isinstance(value, bool):
        return f"the boolean {str(value).lower()}"
    if isinstance(value, int):
        return f"the integer {value}"
    if isinstance(value, float):
        return f"the number {value!r}"
    if isinstance(value, str):
        return f"the string {value!r}"
    if isinstance(value, list):
        return "an array"
    if isinstance(value, dict):
        return "a table"
    return f"a {type(value).__name__}"


def _int_in(where, key, value, lo, hi):
    if isinstance(value, bool) or not isinstance(value, int):
        raise ProfileError(f"{where}: {key} must be {PROFILE_KEYS[key]}, not {_kind(value)}")
    if not lo <= value <= hi:
        raise ProfileError(f"{where}: {key} = {value} is out of range; it must be "
                           f"{PROFILE_KEYS[key]}")
    return value


def _choice(where, key, value, choices):
    if not isinstance(value, str):
        raise ProfileError(f"{where}: {key} must be {PROFILE_KEYS[key]}, not {_kind(value)}")
    if value not in choices:
        hint = difflib.get_close_matches(value, choices, n=1)
        did = f" (did you mean {hint[0]!r}?)" if hint else ""
        raise ProfileError(f"{where}: {key} = {value!r} is not known{did}; choose one of "
                           f"{', '.join(choices)}")
    return value


def _patterns(where, key, value):
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list):
        raise ProfileError(f"{where}: {key} must be {PROFILE_KEYS[key]}, not {_kind(value)}")
    for i, v in enumerate(value):
        if not isinstance(v, str) or not v:
            raise ProfileError(f"{where}: {key} must be {PROFILE_KEYS[key]}; item {i + 1} is "
                               f"{_kind(v)}, not a pattern")
    return list(value)


def _shaping(where, value, base_dir):
    if isinstance(value, list):
        if not value or not all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                and math.isfinite(v) for v in value):
            raise ProfileError(f"{where}: shaping as an array must hold 1 to 64 finite numbers "
                               "(the feedback coefficients h1, h2, ...)")
        return ",".join(repr(float(v)) for v in value)
    if not isinstance(value, str) or not value.strip():
        raise ProfileError(f"{where}: shaping must be {PROFILE_KEYS['shaping']}, not "
                           f"{_kind(value)}")
    from requant.dsp.shaping import SHAPING_NAMES, parse_coefficients

    text = value.strip()
    if text.lower().endswith(".json"):
        if base_dir is not None and not os.path.isabs(text):
            text = os.path.normpath(os.path.join(base_dir, text))
        return text
    if text in SHAPING_NAMES:
        return text
    if any(c.isdigit() for c in text):
        try:
            parse_coefficients(text)
        except UsageError as exc:
            raise ProfileError(f"{where}: shaping = {text!r} is not a valid coefficient list "
                               f"({exc}); write an array such as [1.2, -0.4]") from None
        return text
    hint = difflib.get_close_matches(text, SHAPING_NAMES, n=1)
    did = f" (did you mean {hint[0]!r}?)" if hint else ""
    raise ProfileError(f"{where}: shaping = {text!r} is not known{did}; use one of "
                       f"{', '.join(SHAPING_NAMES)}, a .json file or an array of coefficients")


def parse_profile(text, *, source="profile", base_dir=None):
    """Validate profile text and return the settings it gives.

    Parameters
    ----------
    text : str
        TOML text.
    source : str, default 'profile'
        Name used in messages (the file name).
    base_dir : str, optional
        Folder against which a relative ``.json`` shaping file is resolved.

    Returns
    -------
    dict
        Only the keys present, with validated values (``shaping`` arrays
        become a comma list; ``include``/``exclude`` become lists;
        ``description`` is dropped).

    Raises
    ------
    ProfileError
        For a syntax error, an unknown key, a wrong type or a value out of
        range, with one sentence naming the key and the fix.

    Examples
    --------
    >>> parse_profile('bits = 12\\ndither = "tpdf-hp"')
    {'bits': 12, 'dither': 'tpdf-hp'}
    """
    from requant.dsp.quantizer import DITHERS, QUANTIZERS

    where = source
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(f"{where} is not valid TOML ({exc}); fix the syntax (strings need "
                           "quotes, e.g. dither = \"tpdf\")") from None
    out = {}
    for key, value in data.items():
        if key not in PROFILE_KEYS:
            hint = difflib.get_close_matches(key, list(PROFILE_KEYS), n=1)
            did = f" (did you mean {hint[0]!r}?)" if hint else ""
            raise ProfileError(f"{where}: unknown key {key!r}{did}; allowed keys are "
                               f"{', '.join(PROFILE_KEYS)}")
        if key == "description":
            if not isinstance(value, str):
                raise ProfileError(f"{where}: description must be a string, not {_kind(value)}")
        elif key == "bits":
            out[key] = _int_in(where, key, value, 1, 32)
        elif key == "quantizer":
            out[key] = _choice(where, key, value, QUANTIZERS)
        elif key == "dither":
            out[key] = _choice(where, key, value, DITHERS)
        elif key == "shaping":
            out[key] = _shaping(where, value, base_dir)
        elif key == "shaping_order":
            out[key] = _int_in(where, key, value, 1, 64)
        elif key == "shaping_limit_db":
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise ProfileError(f"{where}: shaping_limit_db must be {PROFILE_KEYS[key]}, not "
                                   f"{_kind(value)}")
            if not (math.isfinite(value) and 0 < value <= 30):
                raise ProfileError(f"{where}: shaping_limit_db = {value!r} is out of range; it "
                                   "must be more than 0 and at most 30 dB")
            out[key] = float(value)
        elif key in ("force_dither", "analyze"):
            if not isinstance(value, bool):
                raise ProfileError(f"{where}: {key} must be true or false, not {_kind(value)}")
            out[key] = value
        elif key == "format":
            out[key] = _choice(where, key, value, OUTPUT_CHOICES)
        elif key in ("include", "exclude"):
            out[key] = _patterns(where, key, value)
        elif key == "seed":
            out[key] = _int_in(where, key, value, 0, SEED_MAX)
    if out.get("format") == "flac" and out.get("bits", 16) > 24:
        raise ProfileError(f"{where}: FLAC holds at most 24 bits, not {out['bits']}; lower bits "
                           "or choose format = \"wav\"")
    return out


def load_profile(path):
    """Read and validate a profile file.

    Parameters
    ----------
    path : str or os.PathLike
        A ``.toml`` file.

    Returns
    -------
    dict
        As :func:`parse_profile`.

    Raises
    ------
    ProfileError
        If the file cannot be read or is not a valid profile.
    """
    p = os.fspath(path)
    try:
        with open(p, "rb") as fh:
            raw = fh.read()
    except FileNotFoundError:
        raise ProfileError(f"profile {p!r} does not exist; check the path") from None
    except IsADirectoryError:
        raise ProfileError(f"profile {p!r} is a folder; give a .toml file") from None
    except OSError as exc:
        raise ProfileError(f"profile {p!r} cannot be read ({exc.strerror or exc}); check its "
                           "permissions") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise ProfileError(f"profile {p!r} is not UTF-8 text; save it as UTF-8 TOML") from None
    return parse_profile(text, source=f"profile {p!r}",
                         base_dir=os.path.dirname(os.path.abspath(p)))
