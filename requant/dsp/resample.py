"""Sample-rate conversion: an exact rational polyphase windowed-sinc resampler.

:func:`design` makes the filter for a pair of rates (one frozen
:class:`RateFilter`, cached per pair); :class:`Resampler` streams audio
through it block by block, with its state carried across blocks; the hot loop
is the compiled kernel of :mod:`requant.dsp.ratekernel`.

The design
----------
The ratio is exact: ``rate_out / rate_in = L / M`` in lowest terms
(``math.gcd``). Conceptually the input is raised to the intermediate rate
``L * rate_in`` by inserting ``L - 1`` zeros between samples, low-pass
filtered, and every ``M``-th sample is kept; the polyphase form computes only
the samples kept, each from ``K`` input samples and one of ``L`` phases of the
filter.

The lowpass is a linear-phase windowed sinc (:func:`scipy.signal.firwin`)
with a Kaiser window sized by :func:`scipy.signal.kaiserord` (Kaiser 1974;
Oppenheim & Schafer, *Discrete-Time Signal Processing*, the Kaiser window
method), of odd length so that its delay is a whole number of intermediate
samples. With ``low`` the lower of the two rates:

* passband edge ``fp = min(20 kHz, 0.4535 * low)``, flat within
  ±0.0001 dB (:data:`RIPPLE_DB`);
* stopband edge ``fs = low - fp``, at least 140 dB down (:data:`REJECTION_DB`)
  from there to half the intermediate rate;
* cutoff (the -6 dB point) at ``low / 2``: the transition band is centred on
  the lower Nyquist frequency.

Why the transition may cross the lower Nyquist frequency: what lies between
``low / 2`` and ``fs`` (only partly rejected) folds (when the rate falls) or is
imaged (when it rises) to between ``fp`` and ``low / 2``, above the passband,
and everything that would land in ``0..fp`` comes from ``fs`` or above, where
the filter rejects at least 140 dB. A transition ending at ``low / 2`` would
need a filter twice as long (a transition half as wide) for nothing that lands
below ``fp``. The price: between ``fp`` and ``low / 2`` the output may hold
partly rejected folded content (at 44.1 kHz from 19.999 to 22.05 kHz), and
content of the input there is attenuated, not kept.

Kaiser's formula for the window's length is empirical and the first
stopband lobe of a window design can exceed the asked-for attenuation by a
few dB, so the design is measured: the attenuation asked of ``kaiserord``
starts at 140 dB and is raised until the measured rejection (the designed
filter's own response, evaluated densely: :func:`measure`) reaches 140 dB.
At 140 dB the passband ripple (about 10^(-A/20), under 2e-6 dB) is far inside
its ±0.0001 dB.

Alignment
---------
Output frame ``k`` is the band-limited input evaluated at time
``k / rate_out`` (input frame ``n`` at ``n / rate_in``): the filter's delay is
compensated, frame 0 of the output is at the time of frame 0 of the input.
Before the first and after the last input frame the input is taken as zeros.
``n`` input frames give exactly :meth:`Resampler.frames_out` output frames,
``round(n * rate_out / rate_in)`` with halves rounded up.

Rates from 8 kHz to 384 kHz (whole hertz) are taken. A pair whose exact ratio
would need more than :data:`MAX_TAPS` taps (rates with no large common
divisor, such as 44101 and 48000 Hz) is refused: whole multiples of 100 Hz,
and the usual 11025-Hz family, always fit.
"""

import math
import os
import threading
from dataclasses import dataclass
from functools import lru_cache
from numbers import Integral, Real

import numpy as np

from requant.errors import UsageError

__all__ = ["RATE_MIN", "RATE_MAX", "PASSBAND_HZ", "PASSBAND_FRACTION", "RIPPLE_DB",
           "REJECTION_DB", "MAX_TAPS", "RateFilter", "design", "measure", "Resampler"]

#: The rates taken, in Hz (inclusive).
RATE_MIN, RATE_MAX = 8000, 384000
#: The passband edge: 20 kHz, or this fraction of the lower rate when that is lower.
PASSBAND_HZ = 20000.0
PASSBAND_FRACTION = 0.4535
#: The passband's tolerance (± dB) and the stopband's least rejection (dB).
RIPPLE_DB = 0.0001
REJECTION_DB = 140.0
#: The longest prototype filter designed (taps at the intermediate rate; 8 MB of table).
MAX_TAPS = 2**20

_LANES = 8  # requant.dsp.ratekernel.LANES (not imported: that module loads the kernel tools)
_RANGE_HINT = f"give a rate from {RATE_MIN} to {RATE_MAX} Hz"


@dataclass(frozen=True, eq=False)
class RateFilter:
    """The polyphase lowpass for one pair of rates, with its measured figures.

    Attributes
    ----------
    rate_in, rate_out : int, Hz
    up, down : int
        ``L`` and ``M``: ``rate_out / rate_in = up / down`` in lowest terms.
    taps_per_phase : int
        ``K``, taps per output sample and channel (a multiple of 8, zero-padded).
    total_taps : int
        Length of the prototype lowpass at the intermediate rate (odd).
    table : ndarray, float64, (up, taps_per_phase), read-only
        Phase ``p`` is ``up * prototype[p::up]`` (zero-padded to
        ``taps_per_phase``) in reverse order, ready for the kernel.
    prototype : ndarray, float64, (total_taps,), read-only
        The lowpass designed by :func:`scipy.signal.firwin` (unity gain at 0 Hz).
    delay : int
        The prototype's delay in samples of the intermediate rate,
        ``(total_taps - 1) / 2``; compensated by :class:`Resampler`.
    passband_edge_hz, stopband_edge_hz : float, Hz
    beta : float
        The Kaiser window's beta (Kaiser 1974: ``0.1102 (A - 8.7)`` for A > 50 dB).
    attenuation_db : float, dB
        ``A``, the attenuation asked of :func:`scipy.signal.kaiserord`.
    passband_ripple_db : float, dB
        Measured: the largest ``|20 log10 |H(f)||`` from 0 to the passband edge.
    stopband_rejection_db : float, dB
        Measured: the smallest ``-20 log10 |H(f)|`` from the stopband edge to half
        the intermediate rate.
    """

    rate_in: int
    rate_out: int
    up: int
    down: int
    taps_per_phase: int
    total_taps: int
    table: np.ndarray
    prototype: np.ndarray
    delay: int
    passband_edge_hz: float
    stopband_edge_hz: float
    beta: float
    attenuation_db: float
    passband_ripple_db: float
    stopband_rejection_db: float

    @property
    def intermediate_rate(self):
        """``up * rate_in`` (= ``down * rate_out``), Hz: the rate the prototype runs at."""
        return self.up * self.rate_in

    @property
    def delay_seconds(self):
        """The prototype's delay in seconds (compensated: the output is time-aligned)."""
        return self.delay / self.intermediate_rate

    @property
    def lookahead_frames(self):
        """Input frames past frame ``n`` that the output at its time depends on."""
        return self.delay / self.up

    def response(self, lo, hi, points):
        """The prototype's magnitude response on a grid (the chirp z-transform).

        Parameters
        ----------
        lo, hi : float, Hz, ``0 <= lo < hi <= intermediate_rate / 2``
        points : int, >= 2

        Returns
        -------
        freqs : ndarray, Hz, ``points`` from ``lo`` to ``hi`` inclusive
        magnitude : ndarray, ``|H(f)|`` (1 at 0 Hz)
        """
        from scipy.signal import zoom_fft

        if not 0 <= lo < hi <= self.intermediate_rate / 2 or points < 2:
            raise ValueError(f"lo={lo!r}, hi={hi!r} must lie in 0..{self.intermediate_rate / 2} "
                             f"with lo < hi, and points={points!r} >= 2")
        freqs = np.linspace(lo, hi, int(points))
        mag = np.abs(zoom_fft(self.prototype, [lo, hi], m=int(points),
                              fs=self.intermediate_rate, endpoint=True))
        return freqs, mag

    def to_dict(self):
        """The design's parameters and measured figures (no arrays), for reports and JSON."""
        return {
            "rate_in": self.rate_in, "rate_out": self.rate_out,
            "up": self.up, "down": self.down, "intermediate_rate": self.intermediate_rate,
            "method": "polyphase windowed sinc, Kaiser window (scipy.signal.firwin, kaiserord)",
            "taps_per_phase": self.taps_per_phase, "total_taps": self.total_taps,
            "delay_samples": self.delay, "delay_seconds": self.delay_seconds,
            "lookahead_frames": self.lookahead_frames,
            "passband_edge_hz": self.passband_edge_hz,
            "stopband_edge_hz": self.stopband_edge_hz,
            "kaiser_beta": self.beta, "attenuation_db": self.attenuation_db,
            "passband_ripple_db": self.passband_ripple_db,
            "stopband_rejection_db": self.stopband_rejection_db,
            "goal_ripple_db": RIPPLE_DB, "goal_rejection_db": REJECTION_DB,
            "time_aligned": True,
        }

    def describe(self):
        """The design in a few lines of text (what ``requant rate show`` prints)."""
        fi = self.intermediate_rate
        return "\n".join([
            f"rate conversion {self.rate_in} Hz -> {self.rate_out} Hz: exact ratio "
            f"{self.up}/{self.down}",
            f"  filter: linear-phase windowed sinc, Kaiser window (beta {self.beta:.3f}, "
            f"designed for {self.attenuation_db:.2f} dB)",
            f"  length: {self.total_taps:,} taps at {fi / 1e6:g} MHz, {self.taps_per_phase} "
            f"per output sample and channel, {self.up} phases",
            f"  passband: 0 to {self.passband_edge_hz:.2f} Hz, ripple "
            f"±{self.passband_ripple_db:.2e} dB (goal ±{RIPPLE_DB:g} dB)",
            f"  stopband: from {self.stopband_edge_hz:.2f} Hz, rejection "
            f"{self.stopband_rejection_db:.2f} dB (goal {REJECTION_DB:g} dB)",
            f"  delay: {self.delay:,} samples at {fi / 1e6:g} MHz = "
            f"{1e3 * self.delay_seconds:.4f} ms = {self.lookahead_frames:.2f} input frames, "
            f"compensated (the output is time-aligned)",
        ])


def _check_rate(rate, which):
    if isinstance(rate, bool) or not isinstance(rate, Real):
        raise UsageError(f"the {which} rate {rate!r} is not a number of hertz; {_RANGE_HINT}")
    if not isinstance(rate, Integral):
        if not math.isfinite(rate) or rate != int(rate):
            raise UsageError(f"the {which} rate {rate!r} Hz is not a whole number of hertz; "
                             f"{_RANGE_HINT}")
    r = int(rate)
    if not RATE_MIN <= r <= RATE_MAX:
        raise UsageError(f"the {which} rate {rate!r} Hz is outside what the resampler "
                         f"takes; {_RANGE_HINT}")
    return r


def _bands(rate_in, rate_out):
    low = min(rate_in, rate_out)
    fp = min(PASSBAND_HZ, PASSBAND_FRACTION * low)
    return fp, low - fp


def measure(h, fs, passband_edge, stopband_edge):
    """Measure a lowpass: its passband ripple and stopband rejection.

    Parameters
    ----------
    h : ndarray, float64
        The filter's taps.
    fs : float, Hz
        The rate it runs at.
    passband_edge, stopband_edge : float, Hz

    Returns
    -------
    ripple_db : float
        The largest ``|20 log10 |H(f)||`` over ``0..passband_edge``.
    rejection_db : float
        The smallest ``-20 log10 |H(f)|`` over ``stopband_edge..fs/2``.

    Notes
    -----
    The response is evaluated with :func:`scipy.signal.zoom_fft` (the chirp
    z-transform: the DTFT on any dense grid) at 32 points per lobe (a lobe
    is ``fs / len(h)`` wide) over the passband and the first 64 lobes of the
    stopband, edges included, where the largest stopband lobe lies; the whole
    stopband is also evaluated by one zero-padded FFT at 8 or more points per
    lobe (its largest point then lies within 0.2 dB of the lobe's peak).
    """
    from scipy.signal import zoom_fft

    h = np.asarray(h, dtype=np.float64)
    n = h.size
    lobe = fs / n
    m = int(32 * passband_edge / lobe) + 64
    hp = np.abs(zoom_fft(h, [0.0, passband_edge], m=m, fs=fs, endpoint=True))
    ripple = float(np.max(np.abs(20.0 * np.log10(hp))))
    top = min(fs / 2, stopband_edge + 64 * lobe)
    worst = np.max(np.abs(zoom_fft(h, [stopband_edge, top], m=2048 + 1, fs=fs,
                                   endpoint=True)))
    nfft = 1 << max(12, math.ceil(math.log2(8 * n)))
    spec = np.abs(np.fft.rfft(h, nfft))
    first = math.ceil(stopband_edge / fs * nfft)
    worst = max(float(worst), float(np.max(spec[first:])))
    return ripple, float(-20.0 * np.log10(worst))


def design(rate_in, rate_out):
    """The polyphase lowpass that converts ``rate_in`` to ``rate_out`` (cached per pair).

    Parameters
    ----------
    rate_in, rate_out : int, Hz, 8000..384000, different

    Returns
    -------
    RateFilter

    Raises
    ------
    UsageError
        A rate outside 8000..384000 Hz or not a whole number of hertz; equal
        rates (there is nothing to convert); a pair whose exact ratio needs
        more than :data:`MAX_TAPS` taps.

    Examples
    --------
    >>> rf = design(96000, 44100)
    >>> rf.up, rf.down, rf.stopband_rejection_db >= 140.0
    (147, 320, True)
    """
    a = _check_rate(rate_in, "input")
    b = _check_rate(rate_out, "output")
    if a == b:
        raise UsageError(f"the input and output rates are both {a} Hz, so there is nothing "
                         "to convert; give two different rates")
    return _design(a, b)


@lru_cache(maxsize=16)
def _design(rate_in, rate_out):
    from scipy.signal import firwin, kaiserord

    g = math.gcd(rate_in, rate_out)
    up, down = rate_out // g, rate_in // g
    fi = up * rate_in
    fp, fst = _bands(rate_in, rate_out)
    width = (fst - fp) / (fi / 2)
    atten = REJECTION_DB
    for _ in range(12):
        n, beta = kaiserord(atten, width)
        n += 1 - n % 2  # odd: the delay is a whole number of intermediate samples
        if n > MAX_TAPS:
            raise UsageError(
                f"the rates {rate_in} and {rate_out} Hz have the exact ratio {up}/{down}, "
                f"which needs a {n:,}-tap filter (the limit is {MAX_TAPS:,}); give rates "
                "whose ratio reduces further, such as whole multiples of 100 Hz")
        h = firwin(n, (fp + fst) / 2, window=("kaiser", beta), fs=fi)
        ripple, rejection = measure(h, fi, fp, fst)
        if rejection >= REJECTION_DB and ripple <= RIPPLE_DB:
            break
        atten += max(0.25, REJECTION_DB - rejection + 0.1)
    else:  # pragma: no cover - the loop converges in two or three designs
        raise RuntimeError(f"no Kaiser design met the goals for {rate_in} -> {rate_out} Hz")
    k = -(-n // up)
    k += -k % _LANES
    padded = np.zeros(k * up)
    padded[:n] = h
    table = (up * padded.reshape(k, up).T)[:, ::-1].copy()
    h = h.copy()
    table.flags.writeable = False
    h.flags.writeable = False
    return RateFilter(rate_in, rate_out, up, down, k, n, table, h, (n - 1) // 2, fp, fst,
                      float(beta), float(atten), ripple, rejection)


# -- streaming -----------------------------------------------------------------------------------

_pool = None
_pool_lock = threading.Lock()
#: Below this many multiply-adds a block is computed on the calling thread alone.
_SPLIT_MACS = 1 << 18


def _executor():
    global _pool
    with _pool_lock:
        if _pool is None:
            from concurrent.futures import ThreadPoolExecutor

            _pool = ThreadPoolExecutor(max_workers=max(1, (os.cpu_count() or 2) - 1),
                                       thread_name_prefix="requant-rate")
        return _pool


def _forget_pool():  # a forked child has none of its parent's threads
    global _pool, _pool_lock
    _pool = None
    _pool_lock = threading.Lock()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_forget_pool)


class Resampler:
    """Convert a stream of frames from one sample rate to another, block by block.

    Parameters
    ----------
    rate_in, rate_out : int, Hz, 8000..384000
        Equal rates give the identity (each block comes back as float64,
        unchanged; no filter is designed).
    channels : int, >= 1
    threads : int, optional
        Threads sharing a large block's output frames (the calling thread and
        a shared pool); by default the machine's cores, at most 2. Every output
        frame is computed the same way wherever it is computed, so the result
        does not depend on it.

    Notes
    -----
    :meth:`process` returns the frames whose inputs have all arrived (the
    filter looks about ``taps_per_phase / 2`` input frames ahead);
    :meth:`finish` returns the rest. The output is the same, bit for bit,
    however the input is cut into blocks: each frame is one fixed-order sum
    (:mod:`requant.dsp.ratekernel`) over the same input samples, zeros before
    the start and after the end. Memory holds the input history of one filter
    length plus the block being processed.

    Examples
    --------
    >>> r = Resampler(96000, 44100, 2)
    >>> x = np.zeros((96000, 2), np.float32)
    >>> sum(len(y) for y in (r.process(x[:50000]), r.process(x[50000:]), r.finish()))
    44100
    """

    def __init__(self, rate_in, rate_out, channels, *, threads=None):
        a = _check_rate(rate_in, "input")
        b = _check_rate(rate_out, "output")
        if isinstance(channels, bool) or not isinstance(channels, Integral) or channels < 1:
            raise ValueError(f"channels={channels!r} must be a whole number >= 1")
        if threads is None:
            threads = min(2, os.cpu_count() or 1)
        if isinstance(threads, bool) or not isinstance(threads, Integral) or threads < 1:
            raise ValueError(f"threads={threads!r} must be a whole number >= 1")
        self.rate_in, self.rate_out, self.channels = a, b, int(channels)
        self.threads = int(threads)
        self.frames_in = 0  # input frames received
        self.frames_done = 0  # output frames returned
        self._finished = False
        self.filter = None if a == b else _design(a, b)
        if self.filter is None:
            return
        from requant.dsp.native import kernel

        self._kernel = kernel("resample")
        f = self.filter
        self._table = np.ascontiguousarray(f.table).reshape(-1)
        self._first = min(0, self._window_start(0))  # absolute index of the buffer's frame 0
        self._held = -self._first  # frames held in the buffer (zeros before the start)
        self._buf = np.zeros((self.channels, self._held + 4096))

    @staticmethod
    def frames_out(n_in, rate_in, rate_out):
        """Output frames for ``n_in`` input frames: ``round(n_in * rate_out / rate_in)``.

        Halves round up (``floor(x + 1/2)``), in exact integer arithmetic.
        """
        if isinstance(n_in, bool) or not isinstance(n_in, Integral) or n_in < 0:
            raise ValueError(f"n_in={n_in!r} must be a whole number >= 0")
        a = _check_rate(rate_in, "input")
        b = _check_rate(rate_out, "output")
        return (2 * int(n_in) * b + a) // (2 * a)

    def _window_start(self, k):
        """Absolute index of the first input frame output frame ``k`` reads."""
        f = self.filter
        return (k * f.down + f.delay) // f.up - f.taps_per_phase + 1

    def _check_block(self, x):
        if self._finished:
            raise ValueError("process() after finish(): make a new Resampler for a new stream")
        x = np.asarray(x)
        if x.ndim != 2 or x.shape[1] != self.channels:
            raise ValueError(f"a block must have shape (frames, {self.channels}), "
                             f"not {x.shape}")
        if x.dtype not in (np.float32, np.float64):
            raise TypeError(f"a block must be float32 or float64, not {x.dtype}")
        return x

    def process(self, x):
        """Take a block of input frames; return the output frames now complete.

        Parameters
        ----------
        x : ndarray, float32 or float64, (frames, channels)

        Returns
        -------
        ndarray, float64, (m, channels)
            ``m`` may be 0 (the first blocks fill the filter's look-ahead).
        """
        x = self._check_block(x)
        if self.filter is None:
            self.frames_in += len(x)
            self.frames_done += len(x)
            return np.array(x, dtype=np.float64, order="C")
        self._append(x)
        self.frames_in += len(x)
        f = self.filter
        ready = max(0, (f.up * self.frames_in - 1 - f.delay) // f.down + 1)
        end = min(ready, self.frames_out(self.frames_in, self.rate_in, self.rate_out))
        return self._run(max(end, self.frames_done))

    def finish(self):
        """End the stream; return the remaining output frames (float64, (m, channels))."""
        if self._finished:
            raise ValueError("finish() was already called: make a new Resampler for a new "
                             "stream")
        self._finished = True
        total = self.frames_out(self.frames_in, self.rate_in, self.rate_out)
        if self.filter is None or total <= self.frames_done:
            return np.zeros((0, self.channels))
        f = self.filter
        last = ((total - 1) * f.down + f.delay) // f.up  # newest input frame read
        need = last + 1 - (self._first + self._held)
        if need > 0:
            self._append(np.zeros((need, self.channels)))
        return self._run(total)

    def _append(self, x):
        """Add frames to the history, dropping what no future output reads."""
        n = len(x)
        keep_from = self._window_start(self.frames_done) - self._first
        if self._held + n > self._buf.shape[1]:
            kept = self._held - keep_from
            if kept + n > self._buf.shape[1]:
                buf = np.zeros((self.channels, kept + n + 4096))
                buf[:, :kept] = self._buf[:, keep_from:self._held]
                self._buf = buf
            else:
                self._buf[:, :kept] = self._buf[:, keep_from:self._held]
            self._first += keep_from
            self._held = kept
        self._buf[:, self._held:self._held + n] = x.T
        self._held += n

    def _run(self, end):
        """Compute output frames ``frames_done..end-1``."""
        f = self.filter
        k0 = self.frames_done
        n = end - k0
        out = np.empty((n, self.channels))
        if n == 0:
            return out
        t0 = k0 * f.down + f.delay - self._first * f.up
        flat = out.reshape(-1)
        args = (self._buf.reshape(-1), self._buf.shape[1], self.channels, self._table, f.up,
                f.taps_per_phase, f.down)
        parts = min(self.threads, max(1, n * f.taps_per_phase * self.channels // _SPLIT_MACS))
        if parts == 1:
            self._kernel(*args, t0, n, flat)
        else:
            cuts = [n * i // parts for i in range(parts + 1)]
            c = self.channels
            pool = _executor()
            futures = [pool.submit(self._kernel, *args, t0 + a * f.down, b - a, flat[a * c:b * c])
                       for a, b in zip(cuts[1:-1], cuts[2:], strict=True)]
            self._kernel(*args, t0, cuts[1], flat[:cuts[1] * c])
            for fut in futures:
                fut.result()
        self.frames_done = end
        return out
