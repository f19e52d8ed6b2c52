"""Tell from the error alone how a delivery was made.

The error ``e = delivered - gain·master`` (LSB of the delivery's word length)
was measured by :mod:`requant.audit.measure`. From it:

* **bias** -- its mean. Truncation toward minus infinity adds -1/2 LSB to the
  loop error (Bennett 1948; Widrow & Kollár 2008), which reaches the output
  through the NTF's DC gain Σn_k: the quantizer is ``truncate`` when the bias
  is nearer ``-Σn/2`` than 0 (undecidable when the NTF removes DC).
* **the error spectrum** -- the convert report's Welch PSD, in LSB² per unit
  of normalized bandwidth (white noise of variance σ² reads σ² everywhere).
  By the Kolmogorov–Szegő formula the one-step prediction error (innovation)
  variance of a stationary process is the geometric mean of its spectrum;
  by Gerzon & Craven (1989) a minimum-phase NTF with leading tap 1 has mean
  log |NTF|² = 0 over the band, so that geometric mean is the power of the
  white loop error *before* shaping: 1/12, 1/6 or 1/4 LSB² for no dither,
  RPDF and TPDF (Lipshitz, Wannamaker & Vanderkooy 1992). The spectrum divided
  by it is the estimated |NTF|² (:data:`OCTAVE_LABELS` bands in ``ntf_db``).
* **shaped** -- the smooth part of the spectrum (its running median, which
  tones do not move) has a noise gain (arithmetic over geometric mean) above
  :data:`SHAPED_GAIN_DB`. A line spectrum (the tonal share of the convert
  report's analysis above :data:`LINE_SPECTRUM_FRACTION`) is an error that
  follows the signal, never shaping. When shaped, an FIR NTF (leading tap 1)
  is fitted to the spectrum by linear prediction on its inverse
  (:func:`requant.dsp.shaping.design_from_weight`), and a whitening predictor
  on the spectrum itself; the whitened stretches of error stand for the loop
  error.
* **dither** -- unshaped, an error that never leaves ±1/2 LSB around the
  quantizer's centre is undithered whatever the signal (its range is that of
  the rounding error); otherwise the innovation variance names the dither when
  it lies within :data:`DITHER_TOLERANCE_DB` of 1/6 or 1/4, and the
  distribution must agree: RPDF total error stays within ±1 LSB and TPDF within
  ±1.5 LSB (their densities are the convolution of 2 and 3 uniforms, LWV 1992),
  and the excess kurtosis of a sum of ``k`` uniforms is ``-6/(5k)``
  (-1.2, -0.6, -0.4). High-passed TPDF (r[n] - r[n-1]) is recognized by its
  spectrum (1/12)(3 - 2 cos ω) (REFERENCES.md §9). Anything else is
  ``unknown``.
"""

import math

import numpy as np

from requant.dsp.analysis import noise_floor, tonal_fraction
from requant.dsp.quantizer import DITHER_POWER_LSB2
from requant.dsp.shaping import describe, design_from_weight, ntf_taps

__all__ = ["Identification", "identify", "error_spectrum", "innovation_variance",
           "octave_bands", "OCTAVE_LABELS", "SHAPED_GAIN_DB", "LINE_SPECTRUM_FRACTION",
           "DITHER_TOLERANCE_DB", "NTF_ORDER", "EXCESS_KURTOSIS"]

#: Nominal octave-band labels (IEC 61260-1); the bands' exact centres are 1000·2^k Hz.
OCTAVE_LABELS = (31.5, 63, 125, 250, 500, 1000, 2000, 4000, 8000, 16000)
#: Smallest noise gain of the smooth error spectrum that counts as shaping, dB.
#: White error reads within a few hundredths of a dB; the mildest shaper in use,
#: high-passed TPDF's own tilt aside, gains about 3 dB (first order).
SHAPED_GAIN_DB = 0.5
#: A tonal share above this is a line spectrum: the error follows the signal.
LINE_SPECTRUM_FRACTION = 0.3
#: How far the innovation variance may lie from a dither's power, dB. The three
#: powers lie 3.01 and 1.76 dB apart.
DITHER_TOLERANCE_DB = 0.5
#: How far the error may reach past the undithered range, LSB (gain and float slack).
SUPPORT_SLACK_LSB = 0.05
#: How far the excess kurtosis may lie from the dither's.
KURTOSIS_TOLERANCE = 0.25
#: Taps of the fitted NTF and of the whitening predictor.
NTF_ORDER = 32
#: Excess kurtosis of the total error per dither, -6/(5k) for k uniform terms [C].
EXCESS_KURTOSIS = {"none": -1.2, "rpdf": -0.6, "tpdf": -0.4, "tpdf-hp": -0.4}
#: Support half-width of the unshaped total error per dither, LSB (LWV 1992).
_SUPPORT = {"none": 0.5, "rpdf": 1.0, "tpdf": 1.5, "tpdf-hp": 1.5}
#: High-passed TPDF's spectrum must match its model this closely in every band, dB.
_HP_TOLERANCE_DB = 0.75


def octave_bands(sample_rate):
    """(label, low, high) of the octave bands whose centre lies below fs/2 (Hz)."""
    out = []
    for k, label in zip(range(-5, 5), OCTAVE_LABELS):
        fc = 1000.0 * 2.0 ** k
        if fc < sample_rate / 2.0:
            out.append((label, fc / math.sqrt(2.0), min(fc * math.sqrt(2.0), sample_rate / 2.0)))
    return out


def error_spectrum(analyzer, *, scale, clip_factor=1.0):
    """The error's PSD in LSB² per unit of normalized bandwidth, channels averaged.

    Parameters
    ----------
    analyzer : requant.dsp.analysis.ErrorAnalyzer
        Fed (its :meth:`~requant.dsp.analysis.ErrorAnalyzer.spectrum`).
    scale : float
        ``2**(bits-1)``.
    clip_factor : float
        Samples over samples not clipped (clipped ones were zeroed).

    Returns
    -------
    freqs : ndarray, Hz
    power : ndarray, LSB²
        White noise of variance σ² reads σ². Bins 0 and 1 (the DC of a
        truncation bias and its Hann leakage) take bin 2's value, the Nyquist
        bin its neighbour's.
    """
    f, psd = analyzer.spectrum()
    p = np.mean(psd, axis=0) * (analyzer.rate / 2.0) * scale * scale * clip_factor
    p = np.array(p, dtype=np.float64)
    if p.size > 4:
        p[:2] = p[2]
        p[-1] = p[-2]
    return f, np.maximum(p, 1e-300)


def innovation_variance(power):
    """Kolmogorov–Szegő: the geometric mean of a spectrum over 0..fs/2 (trapezoid)."""
    lg = np.log(power)
    return float(math.exp((lg[1:-1].sum() + 0.5 * (lg[0] + lg[-1])) / (lg.size - 1)))


def _arith_geo_db(power):
    mean = float((power[1:-1].sum() + 0.5 * (power[0] + power[-1])) / (power.size - 1))
    return 10.0 * math.log10(mean / innovation_variance(power))


def _bands_db(freqs, ratio, sample_rate):
    rows = []
    for label, lo, hi in octave_bands(sample_rate):
        sel = (freqs >= lo) & (freqs < hi) if hi < sample_rate / 2.0 else (freqs >= lo)
        if np.any(sel):
            rows.append({"hz": label, "db": round(10.0 * math.log10(float(np.mean(ratio[sel]))),
                                                 2)})
    return rows


def _hp_model(freqs, sample_rate):
    """High-passed TPDF's total error spectrum, LSB²: (1/12)(3 - 2 cos ω) [C, REFERENCES §9]."""
    return (3.0 - 2.0 * np.cos(2.0 * np.pi * freqs / sample_rate)) / 12.0


def _is_hp_tpdf(freqs, power, sample_rate):
    model = _hp_model(freqs, sample_rate)
    dev = [10.0 * math.log10(float(np.mean(power[sel]) / np.mean(model[sel])))
           for _, lo, hi in octave_bands(sample_rate)[1:]
           if np.any(sel := (freqs >= lo) & (freqs < hi))]
    return bool(dev) and max(abs(d) for d in dev) <= _HP_TOLERANCE_DB


def _whitened(reservoir, predictor):
    """The stretches through the whitening filter ``[1, -h]``; clipped samples dropped."""
    a = ntf_taps(predictor) if len(predictor) else np.ones(1)
    out = []
    for stretch in reservoir:
        for c in range(stretch.shape[1]):
            e = stretch[:, c]
            if e.size < a.size + 16:
                continue
            r = np.convolve(e, a, mode="valid")
            out.append(r[np.isfinite(r)])
    return np.concatenate(out) if out else np.zeros(0)


def _excess_kurtosis(r):
    if r.size < 1000:
        return None
    rc = r - r.mean()
    m2 = float(np.mean(rc * rc))
    return None if m2 <= 0.0 else float(np.mean(rc ** 4) / (m2 * m2) - 3.0)


def _nearest_dither(v):
    best, dist = None, None
    for name in ("none", "rpdf", "tpdf"):
        d = abs(10.0 * math.log10(v / DITHER_POWER_LSB2[name]))
        if dist is None or d < dist:
            best, dist = name, d
    return (best if dist <= DITHER_TOLERANCE_DB else None), dist


class Identification(dict):
    """The identified method and the figures behind it (a plain dict, JSON-ready)."""


def _quantizer(bias, dc_gain):
    """round, truncate, or None when the NTF removes DC (bias says nothing)."""
    if abs(dc_gain) < 0.2:
        return None
    trunc = -0.5 * dc_gain
    return "truncate" if abs(bias - trunc) < abs(bias) else "round"


def _classify(*, shaped, hp, v, kurt, half_width):
    """The dither's name, or 'unknown' (see the module notes)."""
    if hp:
        return "tpdf-hp"
    if not shaped and half_width is not None and half_width <= 0.5 + SUPPORT_SLACK_LSB:
        return "none"
    name, _ = _nearest_dither(v)
    if name is None:
        return "unknown"
    if not shaped and half_width is not None and half_width > _SUPPORT[name] + SUPPORT_SLACK_LSB:
        return "unknown"
    if not shaped and name == "none":
        return "unknown"  # undithered error never leaves ±1/2 LSB (checked above)
    if kurt is not None and abs(kurt - EXCESS_KURTOSIS[name]) > KURTOSIS_TOLERANCE:
        return "unknown"
    return name


def identify(meas, *, sample_rate):
    """Identify the method from a :class:`requant.audit.measure.Measurement`.

    Returns
    -------
    Identification
        ``quantizer``, ``dither``, ``shaped``, ``bias_lsb``,
        ``error_power_lsb2``, ``innovation_variance_lsb2``,
        ``noise_gain_db`` (arithmetic over geometric mean of the smooth
        spectrum), ``tonal_fraction``, ``excess_kurtosis``,
        ``support_lsb`` (min, max), ``ntf_db`` (bands), ``ntf`` (fitted taps and
        their figures from :func:`requant.dsp.shaping.describe`, or None), and
        for the pictures ``freqs`` and ``power`` (not JSON).
    """
    tot = meas.totals()
    n = max(tot[0], 1.0)
    bias = float(tot[2] / n)
    power_lsb2 = float(tot[5] / n)
    out = Identification(bias_lsb=bias, error_power_lsb2=power_lsb2,
                         support_lsb=[meas.min_e, meas.max_e])
    an = meas.analyzer
    if power_lsb2 <= 0.0 or an.spectrum()[1] is None:
        out.update(quantizer=None, dither="none" if power_lsb2 <= 0.0 else "unknown",
                   shaped=False, exact=power_lsb2 <= 0.0, innovation_variance_lsb2=None,
                   noise_gain_db=None, tonal_fraction=0.0, excess_kurtosis=None, ntf_db=None,
                   ntf=None, coeffs=np.zeros(0), freqs=None, power=None, whitened=np.zeros(0))
        return out
    clip_factor = (meas.counted + meas.clipped) / max(meas.counted, 1)
    freqs, power = error_spectrum(an, scale=meas.scale, clip_factor=clip_factor)
    v = innovation_variance(power)
    smooth = noise_floor(power)
    gain_db = _arith_geo_db(smooth)
    tonal = tonal_fraction(power[2:])
    variance = max(power_lsb2 - bias * bias, 1e-300)
    hp = _is_hp_tpdf(freqs, power, sample_rate) and abs(
        10.0 * math.log10(variance / DITHER_POWER_LSB2["tpdf-hp"])) < DITHER_TOLERANCE_DB
    shaped = (gain_db > SHAPED_GAIN_DB and tonal < LINE_SPECTRUM_FRACTION and not hp)
    coeffs = predictor = np.zeros(0)
    ntf = None
    if shaped:
        ratio = power / v
        coeffs = np.asarray(design_from_weight(1.0 / ratio, order=NTF_ORDER))
        predictor = np.asarray(design_from_weight(ratio, order=NTF_ORDER))
        ntf = describe(coeffs, sample_rate)
    dc_gain = float(np.sum(ntf_taps(coeffs)))
    quantizer = _quantizer(bias, dc_gain)
    centre = -0.5 * dc_gain if quantizer == "truncate" else 0.0
    half = None if shaped else max(meas.max_e - centre, centre - meas.min_e)
    whitened = _whitened(meas.reservoir, predictor)
    kurt = _excess_kurtosis(whitened)
    dither = _classify(shaped=shaped, hp=hp, v=v, kurt=kurt, half_width=half)
    out.update(quantizer=quantizer, dither=dither, shaped=bool(shaped), exact=False,
               innovation_variance_lsb2=v, noise_gain_db=gain_db, tonal_fraction=tonal,
               excess_kurtosis=kurt, ntf_db=_bands_db(freqs, power / v, sample_rate), ntf=ntf,
               coeffs=coeffs, freqs=freqs, power=power, whitened=whitened)
    return out
