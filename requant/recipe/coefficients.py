"""Noise-shaping coefficients a user gives: a comma list or a JSON file, checked."""

from __future__ import annotations

import json
import math
from pathlib import Path

from requant.errors import InputError, UsageError
from requant.recipe.values import (
    MAX_COEFFICIENT,
    MAX_TAPS,
    _is_number,
)

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
