"""Weighted noise of a streamed signal, every sample counted once.

:class:`WeightedNoiseMeter` gives the mean square of a signal seen through
frequency weightings (A-weighting, IEC 61672-1; ITU-R BS.468-4; the inverse
of Terhardt's threshold in quiet; see :mod:`requant.dsp.weighting`), fed block
by block, with fixed memory.

Method
------
The energy of a signal ``e`` run through a filter whose power response is
the weighting ``W²`` does not depend on the filter's phase:

    Σ_n (h ∗ e)[n]² = Σ_m g[m]·R[m],   g[m] = (1/π)∫_0^π W²(ω)·cos(ωm) dω,

with ``R[m] = Σ_n e[n]·e[n+m]`` the signal's own (aperiodic) autocorrelation
and ``g`` the filter's. The signal is cut into rectangular tiles of ``L``
samples that follow each other without gap or overlap, the last one padded
with zeros. By Parseval a tile's DFT ``X_k`` gives

    (1/L)·Σ_k W²(f_k)·|X_k|² = g_L[0]·r[0] + 2·Σ_{m=1}^{L−1} g_L[m]·r[m],

with ``r`` the tile's own autocorrelation and ``g_L`` the ``g`` of the
weighting sampled at the tile's bins (``g`` folded onto L lags). Summed over
the tiles, every sample counts once with the same weight, the tail included;
what a tile cannot see are the pairs of samples across its seams, and in
their place it pairs its last samples with its own first ones (``r[L − m]``
weighted by ``g_L[L − m] = g_L[m]``). For the lags up to :data:`SEAM_LAGS`,
where a weighting's ``g`` is large and a shaped noise's correlation lies,
each seam is corrected exactly: the pairs across it added, the wrapped pairs
taken away, from the ``SEAM_LAGS`` samples on either side (one small FFT per
seam). The result is then that of one filter run over the whole signal, its
ringing after the end included, up to pairs more than ``SEAM_LAGS`` apart at
the seams (the tests find 0.001 dB on undithered error).

Sampling
--------
With ``sample=True`` the caller declares the signal stationary (the total
error of TPDF dither, whose moments do not depend on the signal: Wannamaker,
Lipshitz, Vanderkooy & Wright 2000). A long signal is then measured on at most
:data:`MAX_SAMPLED_TILES` tiles spread evenly over it, plus every tile that
holds a sample excluded from the prediction (clipping, which is not
stationary). A sampled tile measured alone has ``L − m`` of its pairs at lag
``m``; for the lags up to ``SEAM_LAGS`` the sum is scaled by ``L/(L − m)``,
which is unbiased for a stationary signal whose correlation stays within
those lags (a shaped noise's NTF length). The result is a stratified
estimate: the tiles with exclusions as measured (their burst is no stationary
noise), the rest as the sampled tiles' weighted energy per counted sample
times the number of counted samples there (or, with ``sampled_elsewhere``,
the caller's figure for them: :class:`WelchPart`). Samples kept
silent (zero, known exactly) are counted out.

Two figures per weighting and channel come back: the mean square over every
sample (what the signal holds), and the mean square per *covered* sample,
with the excluded samples set to zero and the silent and excluded ones left
out of the count (what a prediction for the requantized samples compares
with).
"""

import functools
import math

import numpy as np

__all__ = ["WeightedNoiseMeter", "WelchPart", "tile_frames", "tile_weights",
           "MAX_SAMPLED_TILES", "SEAM_LAGS", "WEIGHTINGS"]

#: The weightings measured, besides the unweighted ('flat') power.
WEIGHTINGS = ("a", "itu468", "threshold")
#: At most this many evenly spread tiles (and those with an exclusion) are measured on a
#: long stationary signal (sample=True): 22 s of audio at 48 kHz, a million samples per
#: channel, which leaves about 0.01 dB of scatter on the A-weighted figure of a stereo file
#: and 0.02 dB on the threshold-weighted one.
MAX_SAMPLED_TILES = 256
#: Lags corrected exactly at the tiles' seams (a shaped noise's correlation lies within
#: its NTF's length: 10 taps for the hearing design).
SEAM_LAGS = 64


def tile_frames(sample_rate):
    """Tile length L: the power of two at or above fs/12, at least 1024 frames (4096 at
    44.1 and 48 kHz)."""
    return max(1024, 1 << max(0, int(math.ceil(math.log2(max(float(sample_rate), 1.0) / 12.0)))))


def tile_weights(sample_rate, n, weightings=WEIGHTINGS):
    """(bins, 1 + w): the Parseval factors ``c_k/n·W²(f_k)`` of an ``n``-point real DFT (column
    0 unweighted): ``|rfft(x)|² @ tile_weights(...)`` is the weighted energy of ``x``."""
    return _weights(float(sample_rate), int(n), tuple(weightings))[0]


@functools.lru_cache(maxsize=16)
def _weights(sample_rate, n, weightings):
    """The tile's weights: (bins, 1 + w) Parseval factors c_k/n·W²(f_k), column 0
    unweighted; and (SEAM_LAGS, 1 + w) seam factors 2·g_n[m], m = 1..SEAM_LAGS, with
    g_n the IDFT of the bins' W² (0 for the unweighted column)."""
    from requant.dsp.weighting import weighting_power

    f = np.arange(n // 2 + 1) * (float(sample_rate) / n)
    c = np.full(f.size, 2.0 / n)
    c[0] = c[-1] = 1.0 / n
    w2 = [np.ones(f.size)] + [np.asarray(weighting_power(w, f), dtype=np.float64)
                              for w in weightings]
    bins = np.stack([c * w for w in w2], axis=1)
    seams = np.stack([2.0 * np.fft.irfft(w, n)[1:SEAM_LAGS + 1] for w in w2], axis=1)
    seams[:, 0] = 0.0
    bins.setflags(write=False)
    seams.setflags(write=False)
    return bins, seams


def _across(tail, head):
    """Σ_{i<m} tail[M−m+i]·head[i] for m = 1..M, over the last axis (M = SEAM_LAGS): the
    pairs m apart with one sample in ``tail`` (the end of a tile) and one in ``head``."""
    M = SEAM_LAGS
    spec = np.conj(np.fft.rfft(head, 2 * M, axis=-1)) * np.fft.rfft(tail, 2 * M, axis=-1)
    xc = np.fft.irfft(spec, 2 * M, axis=-1)[..., :M]  # xc[l] = Σ_i head[i]·tail[i + l]
    return xc[..., ::-1]  # m = M − l


class WeightedNoiseMeter:
    """Weighted mean squares of a signal streamed in blocks, every sample counted once.

    Parameters
    ----------
    channels : int
    sample_rate : float, Hz
    weightings : tuple of str, default :data:`WEIGHTINGS`
        Names for :func:`requant.dsp.weighting.weighting_power`.
    total_frames : int, optional
        When known, sampling spreads its tiles over the whole length.
    sample : bool, default False
        The signal is stationary: a long one may be measured on evenly spread
        tiles (see the module notes).
    sampled_elsewhere : bool, default False
        With ``sample``: measure no sampled tiles here; the caller gives the
        stationary part's mean squares per covered sample to :meth:`finish`
        (the convert report takes them from its Welch segments, already
        spread over the file). Tiles with an exclusion are still measured.
    """

    def __init__(self, channels, sample_rate, *, weightings=WEIGHTINGS, total_frames=None,
                 sample=False, sampled_elsewhere=False):
        self.channels = ch = int(channels)
        self.rate = float(sample_rate)
        self.weightings = tuple(weightings)
        self.L = L = tile_frames(sample_rate)
        total = int(total_frames) if total_frames else 0
        self.tiles_total = -(-total // L) if total else 0
        self.stride = 1
        if sample and self.tiles_total > MAX_SAMPLED_TILES:
            self.stride = -(-self.tiles_total // MAX_SAMPLED_TILES)
        self._buf = np.zeros((ch, L))
        self._xbuf = None  # excluded samples of the tile in progress, when any
        self._fill = 0
        self._copying = True
        # tiles until the next sampled one (never, when the caller samples)
        self._due = (1 << 62) if sampled_elsewhere and self.stride > 1 else 0
        # every-sample mode: the last tile's edges, (tail, head) for all and covered
        self._edges = None
        self._sil = np.zeros(ch, dtype=np.int64)  # the tile's silent samples
        self._exc = np.zeros(ch, dtype=np.int64)  # the tile's excluded samples
        # strata [exact (every tile, seams corrected), alone (sampling: a clipped sample's
        # tile), sampled]; [all, covered]; per-bin |X|² sums, and the seams' pair sums
        self._p = np.zeros((3, 2, ch, L // 2 + 1))
        self._seam = np.zeros((2, ch, SEAM_LAGS))
        self._c = np.zeros((4, ch))  # covered counts: exact, alone, sampled, skipped
        self.frames = 0
        self.tiles_measured = 0

    @property
    def sampled(self):
        """Whether tiles are being skipped (a long stationary signal)."""
        return self.stride > 1

    def process(self, e, *, silent=None, exclude=None):
        """Take the next block.

        Parameters
        ----------
        e : ndarray (frames, channels)
        silent : ndarray of bool, same shape, optional
            Samples kept silent (their value is 0; they are left out of the
            covered count).
        exclude : ndarray of bool, same shape, optional
            Samples the covered figure leaves out (set to 0 there and not
            counted). Give None for a block without any: it costs nothing then.
        """
        n = e.shape[0]
        if silent is not None and not silent.any():
            silent = None
        if exclude is not None and not exclude.any():
            exclude = None
        i = 0
        L = self.L
        while i < n:
            if self._fill == 0 and n - i >= L and exclude is None:
                if self.stride == 1 and n - i >= 2 * L:
                    i += self._whole_tiles(e, i, (n - i) // L, silent)
                    continue
                if self._due > 0:  # sampling: whole tiles to skip, counted at once
                    i += self._skip_tiles(min(self._due, (n - i) // L), i, silent)
                    continue
                if self.stride > 1:  # sampling: a whole tile to measure, straight from e
                    i += self._sample_tile(e, i, silent)
                    continue
            if self._fill == 0:
                self._copying = self.stride == 1 or self._due == 0
            take = min(L - self._fill, n - i)
            x = None if exclude is None else exclude[i:i + take]
            if x is not None and not x.any():
                x = None
            if x is not None and not self._copying:
                # an exclusion in a tile being skipped: the part before it counts as
                # skipped, and a tile measured in full starts here
                self._close()
                self._copying = True
                take = min(L, n - i)
                x = exclude[i:i + take]
            f0 = self._fill
            if self._copying:
                self._buf[:, f0:f0 + take] = e[i:i + take].T
            if silent is not None:
                s = silent[i:i + take]
                if s.any():
                    for c in range(self.channels):
                        self._sil[c] += np.count_nonzero(s[:, c])
            if x is not None:
                if self._xbuf is None:
                    self._xbuf = np.zeros((self.channels, L), dtype=bool)
                self._xbuf[:, f0:f0 + take] = x.T
                for c in range(self.channels):
                    self._exc[c] += np.count_nonzero(x[:, c])
            self._fill += take
            i += take
            if self._fill == L:
                self._close()

    def _whole_tiles(self, e, i, k, silent):
        """``k`` whole tiles of ``e`` from frame ``i`` at once (every-sample mode, no
        exclusion among them): one batched FFT, the seams in one batch of small FFTs."""
        L, ch, M = self.L, self.channels, SEAM_LAGS
        span = e[i:i + k * L]
        if not span.any():  # silence, or a pass-through's error: no FFT needed
            if self._edges is not None:
                for j in (0, 1):
                    tail, head = self._edges[j]
                    self._seam[j] += _across(tail, -head)
            zero = np.zeros((ch, M))
            self._edges = ((zero, zero),) * 2
            self._count_tiles(k, silent, i)
            return k * L
        t = np.ascontiguousarray(span.reshape(k, L, ch).transpose(0, 2, 1),
                                 dtype=np.float64)
        x = np.ascontiguousarray(np.fft.rfft(t, axis=-1)).view(np.float64)  # re, im pairs
        power = np.einsum("kcf,kcf->cf", x, x)
        power = power[:, 0::2] + power[:, 1::2]
        self._p[0, 0] += power
        self._p[0, 1] += power
        heads, tails = t[:, :, :M], t[:, :, L - M:]
        if k > 1:
            pairs = _across(tails[:-1], heads[1:] - heads[:-1]).sum(axis=0)
            self._seam[0] += pairs
            self._seam[1] += pairs
        if self._edges is not None:
            for j in (0, 1):
                tail, head = self._edges[j]
                self._seam[j] += _across(tail, heads[0] - head)
        self._edges = ((tails[-1], heads[-1]),) * 2
        self._count_tiles(k, silent, i)
        return k * L

    def _skip_tiles(self, k, i, silent):
        """Sampling: ``k`` whole tiles from frame ``i`` skipped, their samples counted."""
        L = self.L
        self._c[3] += k * L
        if silent is not None:
            s = silent[i:i + k * L]
            if s.any():
                for c in range(self.channels):
                    self._c[3, c] -= np.count_nonzero(s[:, c])
        self._due -= k
        self.frames += k * L
        return k * L

    def _sample_tile(self, e, i, silent):
        """Sampling: the whole tile from frame ``i`` measured alone (no exclusion in it)."""
        L = self.L
        x = np.fft.rfft(np.asarray(e[i:i + L].T, dtype=np.float64), axis=-1)
        power = x.real * x.real
        power += x.imag * x.imag
        self._p[2, 0] += power
        self._p[2, 1] += power
        covered = np.full(self.channels, L, dtype=np.float64)
        if silent is not None:
            s = silent[i:i + L]
            if s.any():
                for c in range(self.channels):
                    covered[c] -= np.count_nonzero(s[:, c])
        self._c[2] += covered
        # a tile that is mostly silence says little: take the next one too
        self._due = self.stride - 1 if covered.min() >= L // 2 else 0
        self.frames += L
        self.tiles_measured += 1
        return L

    def _count_tiles(self, k, silent, i):
        """Count ``k`` whole tiles from frame ``i`` as measured, every-sample mode."""
        L = self.L
        counted = np.full(self.channels, k * L, dtype=np.float64)
        if silent is not None:
            s = silent[i:i + k * L]
            if s.any():
                for c in range(self.channels):
                    counted[c] -= np.count_nonzero(s[:, c])
        self._c[0] += counted
        self.frames += k * L
        self.tiles_measured += k

    def _close(self):
        n = self._fill
        if n == 0:
            return
        covered = n - self._sil - self._exc
        if not self._copying:  # skipped: counted, not measured
            self._due = max(self._due - 1, 0)
            self._c[3] += covered
        else:
            if n < self.L:
                self._buf[:, n:] = 0.0
            if self._xbuf is None:
                tiles = (self._buf, self._buf)
                x = np.fft.rfft(self._buf, axis=-1)
                power = x.real * x.real + x.imag * x.imag
                power = (power, power)
            else:
                tiles = (self._buf.copy(), self._buf)
                self._buf[self._xbuf] = 0.0
                x = np.fft.rfft(np.stack(tiles), axis=-1)
                power = x.real * x.real + x.imag * x.imag
            if self.stride == 1:
                stratum = 0
                self._seams(tiles)
            elif self._xbuf is not None:
                stratum = 1
            else:
                stratum = 2
                # a tile that is mostly silence says little: take the next one too
                if np.min(covered) >= n // 2:
                    self._due = self.stride - 1
            self._p[stratum, 0] += power[0]
            self._p[stratum, 1] += power[1]
            self._c[stratum] += covered
            self.tiles_measured += 1
        self.frames += n
        self._sil[:] = 0
        self._exc[:] = 0
        self._xbuf = None
        self._fill = 0

    def _seams(self, tiles):
        """Every-sample mode: the seam before this tile, corrected; keep its edges."""
        M, L = SEAM_LAGS, self.L
        if self._edges is not None:
            for j in (0, 1):
                tail, head = self._edges[j]
                self._seam[j] += _across(tail, tiles[j][:, :M] - head)
        self._edges = tuple((tiles[j][:, L - M:].copy(), tiles[j][:, :M].copy()) for j in (0, 1))

    def finish(self, stationary=None):
        """Measure the last, partial tile (idempotent) and return the figures.

        Parameters
        ----------
        stationary : dict, optional
            With ``sampled_elsewhere``: ``'flat'`` and each weighting mapped to
            the stationary part's mean square per covered sample, (channels,).

        Returns
        -------
        dict
            ``all`` and ``covered``: dicts mapping ``'flat'`` and each
            weighting to an ndarray (channels,) of mean squares (the signal's
            units squared): over every frame, and per covered sample (NaN
            where no sample is covered); ``covered_samples`` (channels,);
            ``frames``.
        """
        self._close()
        if self._edges is not None:  # the last tile's own wrapped pairs: nothing follows it
            for j in (0, 1):
                tail, head = self._edges[j]
                self._seam[j] += _across(tail, -head)
            self._edges = None
        L, M = self.L, SEAM_LAGS
        bins, seams = _weights(self.rate, L, self.weightings)
        e = self._p[0] @ bins + self._seam @ seams  # (2, ch, 1 + w): energies
        # tiles measured alone (sampling): their pairs up to M apart scaled by L/(L − m)
        m = np.arange(1, M + 1)
        lone = seams * (m / (L - m))[:, None]

        def alone(p):
            r = np.fft.irfft(p, L, axis=-1)[..., 1:M + 1]  # each tile's own lags 1..M
            return p @ bins + r @ lone

        c = self._c
        # a tile measured for its clipped samples is no stationary noise: as measured (the
        # L/(L − m) scaling would blow up a burst's short-lag terms)
        e += self._p[1] @ bins
        if stationary is not None:
            names = ("flat",) + self.weightings
            ms = np.stack([np.asarray(stationary[n], dtype=np.float64) for n in names], axis=-1)
            if np.isnan(ms).any():  # no clean segment: the measured tiles' own figure
                with np.errstate(invalid="ignore", divide="ignore"):
                    own = e[1] / c[1][:, None]
                ms = np.where(np.isnan(ms), np.nan_to_num(own, nan=0.0, posinf=0.0), ms)
            e += (ms * c[3][:, None])[None]
        elif np.any(c[2] > 0):
            with np.errstate(invalid="ignore", divide="ignore"):
                k = np.where(c[2] > 0, (c[2] + c[3]) / c[2], 0.0)
            e += alone(self._p[2]) * k[None, :, None]
        covered = c.sum(axis=0)
        names = ("flat",) + self.weightings
        frames = max(self.frames, 1)
        out_all, out_cov = {}, {}
        for j, name in enumerate(names):
            out_all[name] = np.maximum(e[0, :, j], 0.0) / frames
            with np.errstate(invalid="ignore", divide="ignore"):
                out_cov[name] = np.where(covered > 0,
                                         np.maximum(e[1, :, j], 0.0) / np.maximum(covered, 1),
                                         np.nan)
        return {"all": out_all, "covered": out_cov, "covered_samples": covered.astype(np.int64),
                "frames": self.frames}


class WelchPart:
    """A stationary error's weighted mean squares from Welch segments already spread over a
    file (a :class:`WeightedNoiseMeter` made with ``sampled_elsewhere`` takes them).

    Only segments holding no sample beyond ``bound`` (an error the dither cannot make:
    clipping) count; each adds its spectrum and its Hann²-weighted number of covered samples
    (silent ones left out). The window keeps the estimate unbiased for a shaped noise: the
    pairs of samples m apart keep a weight 1 − O((m/L)²), where rectangular tiles lose m/L.

    Parameters
    ----------
    channels : int
    sample_rate : float, Hz
    window : ndarray (L,)
        The segments' window.
    bound : float
        The largest error the requantizer makes unclipped (signal units).
    """

    def __init__(self, channels, sample_rate, window, bound):
        self.rate = float(sample_rate)
        self.L = int(window.size)
        self._w2 = np.asarray(window, dtype=np.float64) ** 2
        self._w2sum = float(self._w2.sum())
        self._bound = np.float32(bound)
        self._p = np.zeros((int(channels), self.L // 2 + 1))
        self._weight = np.zeros(int(channels))

    def add(self, segments, power, silent=None, *, total=None):
        """Segments (count, channels, L) before the window, their windowed |rfft|² (count,
        channels, bins), their silent masks (same shape as ``segments``) or None, and
        optionally ``power`` summed over the segments (when the caller has it)."""
        good = np.maximum(segments.max(axis=(1, 2)), -segments.min(axis=(1, 2))) <= self._bound
        if not good.any():
            return
        self._p += total if total is not None and good.all() else power[good].sum(axis=0)
        self._weight += float(np.count_nonzero(good)) * self._w2sum
        if silent is not None and silent[good].any():
            self._weight -= np.einsum("scl,l->c", silent[good], self._w2)

    def mean_squares(self, weightings=WEIGHTINGS):
        """``'flat'`` and each weighting: (channels,) mean squares per covered sample (NaN
        for a channel without a clean segment)."""
        e = self._p @ tile_weights(self.rate, self.L, weightings)
        with np.errstate(invalid="ignore", divide="ignore"):
            ms = np.where(self._weight[:, None] > 0, e / self._weight[:, None], np.nan)
        return {n: ms[:, j] for j, n in enumerate(("flat",) + tuple(weightings))}
