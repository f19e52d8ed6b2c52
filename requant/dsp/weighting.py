"""Frequency weightings and hearing-threshold curves for noise measurement.

Every curve here is an analytic formula from an open standard or a
published paper, evaluated elementwise on frequencies in hertz:

* :func:`a_weighting_db` -- A-weighting, IEC 61672-1:2013 Annex E.
* :func:`itu468_db` -- ITU-R BS.468-4 noise weighting (analytic fit to
  Table 1 of the Recommendation).
* :func:`terhardt_threshold_db` -- the threshold in quiet of Terhardt (1979),
  in dB SPL.

On top of the curves sit power weights ``W²(f)`` (:func:`weighting_power`)
and the band means used by the noise-shaping designer and by reports
(:func:`weighted_noise_gain_db`, :func:`white_noise_weighting_offset_db`).

Normalisation
-------------
All power weights are 1 (0 dB) at 1 kHz, so the figures of the different
weightings are comparable:

* ``"flat"``: ``W² = 1``.
* ``"a"``: ``W² = 10^(A(f)/10)``; A(1 kHz) is 0 dB by construction
  of the standard's normalisation constant.
* ``"itu468"``: ``W² = 10^(R(f)/10)`` with the curve normalised to exactly
  0 dB at 1 kHz, as in BS.468-4 Table 1.
* ``"threshold"``: ``W² = 10^(-(T(f) - T(1 kHz))/10)``, the inverse of the
  hearing threshold: noise counts in proportion to how audible it is. Where
  Terhardt's formula exceeds :data:`THRESHOLD_CEILING_DB_SPL` (below about
  16 Hz and above :data:`UPPER_LIMIT_OF_HEARING_HZ`, about 17.8 kHz) the
  threshold is held at that ceiling. The formula's ``f⁴`` term would
  otherwise send the threshold to thousands of dB at high sample rates,
  which describes no listener and makes geometric means meaningless.

Band means
----------
Noise figures are means over the band 0..fs/2, where dither noise is spread
uniformly. On a uniform grid that includes both end points the mean is the
trapezoidal one (end points weighted 1/2), which is the exact mean of any
trigonometric polynomial of low enough degree, such as ``|NTF|²`` of a short
FIR noise-transfer function.
"""

from __future__ import annotations

import numpy as np

from requant.errors import UsageError

__all__ = [
    "WEIGHTINGS",
    "THRESHOLD_CEILING_DB_SPL",
    "UPPER_LIMIT_OF_HEARING_HZ",
    "DEFAULT_GRID_POINTS",
    "a_weighting_db",
    "itu468_db",
    "terhardt_threshold_db",
    "weighting_db",
    "weighting_power",
    "frequency_grid",
    "band_mean",
    "weighted_noise_gain_db",
    "white_noise_weighting_offset_db",
]

#: Names accepted wherever a weighting is chosen.
WEIGHTINGS = ("flat", "a", "itu468", "threshold")

#: Ceiling (dB SPL) at which the Terhardt threshold is held for weighting.
#: No dither noise is ever reproduced near this level, so frequencies whose
#: threshold lies above it are inaudible for our purpose.
THRESHOLD_CEILING_DB_SPL = 100.0

#: Default number of grid intervals over 0..fs/2 for band means.
DEFAULT_GRID_POINTS = 16384

# IEC 61672-1:2013 Annex E, equations (E.1)-(E.6) and Table E.1 [V]:
# pole frequencies f1..f4 in Hz and the normalisation A_1000 = -2.000 dB.
_A_F1 = 20.598997
_A_F2 = 107.65265
_A_F3 = 737.86223
_A_F4 = 12194.217
_A_1000_DB = -2.000

# Analytic fit to ITU-R BS.468-4 Table 1, as widely published (for example
# in the encyclopedia article "ITU-R 468 noise weighting"). The fit's own
# offset (+18.2 dB) is rounded; we normalise to exactly 0 dB at 1 kHz.
_R468_H1 = (1.0, -1.363894795463638e-7, 2.043828333606125e-15, -4.737338981378384e-24)
_R468_H2 = (5.559488023498642e-4, -2.118150887518656e-11, 1.306612257412824e-19)
_R468_GAIN = 1.246332637532143e-4


def _frequencies(f, name="f"):
    """Validate frequencies (Hz): finite and non-negative, as float64."""
    arr = np.asarray(f, dtype=np.float64)
    if not np.all(np.isfinite(arr)) or np.any(arr < 0):
        bad = arr[~(np.isfinite(arr) & (arr >= 0))].ravel()[0]
        raise UsageError(
            f"{name} must hold finite frequencies >= 0 Hz, got {float(bad)!r}; "
            "pass frequencies in hertz"
        )
    return arr


def _scalar_or_array(x):
    """Return a Python-friendly 0-d result as a numpy scalar."""
    return x[()] if isinstance(x, np.ndarray) and x.ndim == 0 else x


def a_weighting_db(f):
    """A-weighting magnitude (IEC 61672-1:2013 Annex E).

    Parameters
    ----------
    f : array_like of float, Hz, >= 0
        Frequencies.

    Returns
    -------
    ndarray or float, dB
        ``A(f)``; 0 dB at 1 kHz, ``-inf`` at 0 Hz (no warning is raised).

    Raises
    ------
    UsageError
        If a frequency is negative or not finite.

    Notes
    -----
    IEC 61672-1:2013, Annex E, equation (E.6)::

        A(f) = 20 lg[ f4² f⁴ / ((f² + f1²) (f² + f2²)^½ (f² + f3²)^½ (f² + f4²)) ] - A1000

    with f1 = 20.598997 Hz, f2 = 107.65265 Hz, f3 = 737.86223 Hz,
    f4 = 12194.217 Hz and A1000 = -2.000 dB. The standard's Table 3 holds at
    the exact base-10 frequencies 1000·10^(n/10) Hz, not at the nominal
    labels (31.5, 63, ...).

    Examples
    --------
    >>> round(float(a_weighting_db(100.0)), 2)
    -19.14
    """
    f = _frequencies(f)
    f2 = f * f
    num = _A_F4**2 * f2 * f2
    den = (f2 + _A_F1**2) * np.sqrt((f2 + _A_F2**2) * (f2 + _A_F3**2)) * (f2 + _A_F4**2)
    with np.errstate(divide="ignore"):
        out = 20.0 * np.log10(num / den) - _A_1000_DB
    return _scalar_or_array(out)


def _r468_linear(f):
    f2 = f * f
    h1 = _R468_H1[0] + f2 * (_R468_H1[1] + f2 * (_R468_H1[2] + f2 * _R468_H1[3]))
    h2 = f * (_R468_H2[0] + f2 * (_R468_H2[1] + f2 * _R468_H2[2]))
    return _R468_GAIN * f / np.hypot(h1, h2)


_R468_AT_1K = float(_r468_linear(np.float64(1000.0)))


def itu468_db(f):
    """ITU-R BS.468-4 noise weighting curve, 0 dB at 1 kHz.

    Parameters
    ----------
    f : array_like of float, Hz, >= 0
        Frequencies.

    Returns
    -------
    ndarray or float, dB
        The weighting; +12.2 dB near 6.3 kHz, ``-inf`` at 0 Hz.

    Raises
    ------
    UsageError
        If a frequency is negative or not finite.

    Notes
    -----
    This is the widely used analytic fit to Table 1 of ITU-R BS.468-4
    (1986); it matches the table within 0.1 dB from 31.5 Hz to 31.5 kHz.
    The fit is normalised here to exactly 0 dB at 1 kHz.

    The Recommendation pairs the curve with a quasi-peak detector. requant
    uses it with power (RMS) averaging, so its figures are "RMS
    468-weighted", not readings of the standard's quasi-peak meter.

    Examples
    --------
    >>> round(float(itu468_db(6300.0)), 1)
    12.2
    """
    f = _frequencies(f)
    with np.errstate(divide="ignore"):
        out = 20.0 * np.log10(_r468_linear(f) / _R468_AT_1K)
    return _scalar_or_array(out)


def terhardt_threshold_db(f):
    """Threshold of hearing in quiet after Terhardt (1979).

    Parameters
    ----------
    f : array_like of float, Hz, >= 0
        Frequencies.

    Returns
    -------
    ndarray or float, dB SPL
        The threshold; 3.37 dB SPL at 1 kHz, minimum -4.98 dB SPL near
        3.3 kHz, ``+inf`` at 0 Hz (no warning is raised).

    Raises
    ------
    UsageError
        If a frequency is negative or not finite.

    Notes
    -----
    With ``k = f / 1 kHz``::

        T(f) = 3.64 k^-0.8 - 6.5 exp(-0.6 (k - 3.3)²) + 10^-3 k⁴

    E. Terhardt, "Calculating virtual pitch", Hearing Research 1:155-182,
    1979 (journal details from memory). The formula is unclamped here;
    :func:`weighting_power` holds it at :data:`THRESHOLD_CEILING_DB_SPL`.

    Examples
    --------
    >>> round(float(terhardt_threshold_db(1000.0)), 2)
    3.37
    """
    k = _frequencies(f) / 1000.0
    with np.errstate(divide="ignore"):
        out = 3.64 * k**-0.8 - 6.5 * np.exp(-0.6 * (k - 3.3) ** 2) + 1e-3 * k**4
    return _scalar_or_array(out)


def _upper_limit_of_hearing_hz():
    """Frequency above the threshold minimum where T(f) reaches the ceiling."""
    lo, hi = 3300.0, 100000.0
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if terhardt_threshold_db(mid) < THRESHOLD_CEILING_DB_SPL:
            lo = mid
        else:
            hi = mid
        if hi - lo < 1e-6:
            break
    return 0.5 * (lo + hi)


#: Frequency (Hz) above which Terhardt's threshold exceeds
#: :data:`THRESHOLD_CEILING_DB_SPL` (about 17.77 kHz): the top of hearing
#: for weighting and noise-shaping design.
UPPER_LIMIT_OF_HEARING_HZ = _upper_limit_of_hearing_hz()

_T_1K = float(terhardt_threshold_db(1000.0))


def _check_name(name):
    if not isinstance(name, str):
        raise TypeError(
            f"weighting must be a str, got {type(name).__name__} {name!r}; "
            f"use one of {', '.join(WEIGHTINGS)}"
        )
    if name not in WEIGHTINGS:
        raise UsageError(
            f"unknown weighting {name!r}; use one of {', '.join(WEIGHTINGS)}"
        )
    return name


def weighting_db(name, f):
    """Power weighting ``10·log10 W²(f)`` in dB, 0 dB at 1 kHz.

    Parameters
    ----------
    name : {"flat", "a", "itu468", "threshold"}
        The weighting; see the module notes for each normalisation.
    f : array_like of float, Hz, >= 0
        Frequencies.

    Returns
    -------
    ndarray or float, dB
        The weight in dB. Unlike ``10·log10(weighting_power(...))`` this
        never underflows.

    Raises
    ------
    UsageError
        If the name is unknown or a frequency is invalid.
    """
    name = _check_name(name)
    f = _frequencies(f)
    if name == "flat":
        out = np.zeros_like(f)
    elif name == "a":
        out = np.asarray(a_weighting_db(f), dtype=np.float64)
    elif name == "itu468":
        out = np.asarray(itu468_db(f), dtype=np.float64)
    else:
        t = np.minimum(terhardt_threshold_db(f), THRESHOLD_CEILING_DB_SPL)
        out = -(t - _T_1K)
    return _scalar_or_array(out)


def weighting_power(name, f):
    """Linear power weight ``W²(f)``, 1 at 1 kHz.

    Parameters
    ----------
    name : {"flat", "a", "itu468", "threshold"}
        The weighting. ``"threshold"`` is the inverse of Terhardt's hearing
        threshold (held at :data:`THRESHOLD_CEILING_DB_SPL`): noise counts
        in proportion to how audible it is.
    f : array_like of float, Hz, >= 0
        Frequencies.

    Returns
    -------
    ndarray or float
        ``W²(f) = 10^(weighting_db(name, f)/10)``; 0 at 0 Hz for ``"a"`` and
        ``"itu468"``.

    Raises
    ------
    UsageError
        If the name is unknown or a frequency is invalid.

    Examples
    --------
    >>> float(weighting_power("threshold", 1000.0))
    1.0
    """
    return _scalar_or_array(10.0 ** (np.asarray(weighting_db(name, f)) / 10.0))


def frequency_grid(sample_rate, *, points=DEFAULT_GRID_POINTS):
    """Uniform frequency grid over 0..fs/2, both ends included.

    Parameters
    ----------
    sample_rate : float, Hz, > 0
        Sample rate fs.
    points : int, >= 1, default 16384
        Number of intervals; the grid has ``points + 1`` frequencies. With
        ``points = N`` the grid is that of ``numpy.fft.rfft(x, 2*N)``.

    Returns
    -------
    ndarray of float, Hz
        ``k·fs/(2·points)`` for ``k = 0..points``.
    """
    sample_rate = _positive_rate(sample_rate)
    if isinstance(points, bool) or not isinstance(points, (int, np.integer)) or points < 1:
        raise UsageError(f"points={points!r} must be an integer >= 1")
    return np.arange(points + 1) * (sample_rate / (2.0 * points))


def _positive_rate(sample_rate):
    if isinstance(sample_rate, bool) or not isinstance(
        sample_rate, (int, float, np.integer, np.floating)
    ):
        raise TypeError(
            f"sample_rate must be a number in Hz, got {type(sample_rate).__name__} "
            f"{sample_rate!r}"
        )
    if not np.isfinite(sample_rate) or sample_rate <= 0:
        raise UsageError(f"sample_rate={sample_rate!r} must be a finite rate in Hz above 0")
    return float(sample_rate)


def band_mean(values, freqs):
    """Mean of ``values`` over the band spanned by ``freqs`` (trapezoid rule).

    Parameters
    ----------
    values : array_like of float
        Samples of a function of frequency.
    freqs : array_like of float, Hz
        Increasing frequencies, same length as ``values`` (at least 2).

    Returns
    -------
    float
        ``∫ values df / (freqs[-1] - freqs[0])``. On a uniform grid over
        0..fs/2 this is the periodic mean (end points weighted 1/2).
    """
    values = np.asarray(values, dtype=np.float64)
    freqs = np.asarray(freqs, dtype=np.float64)
    _check_grid(values, freqs, "values")
    return float(np.trapezoid(values, freqs) / (freqs[-1] - freqs[0]))


def _check_grid(values, freqs, what):
    if values.ndim != 1 or freqs.ndim != 1 or values.shape != freqs.shape:
        raise UsageError(
            f"{what} and freqs must be 1-D arrays of the same length, got shapes "
            f"{values.shape!r} and {freqs.shape!r}"
        )
    if freqs.size < 2 or not np.all(np.diff(freqs) > 0):
        raise UsageError(
            "freqs must hold at least 2 strictly increasing frequencies; "
            "use frequency_grid(sample_rate)"
        )


def weighted_noise_gain_db(ntf_power, freqs, weighting):
    """Weighted power of shaped noise relative to unshaped white noise.

    Parameters
    ----------
    ntf_power : array_like of float
        ``|NTF(f)|²`` sampled on ``freqs``.
    freqs : array_like of float, Hz
        Increasing frequencies, normally :func:`frequency_grid` over 0..fs/2.
    weighting : {"flat", "a", "itu468", "threshold"}
        The weighting ``W²``.

    Returns
    -------
    float, dB
        ``10·log10( mean_f(W²·|NTF|²) / mean_f(W²) )``. White dither noise of
        the same unshaped power gives 0 dB; negative is quieter. With
        ``"flat"`` this is the total noise power gain ``10·log10 Σ n_k²``.

    Raises
    ------
    UsageError
        If the arrays do not match, the grid is not increasing, or the
        weighting is unknown.
    """
    p = np.asarray(ntf_power, dtype=np.float64)
    f = np.asarray(freqs, dtype=np.float64)
    _check_grid(p, f, "ntf_power")
    w = np.asarray(weighting_power(weighting, f), dtype=np.float64)
    return float(10.0 * np.log10(np.trapezoid(w * p, f) / np.trapezoid(w, f)))


def white_noise_weighting_offset_db(weighting, sample_rate, *, points=DEFAULT_GRID_POINTS):
    """Weighted power of white noise relative to its unweighted power.

    Parameters
    ----------
    weighting : {"flat", "a", "itu468", "threshold"}
        The weighting (1 at 1 kHz).
    sample_rate : float, Hz, > 0
        Sample rate; the noise is spread uniformly over 0..fs/2.
    points : int, default 16384
        Grid intervals for the trapezoidal mean.

    Returns
    -------
    float, dB
        ``10·log10 mean_f W²(f)`` over 0..fs/2: add it to an unweighted
        white-noise level to get the weighted level.
    """
    f = frequency_grid(sample_rate, points=points)
    w = np.asarray(weighting_power(weighting, f), dtype=np.float64)
    return float(10.0 * np.log10(band_mean(w, f)))
