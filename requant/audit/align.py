"""Align a delivery with its master: integer offset, gain and polarity.

Two steps, in flat memory whatever the files' length:

1. **Coarse offset** (:func:`scan`): one pass over both files. Each is mixed to
   mono and decimated by block sums of :func:`decimation` frames (to about 1.5 kHz);
   their cross-correlation over lags ``-K..K`` (``K`` from ``max_shift_s``) is
   accumulated chunk by chunk with FFTs (:class:`StreamCorrelator`: each chunk of
   the delivery against the stretch of the master it can meet), which is the
   whole-file cross-correlation exactly, in memory of a few chunks. Its peaks,
   with the cross-spectrum whitened (the phase transform of Knapp & Carter
   1976) so that programme that repeats (a held chord) still gives one sharp
   peak, are the candidate offsets. The same
   pass ORs the delivery's codes together (the grid every sample lies on: its
   word length) and keeps the master's energy per block (where it is loud).
2. **Exact offset and gain** (:func:`refine`): in the master's loudest stretch
   (up to :data:`REFINE_FRAMES` frames inside the overlap) the full-rate
   cross-correlation over ``±2`` decimation steps around the coarse lag gives
   the integer offset; the gain is then the least-squares fit (with a constant,
   so a truncation bias cannot pull it) of the delivery on the master over the
   samples that are not clipped: codes at a rail are left out, then samples
   the first fit puts within a margin of a rail. Its sign is the polarity.

Convention: ``delivered[n] ≈ gain · master[n - offset_frames]``; a positive
offset means the delivery starts later (it was padded at the start), a
negative one that it lacks the master's first frames.

The gain's own error adds ``δ·x`` to the measured error. Fitted on about
260 000 frames of loud programme its relative error is about σ_e/√(Σx²),
some 10⁻³ LSB RMS of error at any word length, far below the quantization
error being measured.
"""

import math
from dataclasses import dataclass

import numpy as np

from requant.errors import InputError

__all__ = ["Alignment", "Scan", "StreamCorrelator", "decimation", "scan", "refine",
           "word_length_of", "rails", "REFINE_FRAMES", "SCAN_BLOCK_FRAMES", "MIN_CORRELATION",
           "CANDIDATES"]

#: Frames read per block in the scan (a multiple of every decimation factor).
SCAN_BLOCK_FRAMES = 1 << 16
#: Longest stretch of the master used for the exact offset and the gain.
REFINE_FRAMES = 1 << 18
#: Below this normalized correlation at the best lag the files are not a master and
#: its delivery (or the delivery is mostly noise): the audit stops with an error.
MIN_CORRELATION = 0.1
#: Coarse peaks tried at the full rate, and the frames each is tried on.
CANDIDATES = 8
_SCREEN_FRAMES = 1 << 16
#: Decimated samples of the delivery per FFT chunk of the coarse correlation.
_CHUNK = 1 << 16
#: Decimated rate aimed at, Hz: programme up to about 750 Hz survives the block sums.
_DECIMATED_RATE_HZ = 1500.0


def decimation(sample_rate):
    """Frames summed into one sample of the coarse correlation: a power of two near fs/1.5 kHz."""
    return int(max(1, 2 ** round(math.log2(max(sample_rate, 1.0) / _DECIMATED_RATE_HZ))))


def word_length_of(or_bits):
    """The shortest word length whose grid holds every code OR-ed into ``or_bits``.

    Codes are int32, left-justified: a word length ``w`` leaves the low
    ``32 - w`` bits zero. Returns None when every code is 0 (digital silence).

    Examples
    --------
    >>> word_length_of(0x7FF00000), word_length_of(1 << 16), word_length_of(0)
    (12, 16, None)
    """
    v = int(or_bits) & 0xFFFFFFFF
    if v == 0:
        return None
    trailing = (v & -v).bit_length() - 1
    return 32 - trailing


def rails(bits):
    """(lowest, highest) code of a ``bits``-bit word."""
    return -(1 << (bits - 1)), (1 << (bits - 1)) - 1


@dataclass(frozen=True)
class Scan:
    """What the first pass found.

    Attributes
    ----------
    coarse_lag_frames : int
        Lag of the coarse correlation peak, in frames (a multiple of ``decimation``).
    decimation : int
    lags_frames, correlation, phat : ndarray
        The coarse correlation, plain and PHAT-weighted (each normalized to
        its peak magnitude), around the peak, for the report's picture.
    candidates : tuple of int
        Lags (frames) of the strongest local peaks, strongest first: periodic
        programme (a held chord) gives several peaks of nearly equal height,
        which :func:`refine` tells apart at the full rate.
    or_bits : int
        The delivery's codes OR-ed together.
    block_energy : ndarray
        The master's Σx² per block of :data:`SCAN_BLOCK_FRAMES` frames.
    """

    coarse_lag_frames: int
    decimation: int
    lags_frames: np.ndarray
    correlation: np.ndarray
    phat: np.ndarray
    or_bits: int
    block_energy: np.ndarray
    candidates: tuple = ()


@dataclass(frozen=True)
class Alignment:
    """Where the delivery sits against the master, and at what gain.

    Attributes
    ----------
    offset_frames : int
        ``delivered[n] ≈ gain · master[n - offset_frames]``.
    gain : float
        Signed; its sign is the polarity.
    start_frame, overlap_frames : int
        The delivery's frames ``start_frame .. start_frame + overlap_frames``
        have a master frame; only they are measured.
    correlation : float
        Normalized correlation at the offset in the fitting stretch (-1..1).
    window_start, window_frames : int
        The master's frames the offset and gain were fitted on.
    fit_samples : int
        Samples (frames x channels) in the gain fit.
    fine_lags, fine_correlation : ndarray
        Full-rate correlation (normalized) around the offset, for the picture.
    """

    offset_frames: int
    gain: float
    start_frame: int
    overlap_frames: int
    correlation: float
    window_start: int
    window_frames: int
    fit_samples: int
    fine_lags: np.ndarray
    fine_correlation: np.ndarray

    @property
    def polarity(self):
        return -1 if self.gain < 0 else 1

    @property
    def gain_db(self):
        return 20.0 * math.log10(abs(self.gain))


class StreamCorrelator:
    """Cross-correlation ``c[k] = Σ_n d[n]·m[n-k]``, ``|k| <= max_lag``, fed in pieces.

    Feed the two decimated signals in any pieces (:meth:`feed`), say when each
    has ended (:meth:`end`), then :meth:`finish`. Memory: the pending chunk of
    the delivery and the stretch of the master it needs, ``O(chunk + max_lag)``,
    in buffers allocated once.
    """

    def __init__(self, max_lag, *, chunk=_CHUNK):
        self.K = int(max_lag)
        self.B = int(chunk)
        self.N = 1 << int(math.ceil(math.log2(self.B + 2 * self.K + 1)))
        self.X = np.zeros(self.N // 2 + 1, dtype=complex)
        # the master from global index m0 (zeros before 0), the delivery from d0
        self._m = _Buffer(2 * self.B + 2 * self.K)  # room for one file to run ahead
        self._m.append(np.zeros(self.K))
        self._m0 = -self.K
        self._d = _Buffer(2 * self.B)
        self._d0 = 0
        self._ended = {"m": False, "d": False}

    def feed(self, dm=None, dd=None):
        """Append decimated master ``dm`` and/or delivery ``dd`` samples."""
        if dm is not None and dm.size and not (self._ended["d"] and not self._d.size):
            self._m.append(dm)
        if dd is not None and dd.size:
            self._d.append(dd)
        self._run()

    def end(self, which):
        """The master (``'m'``) or the delivery (``'d'``) has no more samples."""
        self._ended[which] = True
        self._run()

    def _run(self):
        """Correlate every chunk that can be."""
        K, B = self.K, self.B
        while self._d.size:
            if self._d.size < B and not self._ended["d"]:
                break
            if self._m0 + self._m.size < self._d0 + B + K and not self._ended["m"]:
                break
            a = self._d.view()[:B]
            fa = np.fft.rfft(a, self.N)
            fb = np.fft.rfft(self._m.view()[:B + 2 * K], self.N)
            self.X += np.conj(fa) * fb  # the chunks' correlations add, so their spectra do
            n = a.size
            self._d.drop(n)
            self._d0 += n
            drop = min(n, self._m.size)
            self._m.drop(drop)
            self._m0 += drop

    def finish(self):
        """The correlation over lags ``-K..K`` (index ``k + K``), plain and PHAT-weighted.

        Returns
        -------
        plain, phat : ndarray
            ``irfft(X)`` and ``irfft(X / |X|)`` of the summed cross-spectrum,
            lag ``k`` at index ``k + K``. The phase transform (Knapp & Carter
            1976) whitens the cross-spectrum, so the peak is a few samples wide
            even for programme whose plain correlation repeats at its period.
        """
        self._ended = {"m": True, "d": True}
        self._run()
        K = self.K
        mag = np.abs(self.X)
        w = np.where(mag > 1e-12 * max(float(mag.max()), 1e-300), 1.0 / np.maximum(mag, 1e-300),
                     0.0)
        out = []
        for spec in (self.X, self.X * w):
            cc = np.fft.irfft(spec, self.N)[: 2 * K + 1]
            out.append(cc[::-1].copy())  # cc[l] is lag K - l
        return tuple(out)


class _Buffer:
    """A float64 queue: append at the end, drop from the front; grows only when a piece
    does not fit (pieces of a block each, as the scan feeds them, always do)."""

    def __init__(self, capacity):
        self._a = np.zeros(int(capacity))
        self.size = 0

    def append(self, x):
        if self.size + x.size > self._a.size:
            grown = np.zeros(max(2 * self._a.size, self.size + x.size))
            grown[:self.size] = self._a[:self.size]
            self._a = grown
        self._a[self.size:self.size + x.size] = x
        self.size += x.size

    def view(self):
        return self._a[:self.size]

    def drop(self, n):
        self._a[:self.size - n] = self._a[n:self.size]
        self.size -= n


def _mono_sums(x, D, ones):
    """Sums over D frames and all channels (a multiple of D frames), float64."""
    n = x.shape[0] - x.shape[0] % D
    if n == 0:
        return np.zeros(0)
    flat = x[:n].reshape(n // D, D * x.shape[1])
    if flat.dtype == np.int32:
        flat = flat.astype(np.float32)
    return (flat @ ones[: D * x.shape[1]].astype(flat.dtype)).astype(np.float64)


def _decimator(D, channels):
    """A closure that decimates successive blocks by D, carrying a partial group."""
    ones = np.ones(D * channels)
    state = {"rest": None}

    def step(x, final=False):
        if state["rest"] is not None:
            x = np.concatenate((state["rest"], x))
            state["rest"] = None
        if final and x.shape[0] % D:
            pad = np.zeros((D - x.shape[0] % D, x.shape[1]), dtype=x.dtype)
            x = np.concatenate((x, pad))
        n = x.shape[0] - x.shape[0] % D
        if n < x.shape[0]:
            state["rest"] = np.array(x[n:])
        return _mono_sums(x[:n], D, ones)

    return step


def scan(master, delivered, *, max_shift_s):
    """The first pass: coarse offset, the delivery's grid, the master's loud blocks.

    Parameters
    ----------
    master, delivered : requant.audit.sources.Source
    max_shift_s : float, s, > 0
        Largest offset looked for.

    Returns
    -------
    Scan
    """
    D = decimation(master.rate)
    longest = max(master.frames, delivered.frames)
    K = int(min(math.ceil(max_shift_s * master.rate / D) + 2, math.ceil(longest / D) + 2))
    corr = StreamCorrelator(K)
    dec_m, dec_d = _decimator(D, master.channels), _decimator(D, delivered.channels)
    or_bits = np.int32(0)
    energy = []
    itm = master.blocks(0, master.frames, SCAN_BLOCK_FRAMES)
    itd = delivered.blocks(0, delivered.frames, SCAN_BLOCK_FRAMES)
    live = {"m": True, "d": True}
    while live["m"] or live["d"]:
        if live["m"]:
            x = next(itm, None)
            if x is None:
                live["m"] = False
                corr.feed(dm=dec_m(np.zeros((0, master.channels), np.float32), final=True))
                corr.end("m")
            else:
                flat = x.reshape(-1)
                energy.append(float(np.dot(flat, flat)))
                corr.feed(dm=dec_m(x))
        if live["d"]:
            c = next(itd, None)
            if c is None:
                live["d"] = False
                corr.feed(dd=dec_d(np.zeros((0, delivered.channels), np.int32), final=True))
                corr.end("d")
            else:
                or_bits = or_bits | np.bitwise_or.reduce(c.reshape(-1))
                corr.feed(dd=dec_d(c))
    xc, ph = corr.finish()
    k = int(np.argmax(np.abs(ph)))
    lo, hi = max(0, k - 200), min(xc.size, k + 201)
    cands = list(dict.fromkeys(_peaks(np.abs(ph)) + _peaks(np.abs(xc), count=3)))
    return Scan(coarse_lag_frames=(k - K) * D, decimation=D,
                lags_frames=(np.arange(lo, hi) - K) * D,
                correlation=xc[lo:hi] / (float(np.max(np.abs(xc[lo:hi]))) or 1.0),
                phat=ph[lo:hi] / (abs(float(ph[k])) or 1.0),
                or_bits=int(or_bits), block_energy=np.asarray(energy),
                candidates=tuple((i - K) * D for i in cands))


def _peaks(a, count=CANDIDATES, floor=0.2):
    """Indices of the ``count`` largest local maxima of ``a`` (at least ``floor`` x the top)."""
    if a.size < 3:
        return [int(np.argmax(a))] if a.size else [0]
    inner = np.flatnonzero((a[1:-1] >= a[:-2]) & (a[1:-1] >= a[2:])) + 1
    idx = np.concatenate(([0], inner, [a.size - 1]))
    idx = idx[a[idx] >= floor * a.max()]
    return [int(i) for i in idx[np.argsort(-a[idx], kind="stable")][:count]]


def _overlap(offset, master_frames, delivered_frames):
    """(first delivered frame, frames) that have a master frame at ``offset``."""
    start = max(0, offset)
    end = min(delivered_frames, master_frames + offset)
    return start, max(0, end - start)


def _window(scan_result, master, delivered, lag, radius, longest):
    """The loudest stretch of the master, inside the overlap at any lag within ``radius``."""
    start, overlap = _overlap(lag, master.frames, delivered.frames)
    frames = min(longest, overlap - 2 * radius)
    if frames < 256:
        raise InputError(f"the delivery {delivered.path!r} overlaps its master {master.path!r} "
                         f"by only {max(overlap, 0)} frames at the best offset; audit needs "
                         "both to hold the same programme")
    lo = start - lag + radius  # the master's first usable frame
    hi = start + overlap - lag - radius - frames  # its last usable window start
    e = scan_result.block_energy
    B = SCAN_BLOCK_FRAMES
    nb = max(1, frames // B)
    run = np.convolve(e, np.ones(nb), mode="valid") if e.size >= nb else e
    best, where = -1.0, lo
    for i, v in enumerate(run):
        p = min(max(i * B, lo), hi)
        if v > best:
            best, where = v, p
    return int(where), int(frames)


def _xcorr_lags(a, b, nlags):
    """``r[l] = Σ_c Σ_i a[i,c]·b[i+l,c]`` for ``l = 0..nlags-1`` (FFT)."""
    n = 1 << int(math.ceil(math.log2(b.shape[0] + 1)))
    r = np.zeros(nlags)
    for c in range(a.shape[1]):
        fa = np.fft.rfft(a[:, c], n)
        fb = np.fft.rfft(b[:, c], n)
        r += np.fft.irfft(np.conj(fa) * fb, n)[:nlags]
    return r


def _fit_gain(m, d, keep):
    """Least-squares gain (with a constant) of ``d`` on ``m`` over ``keep``; (gain, rho)."""
    mv = m[keep]
    dv = d[keep]
    if mv.size < 16:
        return None, 0.0
    mc = mv - mv.mean()
    dc = dv - dv.mean()
    # numpy's own loops, not BLAS: the same sums (to the last bit) with any number of threads,
    # so a pair gives the same figures on every machine of a cluster
    smm, sdd, smd = (float(np.einsum("i,i->", a, b)) for a, b in ((mc, mc), (dc, dc), (mc, dc)))
    if smm <= 0.0 or sdd <= 0.0:
        return None, 0.0
    return smd / smm, smd / math.sqrt(smm * sdd)


def _best_lag(master, delivered, p, frames, lag, radius):
    """The full-rate lag within ``lag ± radius`` of the master's frames ``p..p+frames``.

    Returns (offset, |normalized correlation|, correlation curve, the master
    frames as float64, the delivered codes at the offset).
    """
    m = master.read(p, frames).astype(np.float64)
    d = delivered.read(p + lag - radius, frames + 2 * radius)
    r = _xcorr_lags(m, d.astype(np.float64), 2 * radius + 1)
    li = int(np.argmax(np.abs(r)))
    codes = d[li:li + frames]
    dv = codes.astype(np.float64)
    den = math.sqrt(float(np.sum(m * m)) * float(np.sum(dv * dv)))
    rho = abs(float(r[li])) / den if den > 0.0 else 0.0
    return lag - radius + li, rho, r, m, codes


def refine(scan_result, master, delivered, bits):
    """The exact offset and the gain (see the module notes).

    Parameters
    ----------
    scan_result : Scan
    master, delivered : requant.audit.sources.Source
    bits : int
        The delivery's word length (for its rails).

    Returns
    -------
    Alignment

    Raises
    ------
    InputError
        When the files overlap too little or do not hold the same programme.
    """
    D = scan_result.decimation
    R = 2 * D + 2
    cands = scan_result.candidates or (scan_result.coarse_lag_frames,)
    best, first_error = None, None
    for c in cands:  # peaks of a repeating programme, told apart at the full rate
        try:
            p, W = _window(scan_result, master, delivered, c, R, _SCREEN_FRAMES)
        except InputError as exc:
            first_error = first_error or exc
            continue
        off, rho, r, *_ = _best_lag(master, delivered, p, W, c, R)
        if best is None or rho > best[1]:
            best = (off, rho, r, c)
    if best is None:
        raise first_error
    offset, _, r, c0 = best
    p, W = _window(scan_result, master, delivered, offset, 0, REFINE_FRAMES)
    gain, rho, fitted = _gain(master.read(p, W).astype(np.float64),
                              delivered.read(p + offset, W), bits, delivered.path)
    if abs(rho) < MIN_CORRELATION:
        raise InputError(f"the delivery {delivered.path!r} does not follow the master "
                         f"{master.path!r} (correlation {abs(rho):.2f} at the best "
                         "offset); check that the files are a master and its delivery")
    start, overlap = _overlap(offset, master.frames, delivered.frames)
    peak = float(np.max(np.abs(r))) or 1.0
    return Alignment(offset_frames=int(offset), gain=float(gain), start_frame=int(start),
                     overlap_frames=int(overlap), correlation=float(rho), window_start=int(p),
                     window_frames=int(W), fit_samples=int(fitted),
                     fine_lags=np.arange(c0 - R, c0 + R + 1), fine_correlation=r / peak)


def _gain(m, codes, bits, path):
    """Least-squares gain of the delivery on the master, clipped samples left out.

    Returns (gain, normalized correlation, samples fitted).
    """
    kmin, kmax = rails(bits)
    k = (codes >> (32 - bits)).astype(np.float64).reshape(-1)
    scale = float(1 << (bits - 1))
    dv = k / scale
    m = m.reshape(-1)
    keep = (k > kmin) & (k < kmax)
    g0, _ = _fit_gain(m, dv, keep)
    if g0 is None:
        raise InputError(f"the delivery {path!r} is silent or clipped throughout the stretch "
                         "used for alignment; audit needs programme in both files")
    margin = min(8.0 / scale, 0.1)
    x0 = g0 * m
    keep &= (x0 > kmin / scale + margin) & (x0 < kmax / scale - margin)
    gain, rho = _fit_gain(m, dv, keep)
    if gain is None:
        raise InputError(f"the delivery {path!r} is clipped throughout the stretch used for "
                         "alignment; audit needs programme below full scale")
    return gain, rho, int(np.count_nonzero(keep))
