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


def _channel_peaks(v):
    """Largest magnitude of each channel of ``v`` (frames, channels): the frames folded into
    long rows, so numpy reduces along contiguous memory (an axis-0 max of a two-column
    array is 30 times slower)."""
    n, ch = v.shape
    if n == 0:
        return np.zeros(ch)
    a = np.abs(v)
    k = max(1, 512 // ch)
    r = n - n % k
    m = np.zeros(ch, dtype=a.dtype)
    if r:
        m = a[:r].reshape(-1, k * ch).max(axis=0).reshape(k, ch).max(axis=0)
    if r < n:
        m = np.maximum(m, a[r:].max(axis=0))
    return m.astype(np.float64)


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

    def process(self, x, e, silent=None, *, bounds=None, true_peaks=None):
        """Take the next block: input and error (frames, channels), full scale.

        Parameters
        ----------
        x, e : ndarray (frames, channels)
        silent : ndarray of bool, optional
            Samples kept silent.
        bounds : (sequence of float, sequence of float), optional
            Per channel, the block's largest input magnitude and a bound on its
            largest output magnitude, from the true-peak meter
            (:attr:`requant.dsp.truepeak.DualTruePeakMeter.block_bounds`): the
            input's peak is then taken from it, and the output is looked at
            only where the bound passes both its peak so far and ``true_peaks``.
        true_peaks : ndarray, optional
            The output's true peaks so far (linear), with ``bounds``.

        Returns
        -------
        clipped : ndarray of bool or None
            The block's samples clipped beyond the model (None when none).
        zeros : ndarray of bool or None
            Without dither, the samples with no error at all (None when
            dithered or when there are none).

        Notes
        -----
        With ``bounds``, :attr:`peak_out` is exact wherever it exceeds the true
        peak (the only place the report shows it) and may stay below the
        sample peak elsewhere.
        """
        if bounds is None:
            block_out = _channel_peaks(x + e)  # float32 for float32 input: enough for peaks
            np.maximum(self.peak_in, _channel_peaks(x), out=self.peak_in)
            np.maximum(self.peak_out, block_out, out=self.peak_out)
            top = float(block_out.max())
        else:  # a few floats per channel: plain Python is quicker than numpy calls here
            b_in, b_out = bounds
            pin, pout = self.peak_in, self.peak_out
            exact = False
            for c in range(self.channels):
                if b_in[c] > pin[c]:
                    pin[c] = b_in[c]
                ref = pout[c] if true_peaks is None else max(pout[c], true_peaks[c])
                exact = exact or b_out[c] > ref
            if exact:
                np.maximum(pout, _channel_peaks(x + e), out=pout)
            top = max(b_out)
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
        if top < self._hi - 2.0 ** -22:  # self._hi < -self._lo
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

    @property
    def unchanged(self):
        """Without dither, per channel: samples passed with no error that were not kept
        silent; None when dithered."""
        if not self.undithered:
            return None
        return np.maximum(self.zero_error - self.silent, 0)
