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
    silence = "keep"
    silence_min_ms = 20.0
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
import os
import tomllib

from requant.errors import InputError, UsageError
from requant.library.settings import BATCH_KEYS, OUTPUT_CHOICES, BatchSettings
from requant.recipe import RECIPE_KEYS, Recipe, RecipeError, describe_value

__all__ = ["PROFILE_KEYS", "OUTPUT_CHOICES", "ProfileError", "load_profile", "parse_profile"]

#: The recipe's keys a profile may set (the rest of the recipe's dictionary form is
#: written by requant, not typed by people).
_RECIPE_PART = ("bits", "quantizer", "dither", "shaping", "shaping_order", "shaping_limit_db",
                "force_dither", "seed", "silence", "silence_min_ms", "channels", "downmix", "rate",
                "gain_db", "peak_ceiling_dbtp")
#: The batch's keys a profile may set; ``block_frames`` belongs to the machine.
_BATCH_PART = ("format", "analyze", "include", "exclude")

#: Profile keys and what each holds (used in messages).
PROFILE_KEYS = {
    "description": "free text for people; requant ignores it",
    **{k: RECIPE_KEYS[k] for k in _RECIPE_PART},
    **{k: BATCH_KEYS[k] for k in _BATCH_PART},
}


class ProfileError(UsageError):
    """A profile file that cannot be used; the message names the key and the fix."""


def _check_keys(where, data):
    for key, _value in data.items():
        if key not in PROFILE_KEYS:
            hint = difflib.get_close_matches(key, list(PROFILE_KEYS), n=1)
            did = f" (did you mean {hint[0]!r}?)" if hint else ""
            raise ProfileError(f"{where}: unknown key {key!r}{did}; allowed keys are "
                               f"{', '.join(PROFILE_KEYS)}")
    if "description" in data and not isinstance(data["description"], str):
        raise ProfileError(f"{where}: description must be a string, not "
                           f"{describe_value(data['description'])}")


def _shaping_value(where, value, base_dir):
    """A profile's ``shaping`` as the string the recipe parses (arrays become a comma list;
    a relative .json path is found beside the profile)."""
    if isinstance(value, list):
        if not value:
            raise ProfileError(f"{where}: shaping as an array must hold 1 to 64 finite numbers "
                               "(the feedback coefficients h1, h2, ...)")
        if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
            return ",".join(repr(float(v)) for v in value)
        return value  # the recipe names the bad item
    if isinstance(value, str) and value.strip().lower().endswith(".json"):
        text = value.strip()
        if base_dir is not None and not os.path.isabs(text):
            text = os.path.normpath(os.path.join(base_dir, text))
        return text
    return value


def _patterns(where, key, value):
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list):
        raise ProfileError(f"{where}: {key} must be {PROFILE_KEYS[key]}, not "
                           f"{describe_value(value)}")
    for i, v in enumerate(value):
        if not isinstance(v, str) or not v:
            raise ProfileError(f"{where}: {key} must be {PROFILE_KEYS[key]}; item {i + 1} is "
                               f"{describe_value(v)}, not a pattern")
    return list(value)


def _validated(where, out, base_dir):
    """Build the recipe and batch settings the profile describes, so that every value is
    checked where requant checks it everywhere else; say what is wrong in the profile's words."""
    try:
        recipe = Recipe.from_dict({k: v for k, v in out.items() if k in _RECIPE_PART},
                                  base_dir=base_dir)
        BatchSettings(recipe=recipe, **{k: v for k, v in out.items() if k in _BATCH_PART})
    except RecipeError as exc:
        if exc.field == "format" and not exc.typed:
            raise ProfileError(exc.sentence(spaced=True, where=where)) from None
        if exc.typed:
            raise ProfileError(f"{where}: {exc.field} must be {PROFILE_KEYS.get(exc.field, '')}"
                               f", not {describe_value(exc.value)}") from None
        raise ProfileError(exc.sentence(spaced=True, where=where)) from None
    except (UsageError, InputError) as exc:
        text = str(exc).replace("--format wav or aiff", 'format = "wav"')
        raise ProfileError(f"{where}: {text}") from None


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
        ``description`` is dropped), ready for
        :func:`requant.library.settings.resolve_settings`.

    Raises
    ------
    ProfileError
        For a syntax error, an unknown key, a wrong type or a value out of
        range, with one sentence naming the key and the fix.

    Examples
    --------
    >>> parse_profile('bits = 12\\ndither = "rpdf"')
    {'bits': 12, 'dither': 'rpdf'}
    """
    where = source
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(f"{where} is not valid TOML ({exc}); fix the syntax (strings need "
                           "quotes, e.g. dither = \"tpdf\")") from None
    _check_keys(where, data)
    out = {}
    for key, value in data.items():
        if key == "description":
            continue
        if key == "shaping":
            value = _shaping_value(where, value, base_dir)
        elif key in ("include", "exclude"):
            value = _patterns(where, key, value)
        elif key == "shaping_limit_db" and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        out[key] = value
    _validated(where, out, base_dir)
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
