"""Streaming analysis of the error signal for the report.

:class:`ErrorAnalyzer` is fed the input and the error (output minus input)
block by block and keeps only fixed-size state:

* **Error spectrum** -- Welch's method (Welch 1967): Hann window (periodic),
  segments of :func:`segment_frames` samples (about 1/8 s), 50 % overlap.
  At most :data:`MAX_SEGMENTS` segments per channel are analysed, spread
  evenly over the file, so long files cost no more than short ones. It gives
  the pictures, the band table and the tone measure.
* **Weighted noise** -- A-weighting (IEC 61672-1), the ITU-R BS.468-4 curve
  (used here with an RMS detector, not the standard's quasi-peak one) and the
  inverse of Terhardt's hearing threshold (the weighting the ``hearing``
  shaper minimises), by :class:`requant.dsp.noisemeter.WeightedNoiseMeter`:
  every sample counted once, the tail included (a long file with TPDF dither,
  whose error is stationary, on evenly spread tiles); over every sample, and
  over the samples the prediction covers (not kept silent, not at the ends of
  the output's range).
* **Prediction** -- the dither's spectrum (:func:`requant.dsp.quantizer.error_spectrum_lsb2`:
  white for none, RPDF and TPDF; rising from Δ²/12 at DC to 5Δ²/12 at Nyquist
  for high-passed TPDF) through the noise-shaping filter, weighted.
* **Peaks and the range's ends** -- sample peaks of input and output (the
  report shows the larger of sample and true peak); output samples at the
  ends of the range (every clipped sample is one) with their error's energy;
  without dither, the samples passed unchanged (already on the output grid).
* **Signal-correlated error** -- two figures, the larger of which is
  reported as ``correlated_error_fraction``:

  - the squared correlation coefficient between input and error, i.e. the
    share of the error power that a linear function of the input explains
    (1 when a quiet signal is simply rounded away, ε = −x);
  - the *tonal* share: error power standing more than
    :data:`TONE_THRESHOLD_DB` above the running median of the error PSD
    (harmonic distortion of an undithered quiet tone). A smooth spectrum --
    white or shaped dither noise -- has none.

  With TPDF dither the error's first two moments do not depend on the input
  (Wannamaker, Lipshitz, Vanderkooy & Wright 2000), so both figures stay near
  zero; undithered quantization of quiet passages drives them towards 1.
* **Quietest passage** -- the quietest window (:func:`quiet_window_frames`,
  about 0.7 s) that is not digital silence, with its own figures and its
  samples for the time-view picture.
* **True peak** (ITU-R BS.1770-4 Annex 2) of input and output, DC offsets,
  and an error histogram from the analysed segments.
* **Loudness** (ITU-R BS.1770-4 integrated loudness, EBU Tech 3342 loudness
  range) of the input and of the output ``gain * input + error``, measured by
  :class:`requant.dsp.loudness.LoudnessMeter` on the same blocks, on a second
  thread beside the rest of the analysis (its kernel releases the GIL).
"""

import math

import numpy as np

# the verdict on the figures (shared with the audit): requant.dsp.correlated
from requant.dsp.correlated import (
    CORRELATED_WARNING_FRACTION,
    QUIET_UNDITHERED_LSB_RMS,
    correlated_summary,
)

# the dither powers (LWV 1992) and the prediction live in one place: requant.dsp.quantizer
from requant.dsp.quantizer import (
    DITHER_POWER_LSB2,
    error_pdf,
    error_spectrum_lsb2,
    predicted_error_power_lsb2,
)

# the tone measures are shared with the audit and inspect: requant.dsp.tones
from requant.dsp.tones import (
    TONE_THRESHOLD_DB,
    _hann,
    noise_floor,
    passage_correlation,
    passage_tonal_fraction,
    tonal_fraction,
)

__all__ = [
    "ErrorAnalyzer",
    "analyze_arrays",
    "segment_frames",
    "quiet_window_frames",
    "error_pdf",
    "tonal_fraction",
    "noise_floor",
    "passage_correlation",
    "passage_tonal_fraction",
    "correlated_summary",
    "MAX_SEGMENTS",
    "TONE_THRESHOLD_DB",
    "CORRELATED_WARNING_FRACTION",
    "QUIET_UNDITHERED_LSB_RMS",
    "STATIONARY_DITHERS",
    "DITHER_POWER_LSB2",
]

#: Most Welch segments analysed per channel (spread evenly over the file). 512
#: averages leave about 4 % (0.2 dB) scatter per bin and far less in band and
#: weighted figures; more cost time on long files for little gain in precision.
MAX_SEGMENTS = 512

#: A window whose float32-ranked power exceeds the quietest so far by more than
#: this factor is dropped without the exact float64 check. The float32 sums of
#: a window's squares are typically off by about sqrt(n)*2**-24 (2e-5 for the
#: longest windows), so a dropped window is, in practice, never more than
#: 0.1 % quieter than the one kept; a wider slack made stationary programme
#: copy nearly every window.
_RANK_SLACK = 1.001
#: Dithers whose total error does not depend on the signal (Wannamaker, Lipshitz, Vanderkooy
#: & Wright 2000): a long file's weighted noise may be measured on evenly spread tiles.
STATIONARY_DITHERS = ("tpdf", "tpdf-hp")



#: About this many of the analysed segments make the error histogram (every k-th of them):
#: two million samples at 48 kHz stereo, a smooth picture.
HISTOGRAM_SEGMENTS = 128

#: Fewest Welch segments a file should give (shorter files get shorter segments).
MIN_SEGMENTS = 16


def segment_frames(sample_rate, total_frames=None):
    """Welch segment length: the power of two at or above fs/8 (min 256).

    For a short file the length shrinks (to a power of two, at least 256) so
    that it still gives about :data:`MIN_SEGMENTS` segments: the tone
    detector needs averaged spectra, and the integrated figures do not need
    fine resolution.
    """
    n = max(256, 1 << max(0, int(math.ceil(math.log2(max(sample_rate, 1) / 8.0)))))
    if total_frames:
        fit = 1 << max(0, int(math.floor(math.log2(max(total_frames, 1) * 2 / (MIN_SEGMENTS + 1)))))
        n = max(256, min(n, fit))
    return n


def _tail(kept, v, keep):
    """The last ``keep`` frames of ``kept`` followed by ``v``."""
    if v.shape[0] >= keep:
        return np.array(v[v.shape[0] - keep:], dtype=v.dtype)
    return np.concatenate((kept, v))[-keep:]


def quiet_window_frames(sample_rate, total_frames=None):
    """Length of the windows searched for the quietest passage (4 segments)."""
    return 4 * segment_frames(sample_rate, total_frames)


def _db(power, *, floor=None):
    """10·log10(2·power): a mean square in dBFS per AES17; None for zero."""
    if power is None or power <= 0.0:
        return floor
    return 10.0 * math.log10(2.0 * power)


class ErrorAnalyzer:
    """Accumulate the report's spectral and time-domain figures, block by block.

    Parameters
    ----------
    channels : int
    sample_rate : float, Hz
    bits : int, 1..32
    quantizer, dither : str
        As for :class:`requant.dsp.quantizer.Requantizer` (the dither actually
        applied, 'none' for a pass-through).
    coeffs : sequence of float
        Error-feedback coefficients (empty for no shaping).
    total_frames : int, optional
        When known, segments are spread evenly over the whole file.
    true_peak : bool, default True
        Meter input and output true peak (BS.1770-4 Annex 2).
    own_sums : bool, default True
        Keep the time-domain sums (Σx, Σε, Σxε, Σx², Σε²) here; False when
        the caller supplies them through :meth:`use_sums`.
    loudness : bool, default True
        Measure the loudness of the input and of the output.
    output_gain : float, default 1.0
        The output is ``output_gain * x + e`` (a delivery beside its master;
        1 for a conversion).
    """

    def __init__(self, channels, sample_rate, *, bits, quantizer, dither, coeffs=(),
                 total_frames=None, true_peak=True, own_sums=True, loudness=True,
                 output_gain=1.0):
        self.channels = int(channels)
        self.rate = float(sample_rate)
        self.bits = int(bits)
        self.scale = float(2 ** (bits - 1))
        self.quantizer = quantizer
        self.dither = dither
        self.coeffs = np.asarray(coeffs, dtype=np.float64)
        self.L = segment_frames(sample_rate, total_frames)
        self.hop = self.L // 2
        self.win = _hann(self.L).astype(np.float32)
        self._win64 = self.win.astype(np.float64)
        if total_frames:
            n_seg = max(0, (int(total_frames) - self.L) // self.hop + 1)
            self.stride = max(1, -(-n_seg // MAX_SEGMENTS))
        else:
            n_seg, self.stride = 0, 1
        # the histogram needs far fewer samples than the spectrum: about HISTOGRAM_SEGMENTS
        self.hist_every = max(1, (n_seg // self.stride) // HISTOGRAM_SEGMENTS)
        nb = self.L // 2 + 1
        self._see = np.zeros((self.channels, nb))
        self._nseg = 0
        self._seg_index = 0
        self._pos = 0
        self._own_sums = bool(own_sums)
        self._buf_e = np.zeros((0, self.channels), dtype=np.float32)
        self._buf_s = np.zeros((0, self.channels), dtype=bool)
        # time-domain sums (all samples), per channel
        self._n = 0
        self._sx = np.zeros(self.channels)
        self._se = np.zeros(self.channels)
        self._sxe = np.zeros(self.channels)
        self._sx2 = np.zeros(self.channels)
        self._se2 = np.zeros(self.channels)
        # error histogram (LSB) over the analysed segments
        span = 1.5 * float(np.sum(np.abs(np.concatenate(([1.0], self.coeffs))))) + 1.0
        self.hist_edges = np.linspace(-span, span, 121)
        self._hist = np.zeros(120)
        self._hist_out = 0
        # quietest passage
        self.QW = quiet_window_frames(sample_rate, total_frames)
        self._qx = np.zeros((self.QW, self.channels), dtype=np.float32)
        self._qe = np.zeros((self.QW, self.channels), dtype=np.float32)
        self._qs = None  # which samples of the window were kept silent, when told
        self._qfill = 0
        self._qstart = 0
        self._qsum = 0.0
        self._qcand = True
        self._quiet = None
        # true peak
        self._tp = None
        if true_peak:
            from requant.dsp.truepeak import DualTruePeakMeter

            self._tp = DualTruePeakMeter(self.channels)
        self._loud = self._side = None
        if loudness:
            self._start_loudness(output_gain)
        # weighted noise over every sample (or evenly spread tiles of a stationary error)
        from requant.dsp.noisemeter import WeightedNoiseMeter

        self._meter = WeightedNoiseMeter(self.channels, self.rate, total_frames=total_frames,
                                         sample=dither in STATIONARY_DITHERS,
                                         sampled_elsewhere=True)
        self._stationary = None
        if self._meter.sampled:  # its stationary part from the Welch segments (finish)
            from requant.dsp.levels import error_bound_lsb
            from requant.dsp.noisemeter import WelchPart

            self._stationary = WelchPart(self.channels, self.rate, self.win, error_bound_lsb(
                quantizer, dither, self.coeffs) / self.scale)
        # sample peaks, clipping beyond the model, samples passed unchanged (undithered)
        from requant.dsp.levels import LevelMeter

        self._levels = LevelMeter(self.channels, bits=bits, quantizer=quantizer, dither=dither,
                                  coeffs=self.coeffs)

    def _start_loudness(self, gain):
        import weakref

        from requant.dsp.loudness import LoudnessMeter
        from requant.dsp.overlap import SideThread

        try:
            self._loud = LoudnessMeter(self.channels, self.rate, with_output=True, gain=gain)
        except ValueError:  # a rate too low for K-weighting: no loudness
            return
        self._side = SideThread("requant-loudness")
        weakref.finalize(self, self._side.close)  # an analyzer dropped mid-way stops it too

    def set_model(self, *, quantizer, dither, coeffs=()):
        """Name the method the predictions are made for, after feeding.

        For callers that learn the method from the data (the audit identifies
        it from the error it fed). Only :meth:`finish` reads the model; the
        histogram's span stays the one chosen at construction.
        """
        self.quantizer = quantizer
        self.dither = dither
        self.coeffs = np.asarray(coeffs, dtype=np.float64)

    # -- feeding -------------------------------------------------------------------------------

    def feed(self, x, e, silent=None):
        """Analyse the next block: input ``x`` and error ``e``, (frames, channels), full scale.

        ``silent`` (boolean, same shape) marks samples kept digitally silent
        (:meth:`requant.dsp.quantizer.Requantizer.silent_mask`): the histogram and
        the quietest passage's error power leave them out, as the prediction does.
        Give it for every block or for none.
        """
        n = x.shape[0]
        if n == 0:
            return
        x32 = np.asarray(x, dtype=np.float32)
        e32 = np.asarray(e, dtype=np.float32)
        if self._own_sums:
            x64 = np.asarray(x, dtype=np.float64)
            e64 = e32.astype(np.float64)
            self._sx += x64.sum(axis=0)
            self._se += e64.sum(axis=0)
            self._sxe += np.einsum("ij,ij->j", x64, e64)
            self._sx2 += np.einsum("ij,ij->j", x64, x64)
            self._se2 += np.einsum("ij,ij->j", e64, e64)
        self._n += n
        if self._side is not None:  # the loudness and the spectrum on a thread of their own
            self._side.start(self._side_work, x, e32, silent)
        try:
            if self._tp is not None:
                self._tp.process(x, e32)
            tp = self._tp
            some = None if silent is None or not silent.any() else silent  # checked once
            clipped, zeros = self._levels.process(
                x, e32, some, bounds=None if tp is None else tp.block_bounds,
                true_peaks=None if tp is None else tp.peak_out)
            self._meter.process(e32, silent=some if zeros is None else zeros, exclude=clipped)
            if self._side is None:
                self._feed_segments(e32, silent)
            self._feed_quiet(x32, e32, silent)
        finally:
            if self._side is not None:
                self._side.join()  # the caller may reuse the block's buffers after this

    def _side_work(self, x, e, silent):
        """The second thread's share of a block: the loudness, then the Welch spectrum (their
        state is touched by this thread only until :meth:`finish`). Both threads then carry
        about the same load: the true peak, levels, weighted noise and the quietest passage
        stay on the caller's."""
        self._loud.process(x, e)
        self._feed_segments(e, silent)

    def use_sums(self, *, sum_x, sum_e, sum_xe, sum_x2, sum_e2):
        """Take the time-domain sums (full scale) from elsewhere (the kernel keeps them).

        Call before :meth:`finish`, after telling the analyzer with
        ``own_sums=False`` not to compute them in :meth:`feed`.
        """
        self._sx, self._se, self._sxe = (np.asarray(v, dtype=np.float64) for v in
                                         (sum_x, sum_e, sum_xe))
        self._sx2, self._se2 = (np.asarray(v, dtype=np.float64) for v in (sum_x2, sum_e2))

    def _feed_segments(self, e, silent=None):
        # Segment j starts at global frame j*hop; only every stride-th is analysed.
        # The last L-1 frames are kept, so a segment can straddle two blocks.
        tail = self._buf_e.shape[0]
        base = self._pos - tail  # global frame of the combined buffer's first sample
        end = self._pos + e.shape[0]
        starts = []
        j = self._seg_index
        while j * self.hop + self.L <= end:
            if j % self.stride == 0:
                starts.append(j * self.hop - base)
            j += 1
        self._seg_index = j
        if starts:
            se = self._gather(e, self._buf_e, starts, tail)
            ss = None if silent is None else self._gather(silent, self._buf_s, starts, tail)
            self._add_segments(se, ss)
        keep = self.L - 1
        self._buf_e = _tail(self._buf_e, e, keep)
        if silent is not None:
            self._buf_s = _tail(self._buf_s, silent, keep)
        self._pos = end

    def _gather(self, v, kept, starts, tail):
        """The analysed segments of ``v`` (after ``kept``, its tail from the blocks before),
        channels first: the FFT runs along contiguous rows; a segment may begin in the tail."""
        out = np.empty((len(starts), v.shape[1], self.L), dtype=v.dtype)
        for k, s0 in enumerate(starts):
            if s0 >= tail:
                out[k] = v[s0 - tail:s0 - tail + self.L].T
            else:
                head = tail - s0
                out[k, :, :head] = kept[s0:].T
                out[k, :, head:] = v[:self.L - head].T
        return out

    def _add_segments(self, se, ss=None):
        # se: (segments, channels, L), float32; numpy's FFT keeps float32 and, unlike
        # scipy.fft, costs nothing to import (scipy.fft took 0.14 s of every report run)
        # in float64: numpy's float64 FFT is about 10 % quicker here than its float32 one
        fe = np.fft.rfft(se * self._win64, axis=-1)
        p = fe.real * fe.real
        p += fe.imag * fe.imag
        psum = np.sum(p, axis=0)
        self._see += psum
        self._nseg += se.shape[0]
        if self._stationary is not None:
            self._stationary.add(se, p, ss, total=psum)
        # histogram in LSB: bin index floor((e*scale - lo) * nb / (hi - lo)) + 1, out of range
        # counted apart (float32 arithmetic: a bin edge may move by a float32 rounding); from
        # every hist_every-th analysed segment
        first = (-(self._nseg - se.shape[0])) % self.hist_every
        if first >= se.shape[0]:
            return
        se = se[first::self.hist_every]
        ss = None if ss is None else ss[first::self.hist_every]
        lo, hi = self.hist_edges[0], self.hist_edges[-1]
        nb = self.hist_edges.size - 1
        f = nb / (hi - lo)
        flat = se.reshape(-1)
        if ss is not None and ss.any():  # samples kept silent are no requantization error
            flat = flat[~ss.reshape(-1)]
        y = flat * np.float32(self.scale * f)
        y -= np.float32(lo * f - 1.0)
        np.clip(y, 0.0, float(nb + 1), out=y)
        k = y.astype(np.intp)  # truncation is floor here (y >= 0); 0: below, nb + 1: above
        counts = np.bincount(k, minlength=nb + 2)
        self._hist += counts[1:nb + 1]
        self._hist_out += int(counts[0] + counts[nb + 1])

    def _feed_quiet(self, x, e, silent=None):
        # Windows are ranked by their float32 sum of squares. A window inside the block is
        # judged in place and copied only if it wins; one across blocks is accumulated block
        # by block and copied only while it can still be the quietest (most windows are
        # ruled out within their first block, so most audio is never copied).
        i = 0
        n = x.shape[0]
        W = self.QW
        while i < n:
            if self._qfill == 0 and n - i >= W:
                px = x[i:i + W]
                flat = px.reshape(-1)
                self._qsum = float(np.dot(flat, flat))
                self._close_quiet_window(px, e[i:i + W], None if silent is None
                                         else silent[i:i + W])
                self._qstart += W
                self._qsum = 0.0
                i += W
                continue
            take = min(W - self._qfill, n - i)
            if self._qcand:
                px = x[i:i + take]
                flat = px.reshape(-1)
                self._qsum += float(np.dot(flat, flat))
                if (self._quiet is not None
                        and self._qsum > _RANK_SLACK * self._quiet["ms"] * self._qx.size):
                    self._qcand = False
                else:
                    self._qx[self._qfill:self._qfill + take] = px
                    self._qe[self._qfill:self._qfill + take] = e[i:i + take]
                    if silent is not None:
                        if self._qs is None:
                            self._qs = np.zeros(self._qx.shape, dtype=bool)
                        self._qs[self._qfill:self._qfill + take] = silent[i:i + take]
            self._qfill += take
            i += take
            if self._qfill == W:
                if self._qcand:
                    self._close_quiet_window(self._qx, self._qe, self._qs)
                self._qstart += W
                self._qfill = 0
                self._qsum = 0.0
                self._qcand = True

    def _close_quiet_window(self, x, e, s):
        """Judge a whole window (input ``x``, error ``e``, silent mask ``s`` or None), its
        float32 sum of squares in ``_qsum``; keep a copy if it is the quietest so far."""
        ms_fast = self._qsum / x.size  # float32 sums: to rank windows
        if ms_fast <= 0.0 or (self._quiet is not None
                              and ms_fast > _RANK_SLACK * self._quiet["ms"]):
            return
        flat = x.reshape(-1).astype(np.float64)
        # exact, for the candidates (einsum: BLAS would start threads that spin for a while)
        ms = float(np.einsum("i,i->", flat, flat)) / x.size
        if self._quiet is not None and ms >= self._quiet["ms"]:
            return
        if np.count_nonzero(x) < 0.5 * x.size:
            return  # (mostly) digital silence: not a passage
        self._quiet = {"ms": ms, "start": self._qstart, "x": np.array(x, dtype=np.float32),
                       "e": np.array(e, dtype=np.float32),
                       "s": None if s is None else np.array(s, dtype=bool)}

    # -- results -------------------------------------------------------------------------------

    def _psd(self, s):
        """One-sided PSD, full scale²/Hz, from summed |FFT|² of windowed segments."""
        u = float(np.sum(self.win.astype(np.float64) ** 2))
        p = s / (max(self._nseg, 1) * self.rate * u)
        p[:, 1:-1] *= 2.0
        return p

    def spectrum(self):
        """The bins and the error's spectrum so far (callable before :meth:`finish`).

        Returns
        -------
        freqs : ndarray, Hz
        psd : ndarray (channels, bins), full scale²/Hz, or None
            One-sided Welch PSD of the segments analysed so far; None before
            the first.
        """
        freqs = np.arange(self.L // 2 + 1) * self.rate / self.L
        return freqs, (self._psd(self._see) if self._nseg > 0 else None)

    def _weights(self, freqs):
        from requant.dsp.weighting import weighting_power

        return {"a": weighting_power("a", freqs), "itu468": weighting_power("itu468", freqs),
                "threshold": weighting_power("threshold", freqs)}

    def predicted_psd(self, freqs):
        """Predicted one-sided error PSD (full scale²/Hz), dither noise only.

        ``(2 / fs)·S(f)·|NTF(f)|² / scale²`` with ``S`` the dither's spectrum
        (:func:`requant.dsp.quantizer.error_spectrum_lsb2`: flat for none, RPDF and
        TPDF, ``Δ²/4 − (Δ²/6)·cos ω`` for high-passed TPDF); the truncation bias sits
        at 0 Hz and is left out.
        """
        f = np.asarray(freqs, dtype=np.float64)
        s = error_spectrum_lsb2(self.dither, f, self.rate, self.coeffs)
        return 2.0 * s / (self.scale ** 2 * self.rate)

    def predicted_weighted(self):
        """Predicted weighted noise powers (full scale²) for 'a', 'itu468' and 'threshold'."""
        from requant.dsp.weighting import band_mean, frequency_grid

        grid = frequency_grid(self.rate, points=8192)
        psd = self.predicted_psd(grid)
        w = self._weights(grid)
        return {k: band_mean(psd * v, grid) * self.rate / 2.0 for k, v in w.items()}

    def _correlation2(self, c=None):
        sl = slice(None) if c is None else slice(c, c + 1)
        n = self._n * (self.channels if c is None else 1)
        if n == 0:
            return 0.0
        sx, se = self._sx[sl].sum(), self._se[sl].sum()
        cov = self._sxe[sl].sum() / n - (sx / n) * (se / n)
        vx = self._sx2[sl].sum() / n - (sx / n) ** 2
        ve = self._se2[sl].sum() / n - (se / n) ** 2
        if vx <= 0.0 or ve <= 0.0:
            return 0.0
        return float(min(1.0, cov * cov / (vx * ve)))

    def _quiet_figures(self):
        q = self._quiet
        if q is None:
            return None
        e = q["e"].astype(np.float64)
        rho2, tonal = passage_correlation(q["x"], e)
        # the error power of the requantized samples (those kept silent have none)
        counted = e.size - (0 if q.get("s") is None else int(np.count_nonzero(q["s"])))
        ep = float(np.sum(e**2)) / counted if counted else 0.0
        model = predicted_error_power_lsb2(self.quantizer, self.dither, self.coeffs)
        ep_lsb2 = ep * self.scale**2
        return {
            "start_s": q["start"] / self.rate,
            "duration_s": self.QW / self.rate,
            "signal_rms_dbfs": _db(q["ms"]),
            "error_rms_dbfs": _db(ep),
            "error_power_lsb2": ep_lsb2,
            "predicted_error_power_lsb2": model,
            "error_power_deviation_db": (10 * math.log10(ep_lsb2 / model) if ep_lsb2 > 0
                                         else None),
            "correlation_fraction": rho2,
            "tonal_fraction": tonal,
            "correlated_error_fraction": max(rho2, tonal),
            "signal_tonal_fraction": passage_tonal_fraction(q["x"]),
        }

    def loudness(self):
        """The ``loudness`` section of :meth:`finish`, or None when not measured."""
        if self._loud is None:
            return None
        src, out = self._loud.readings()
        return {"input_integrated_lufs": src["integrated_lufs"],
                "output_integrated_lufs": out["integrated_lufs"],
                "input_range_lu": src["range_lu"], "output_range_lu": out["range_lu"],
                "channel_layout": self._loud.layout,
                "channel_weights": [float(w) for w in self._loud.weights]}

    def finish(self):
        """All figures, as a dict (see the module docstring); JSON-ready."""
        if self._side is not None:
            self._side.close()
        if self._tp is not None:
            self._tp.finish()
        freqs = np.arange(self.L // 2 + 1) * self.rate / self.L
        out = {
            "method": {
                "psd": "Welch, Hann window (periodic), 50% overlap",
                "segment_frames": self.L,
                "segments_per_channel": self._nseg,
                "segment_stride": self.stride,
                "frequency_resolution_hz": self.rate / self.L,
                "itu468_detector": "RMS (the standard specifies quasi-peak)",
                "per_bin": "noise power in each bin of width fs/segment_frames, dBFS",
                "tone_measure": ("on" if self._nseg >= MIN_SEGMENTS // 2 else
                                 "off: too short for averaged spectra"),
                "histogram_segment_stride": self.hist_every,
            },
        }
        pw = self.predicted_weighted()
        have_psd = self._nseg > 0
        wn = self._meter.finish(stationary=None if self._stationary is None
                                else self._stationary.mean_squares(self._meter.weightings))
        out["method"].update(self._meter_method())
        meas_w = {}
        if self._meter.frames:
            for k in self._meter.weightings:
                meas_w[k] = _db(float(np.mean(wn["all"][k])))
        per_channel = []
        if have_psd:
            psd_e = self._psd(self._see)
            for c in range(self.channels):
                row = {k: _db(float(wn["all"][k][c])) for k in self._meter.weightings}
                # bins 0 and 1 hold the DC (truncation bias) and its Hann leakage;
                # too few averaged segments make noise look tonal: no verdict then
                row["tonal_fraction"] = (tonal_fraction(psd_e[c][2:])
                                         if self._nseg >= MIN_SEGMENTS // 2 else 0.0)
                row["correlation_fraction"] = self._correlation2(c)
                per_channel.append(row)
        tonal = max((r["tonal_fraction"] for r in per_channel), default=0.0)
        rho2 = self._correlation2()
        quiet = self._quiet_figures()
        corr = max(tonal, rho2)
        out["measured"] = {
            "a_weighted_noise_dbfs": meas_w.get("a"),
            "itu468_noise_dbfs": meas_w.get("itu468"),
            "threshold_weighted_noise_dbfs": meas_w.get("threshold"),
            "tonal_fraction": tonal,
            "correlation_fraction": rho2,
            "correlated_error_fraction": corr,
            "signal_rms_lsb": math.sqrt(max(float(np.sum(self._sx2)), 0.0)
                                        / max(self._n * self.channels, 1)) * self.scale,
        }
        out["model"] = {"quantizer": self.quantizer, "dither": self.dither, "bits": self.bits,
                        "shaped": bool(self.coeffs.size)}
        out["coverage"] = self._coverage(wn)
        out["predicted"] = {
            "a_weighted_noise_dbfs": _db(pw["a"]),
            "itu468_noise_dbfs": _db(pw["itu468"]),
            "threshold_weighted_noise_dbfs": _db(pw["threshold"]),
        }
        out["channels"] = per_channel
        if self._tp is not None:
            out["true_peak"] = self._true_peak_section()
        loud = self.loudness()
        if loud is not None:
            out["loudness"] = loud
        n = max(self._n, 1)
        out["dc_offset"] = {
            "input": [float(v) for v in self._sx / n],
            "output": [float(v) for v in (self._sx + self._se) / n],
        }
        out["quietest_passage"] = quiet
        out["histogram"] = {
            "edges_lsb": [float(v) for v in self.hist_edges],
            "counts": [int(v) for v in self._hist],
            "outside": int(self._hist_out),
        }
        out["spectrum"] = self._band_spectrum(freqs) if have_psd else None
        # kept for pictures, not for JSON
        self.freqs = freqs
        self.psd_error = self._psd(self._see) if have_psd else None
        self.quiet_samples = None if self._quiet is None else (self._quiet["x"], self._quiet["e"])
        return out

    def _true_peak_section(self):
        """The ``true_peak`` section: the larger of the BS.1770-4 reading and the sample peak
        (the interpolator does not pass the samples through exactly: its ripple can read a
        little below the sample peak), with the interpolator's own readings."""
        with np.errstate(divide="ignore"):
            sin = 20.0 * np.log10(self._levels.peak_in)
            sout = 20.0 * np.log10(self._levels.peak_out)
        tin, tout = self._tp.true_peak_dbtp
        shown_in, shown_out = np.maximum(tin, sin), np.maximum(tout, sout)
        return {
            "input_dbtp": _finite(np.max(shown_in)),
            "output_dbtp": _finite(np.max(shown_out)),
            "input_dbtp_per_channel": [_finite(v) for v in shown_in],
            "output_dbtp_per_channel": [_finite(v) for v in shown_out],
            "input_meter_dbtp": _finite(np.max(tin)),
            "output_meter_dbtp": _finite(np.max(tout)),
            "input_sample_peak_dbfs": _finite(np.max(sin)),
            # tracked exactly only where it passes the reading (LevelMeter): else null
            "output_sample_peak_dbfs": (_finite(np.max(sout)) if np.max(sout) >= np.max(tout)
                                        else None),
            "shown": "the larger of the sample peak and the BS.1770-4 interpolator's reading",
        }

    def _meter_method(self):
        """The ``method`` entries of the weighted noise measurement."""
        m = self._meter
        how = ("every sample once: rectangular tiles (Parseval) with their seams joined "
               "exactly, the last one zero-padded, as one weighting filter over the whole "
               "error" if not m.sampled else
               "the analysed Welch segments without a clipped sample (the error of "
               f"{self.dither} dither is stationary), and every tile with a clipped sample "
               f"({m.tiles_measured}) measured whole; silent and clipped samples counted "
               "over the whole file")
        return {"weighted": how, "weighted_tile_frames": m.L,
                "weighted_tiles_measured": m.tiles_measured}

    def _coverage(self, wn):
        """What the prediction covers, per channel, with the measured figures over it.

        ``silent_samples`` (kept silent), ``clipped_samples`` (clipped beyond what dither
        explains: at an end of the range with a larger error than the model makes, left
        out), their error's ``clipped_error_energy`` (full scale², summed),
        ``unchanged_samples`` (without dither: samples already on the output grid, passed
        with no error; None with dither), ``covered_samples``, and ``covered_mean_square``:
        'flat' and each weighting, the error's mean square per covered sample (full
        scale²; None where none is covered).
        """
        lv = self._levels
        unchanged = lv.unchanged
        cov = {k: [None if not np.isfinite(v) else float(v) for v in wn["covered"][k]]
               for k in wn["covered"]}
        return {
            "silent_samples": [int(v) for v in lv.silent],
            "clipped_samples": [int(v) for v in lv.clipped],
            "clipped_error_energy": [float(v) for v in lv.clipped_energy],
            "unchanged_samples": None if unchanged is None else [int(v) for v in unchanged],
            "covered_samples": [int(v) for v in wn["covered_samples"]],
            "covered_mean_square": cov,
        }

    def _band_spectrum(self, freqs):
        """1/6-octave band averages of the per-bin error power, measured and predicted."""
        psd = self._psd(self._see)
        df = self.rate / self.L
        pred = self.predicted_psd(freqs)
        edges = [20.0]
        while edges[-1] * 2 ** (1 / 6) < self.rate / 2:
            edges.append(edges[-1] * 2 ** (1 / 6))
        centers, meas, prd = [], [], []
        for lo, hi in zip(edges[:-1], edges[1:]):
            sel = (freqs >= lo) & (freqs < hi)
            if not np.any(sel):
                continue
            centers.append(float(math.sqrt(lo * hi)))
            meas.append([_db(float(np.mean(psd[c, sel]) * df), floor=-400.0)
                         for c in range(self.channels)])
            prd.append(_db(float(np.mean(pred[sel]) * df), floor=-400.0))
        return {"band_centers_hz": centers, "measured_dbfs_per_bin": meas,
                "predicted_dbfs_per_bin": prd, "bands": "1/6 octave"}


def _finite(v):
    v = float(v)
    return v if math.isfinite(v) else None


def analyze_arrays(x, err, sample_rate, *, bits, quantizer, dither, coeffs=(), true_peak=True):
    """Figures for signals held in memory (listening renders, tests).

    Parameters
    ----------
    x, err : ndarray, (frames,) or (frames, channels), full scale 1.0
        Input and error (output minus input).

    Returns
    -------
    dict
        ``snr_db``, ``error_power_lsb2``, ``a_weighted_noise_dbfs``,
        ``itu468_noise_dbfs`` (measured and ``predicted_*``),
        ``correlated_error_fraction``, ``signal_correlated`` (bool),
        ``quietest_passage`` and ``warnings``.
    """
    x = np.asarray(x, dtype=np.float64)
    e = np.asarray(err, dtype=np.float64)
    if x.ndim == 1:
        x, e = x[:, None], e[:, None]
    an = ErrorAnalyzer(x.shape[1], sample_rate, bits=bits, quantizer=quantizer, dither=dither,
                       coeffs=coeffs, total_frames=x.shape[0], true_peak=true_peak)
    step = 65536
    for i in range(0, x.shape[0], step):
        an.feed(x[i:i + step], e[i:i + step])
    res = an.finish()
    scale = 2.0 ** (bits - 1)
    sx2, se2 = float(np.sum(x * x)), float(np.sum(e * e))
    out = {
        "snr_db": None if sx2 <= 0 or se2 <= 0 else 10 * math.log10(sx2 / se2),
        "error_power_lsb2": se2 / max(e.size, 1) * scale * scale,
        "a_weighted_noise_dbfs": res["measured"]["a_weighted_noise_dbfs"],
        "itu468_noise_dbfs": res["measured"]["itu468_noise_dbfs"],
        "predicted_a_weighted_noise_dbfs": res["predicted"]["a_weighted_noise_dbfs"],
        "predicted_itu468_noise_dbfs": res["predicted"]["itu468_noise_dbfs"],
        "quietest_passage": res["quietest_passage"],
    }
    out.update(correlated_summary(res))
    return out
