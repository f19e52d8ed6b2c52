"""A batch's settings: library defaults < profile < options, and the settings id."""

import hashlib
import json
import os

from requant import __version__
from requant.errors import UsageError
from requant.library.manifest import sha256_file

__all__ = ["DEFAULT_SETTINGS", "OUTPUT_SETTINGS", "resolve_settings", "validate_settings", "settings_id", "derive_seed"]


#: Library defaults of the batch settings (the same as :func:`convert_file`'s).
DEFAULT_SETTINGS = {
    "bits": 16,
    "quantizer": "round",
    "dither": "tpdf",
    "shaping": "none",
    "shaping_order": None,
    "shaping_limit_db": None,
    "force_dither": False,
    "format": "same",
    "block_frames": 65536,
    "analyze": False,
}


#: Settings that change the output bits (hashed into ``settings_id``).
OUTPUT_SETTINGS = ("bits", "quantizer", "dither", "shaping", "shaping_order", "shaping_limit_db",
                   "force_dither", "format")


_LIST_SETTINGS = ("include", "exclude")


SEED_MAX = 2**63 - 1


def resolve_settings(options=None, profile=None):
    """Effective settings: library defaults < profile < options given.

    Parameters
    ----------
    options : dict, optional
        Explicit options (the command line); a value of None, or an empty
        include/exclude list, means "not given".
    profile : dict, optional
        From :func:`requant.library.profiles.load_profile`.

    Returns
    -------
    dict
        Every key of :data:`DEFAULT_SETTINGS`, plus ``include``,
        ``exclude`` (lists) and ``seed`` (int or None). A ``.json`` shaping
        file is made absolute.

    Raises
    ------
    UsageError
        For an unknown key or a value that is not allowed.

    Examples
    --------
    >>> s = resolve_settings({"bits": 12, "dither": None}, {"bits": 8, "dither": "rpdf"})
    >>> s["bits"], s["dither"], s["quantizer"]
    (12, 'rpdf', 'round')
    """
    s = dict(DEFAULT_SETTINGS, include=[], exclude=[], seed=None)
    for layer in (profile or {}, options or {}):
        for key, value in layer.items():
            if key not in s:
                raise UsageError(f"unknown batch setting {key!r}; known settings are "
                                 f"{', '.join(s)}")
            if value is None or (key in _LIST_SETTINGS and not value):
                continue
            s[key] = value
    return validate_settings(s)


def validate_settings(s):
    """Check a full settings dict (see :func:`resolve_settings`); return it, normalized."""
    from requant.convert import resolve_shaping_spec
    from requant.library.profiles import OUTPUT_CHOICES
    from requant.dsp.quantizer import check_settings

    s = dict(s)
    check_settings(s["bits"], s["quantizer"], s["dither"])
    if s["format"] not in OUTPUT_CHOICES:
        raise UsageError(f"format={s['format']!r} is not known: choose one of "
                         f"{', '.join(OUTPUT_CHOICES)}")
    if s["format"] == "flac" and s["bits"] > 24:
        raise UsageError(f"FLAC holds at most 24 bits, not {s['bits']}; choose --format wav or "
                         "aiff, or fewer bits")
    bf = s["block_frames"]
    if isinstance(bf, bool) or not isinstance(bf, int) or bf < 1:
        raise UsageError(f"block_frames={bf!r} must be a positive integer")
    seed = s["seed"]
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, int)
                             or not 0 <= seed <= SEED_MAX):
        raise UsageError(f"seed={seed!r} must be an integer from 0 to 2**63 - 1")
    for key in ("force_dither", "analyze"):
        if not isinstance(s[key], bool):
            raise UsageError(f"{key}={s[key]!r} must be true or false")
    shaping = str(s["shaping"]).strip()
    if shaping.lower().endswith(".json"):
        shaping = os.path.abspath(shaping)
        from requant.dsp.shaping import load_coefficients

        load_coefficients(shaping)  # readable, valid JSON; the rate is checked per file
    elif shaping == "hearing" and (s["shaping_order"] is not None
                                   or s["shaping_limit_db"] is not None):
        resolve_shaping_spec(shaping, 48000, order=s["shaping_order"],
                             limit_db=s["shaping_limit_db"])
    elif shaping not in ("none", "first-order", "hearing"):
        resolve_shaping_spec(shaping, 48000)
    s["shaping"] = shaping
    for key in _LIST_SETTINGS:
        pats = s[key]
        if isinstance(pats, str) or not all(isinstance(p, str) and p for p in pats):
            raise UsageError(f"{key}={pats!r} must be a list of glob patterns such as '*.wav'")
        s[key] = list(pats)
    return s


def _canonical(obj):
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=True)


def settings_id(settings, run_seed):
    """Hash of everything that decides the output bits.

    Parameters
    ----------
    settings : dict
        Effective settings (:func:`resolve_settings`).
    run_seed : int
        The run seed (each file's seed derives from it).

    Returns
    -------
    str
        Hex SHA-256 of the canonical JSON of the output settings, the run
        seed and the requant version. A ``.json`` shaping file enters by
        the SHA-256 of its content (editing the file changes the id);
        order and limit enter only for the ``hearing`` design.
    """
    d = {k: settings[k] for k in OUTPUT_SETTINGS}
    if d["shaping"] != "hearing":
        d["shaping_order"] = d["shaping_limit_db"] = None
    if str(d["shaping"]).lower().endswith(".json"):
        try:
            d["shaping"] = {"json_sha256": sha256_file(d["shaping"])}
        except OSError:
            d["shaping"] = {"json_path": d["shaping"]}
    d["run_seed"] = int(run_seed)
    d["requant_version"] = __version__
    return hashlib.sha256(_canonical(d).encode("ascii")).hexdigest()


def derive_seed(run_seed, relpath):
    """A file's seed: SHA-256 of (run seed, relative path), cut to 63 bits.

    Parameters
    ----------
    run_seed : int
    relpath : str
        The source's path relative to SRC, with ``/`` separators.

    Returns
    -------
    int, 0..2**63-1
        The same for the same inputs whatever the order, the number of
        workers or the machine.

    Examples
    --------
    >>> derive_seed(1, "a/b.wav") == derive_seed(1, "a/b.wav") != derive_seed(2, "a/b.wav")
    True
    """
    raw = str(int(run_seed)).encode("ascii") + b"\0" + os.fsencode(relpath)
    return int.from_bytes(hashlib.sha256(raw).digest()[:8], "big") >> 1


