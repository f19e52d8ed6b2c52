"""Tone measures of a spectrum or a passage: the smooth floor and what stands above it.

Shared by the convert report's analysis (:mod:`requant.dsp.analysis`), the
audit and ``requant inspect``:

* :func:`noise_floor` -- the running median of a spectrum over
  ±:data:`MEDIAN_HALF_WIDTH` bins: tones (lines a few bins wide) do not move it;
* :func:`tonal_fraction` -- the share of a spectrum's power standing more than
  :data:`TONE_THRESHOLD_DB` above that floor;
* :func:`passage_correlation` -- how much of a passage's error follows its
  signal (squared correlation, tonal share of the error);
* :func:`passage_tonal_fraction` -- the tonal share of a passage itself.
"""

import numpy as np

__all__ = ["noise_floor", "tonal_fraction", "passage_correlation", "passage_tonal_fraction",
           "TONE_THRESHOLD_DB", "MEDIAN_HALF_WIDTH"]

#: A PSD bin this far above the running median counts as a tone.
TONE_THRESHOLD_DB = 6.0
#: Half-width (bins) of the running median that tracks the noise floor.
MEDIAN_HALF_WIDTH = 24


def _hann(n):
    return 0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(n) / n)


def _running_median(values, half):
    """Running median over ±half bins, the ends extended with the end values.

    The same as ``scipy.ndimage.median_filter(values, size=2*half+1,
    mode="nearest")`` (the tests check it), without importing scipy.ndimage
    on the report path.
    """
    values = np.asarray(values, dtype=np.float64)
    padded = np.pad(values, half, mode="edge")
    windows = np.lib.stride_tricks.sliding_window_view(padded, 2 * half + 1)
    # the middle of an odd count: np.median's value for finite spectra, without its NaN
    # check, which imports numpy.ma (15 ms of a short process such as requant inspect)
    return np.partition(windows, half, axis=-1)[..., half]


def noise_floor(psd):
    """The smooth part of a spectrum: its running median over ±:data:`MEDIAN_HALF_WIDTH` bins.

    Tones (lines a few bins wide) do not move it; :func:`tonal_fraction`
    measures what stands above it, and the audit (:mod:`requant.audit`) reads
    the shape of the noise from it.
    """
    return _running_median(psd, MEDIAN_HALF_WIDTH)


def tonal_fraction(psd):
    """Share of the power of ``psd`` standing above its running median.

    Bins more than :data:`TONE_THRESHOLD_DB` above the median of their
    neighbourhood count with their excess over that median.
    """
    psd = np.asarray(psd, dtype=np.float64)
    total = psd.sum()
    if total <= 0.0 or psd.size < 8:
        return 0.0
    floor = noise_floor(psd)
    tone = psd > floor * 10.0 ** (TONE_THRESHOLD_DB / 10.0)
    return float(np.sum((psd - floor)[tone]) / total)


def passage_correlation(x, e):
    """How much of a passage's error follows its signal: (squared correlation, tonal share).

    The convert report's measure of its quietest passage, for any passage:
    the largest over channels of the squared correlation coefficient of
    signal and error, and of the tonal share (:func:`tonal_fraction`) of the
    error's spectrum averaged over Hann segments of an eighth of the passage
    (half overlapping). The mean of the error (a truncation bias) is no tone.

    Parameters
    ----------
    x, e : ndarray (frames, channels)
        Signal and error of the passage (any units; at least 16 frames).

    Returns
    -------
    (float, float)
    """
    x = np.asarray(x, dtype=np.float64)
    e = np.asarray(e, dtype=np.float64)
    n = x.shape[0]
    L = max(2, n // 8)
    hop = max(1, L // 2)
    win = _hann(L)
    starts = np.arange(0, n - L + 1, hop)
    idx = starts[:, None] + np.arange(L)[None, :]
    xc = x - x.mean(axis=0)
    ec = e - e.mean(axis=0)  # the truncation bias is no tone of the signal
    fe = np.fft.rfft(ec[idx] * win[None, :, None], axis=1)
    psd = np.sum(np.abs(fe) ** 2, axis=0).T  # (channels, bins), unnormalised
    tonal = max(tonal_fraction(p[2:]) for p in psd)
    rho2 = 0.0
    for c in range(x.shape[1]):
        den = float(np.sum(xc[:, c] ** 2) * np.sum(ec[:, c] ** 2))
        if den > 0.0:
            rho2 = max(rho2, float(np.sum(xc[:, c] * ec[:, c]) ** 2 / den))
    return rho2, tonal


def passage_tonal_fraction(x):
    """Share of a passage's own power standing in spectral lines: music, tones or hum rather
    than noise (the test ``requant inspect`` applies to a file's quietest passage).

    :func:`tonal_fraction` of the passage's spectrum, averaged over Hann segments of an
    eighth of the passage (half overlapping) and summed over channels, each channel's mean
    removed; the two lowest bins (DC and its leakage) are left out.

    Parameters
    ----------
    x : ndarray (frames, channels)
        The passage (at least 16 frames).

    Returns
    -------
    float
    """
    x = np.asarray(x, dtype=np.float64)
    n = x.shape[0]
    L = max(2, n // 8)
    starts = np.arange(0, n - L + 1, max(1, L // 2))
    idx = starts[:, None] + np.arange(L)[None, :]
    xc = x - x.mean(axis=0)
    f = np.fft.rfft(xc[idx] * _hann(L)[None, :, None], axis=1)
    return tonal_fraction(np.sum(np.abs(f) ** 2, axis=(0, 2))[2:])
