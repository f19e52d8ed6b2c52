"""Sample peaks and the samples a requantization's model does not cover, block by block.

:class:`LevelMeter` is fed the input ``x`` and the error ``e`` (output minus
input, full scale) of a requantization to ``bits`` and keeps:

* the **sample peaks** of input and output per channel (the convert report
  shows the larger of sample peak and true peak: the ITU-R BS.1770-4 Annex 2
  interpolator does not pass the samples through exactly, so its ripple can
  read a little below the sample peak);
* the samples **clipped beyond the model**: an output at an end of the range
  (code ``-2**(bits-1)`` or ``2**(bits-1) - 1``) with an error larger than
  the requantizer can make unclipped (:func:`error_bound_lsb`). Every such
  sample was clipped; a clipped sample whose error stays within the bound is
  not told apart, and matters little to the error power. Counted with their
  error's energy;
* without dither, the samples **passed unchanged** (error exactly 0: the
  input already lay on the output grid), and the samples kept silent.
"""

import numpy as np

__all__ = ["LevelMeter", "error_bound_lsb", "SUPPORT_LSB"]

#: Half-width (LSB) of the total error's support with an ideal rounding quantizer and no
#: clipping: rounding ±1/2, RPDF ±1, TPDF ±3/2, the error being the rounding error
#: convolved with the dither's pdf (Lipshitz, Wannamaker & Vanderkooy 1992).
SUPPORT_LSB = {"none": 0.5, "rpdf": 1.0, "tpdf": 1.5, "tpdf-hp": 1.5}


def error_bound_lsb(quantizer, dither, coeffs=()):
    """The largest error (LSB) the requantizer makes without clipping.

    The support's half-width (:data:`SUPPORT_LSB`, +1/2 for truncation) times
    Σ|n_k| of the noise transfer function n = [1, −h_1, …] when shaped, with a
    little slack for float32 rounding.
    """
    n = np.concatenate(([1.0], -np.asarray(coeffs, dtype=np.float64).reshape(-1)))
    half = SUPPORT_LSB[dither] + (0.5 if quantizer == "truncate" else 0.0)
    return half * float(np.sum(np.abs(n))) * (1.0 + 1e-6) + 1e-6


class LevelMeter:
    """Peaks, clipping beyond the model and unchanged samples of a requantization.

    Parameters
    ----------
    channels : int
    bits : int, 1..32
    quantizer, dither : str
        The method (the dither applied).
    coeffs : sequence of float
        Error-feedback coefficients (none: unshaped).
    """

    def __init__(self, channels, *, bits, quantizer, dither, coeffs=()):
        self.channels = int(channels)
        scale = float(2 ** (bits - 1))
        self.undithered = dither == "none"
        self._hi = (scale - 1.5) / scale  # half a code below the top code
        self._lo = (0.5 - scale) / scale  # half a code above the bottom code
        self._bound = np.float32(error_bound_lsb(quantizer, dither, coeffs) / scale)
        self.peak_in = np.zeros(self.channels)
        self.peak_out = np.zeros(self.channels)
        self.clipped = np.zeros(self.channels, dtype=np.int64)
        self.clipped_energy = np.zeros(self.channels)
        self.zero_error = np.zeros(self.channels, dtype=np.int64)
        self.silent = np.zeros(self.channels, dtype=np.int64)

    def process(self, x, e, silent=None):
        """Take the next block: input and error (frames, channels), full scale.

        Returns
        -------
        clipped : ndarray of bool or None
            The block's samples clipped beyond the model (None when none).
        zeros : ndarray of bool or None
            Without dither, the samples with no error at all (None when
            dithered or when there are none).
        """
        y = x + e  # the output (float32 for float32 input: enough to rank peaks)
        hi, lo = float(y.max()), float(y.min())
        self._raise(self.peak_out, y, max(hi, -lo))
        self._raise(self.peak_in, x, max(float(x.max()), -float(x.min())))
        if silent is not None and silent.any():
            for c in range(self.channels):
                self.silent[c] += np.count_nonzero(silent[:, c])
        zeros = None
        if self.undithered:
            zeros = e == 0.0
            if zeros.any():
                for c in range(self.channels):
                    self.zero_error[c] += np.count_nonzero(zeros[:, c])
            else:
                zeros = None
        # a float32 sum may sit an ulp off the code's value: look closer within 2^-22
        slack = 2.0 ** -22
        if hi < self._hi - slack and lo > self._lo + slack:
            return None, zeros
        y64 = np.asarray(x, dtype=np.float64) + e.astype(np.float64)
        clipped = ((y64 >= self._hi) | (y64 <= self._lo)) & (np.abs(e) > self._bound)
        if not clipped.any():
            return None, zeros
        e64 = e.astype(np.float64)
        for c in range(self.channels):
            r = clipped[:, c]
            self.clipped[c] += np.count_nonzero(r)
            self.clipped_energy[c] += float(np.sum(e64[r, c] ** 2))
        return clipped, zeros

    def _raise(self, peaks, v, top):
        """Raise the running per-channel peaks to the block's (only when one rises)."""
        if top <= float(peaks.min()):
            return
        for c in range(self.channels):
            col = v[:, c]
            peaks[c] = max(peaks[c], float(col.max()), -float(col.min()))

    @property
    def unchanged(self):
        """Without dither, per channel: samples passed with no error that were not kept
        silent; None when dithered."""
        if not self.undithered:
            return None
        return np.maximum(self.zero_error - self.silent, 0)
