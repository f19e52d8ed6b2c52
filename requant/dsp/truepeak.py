"""True-peak meter after ITU-R BS.1770-4, Annex 2 (4x oversampling).

The meter interpolates the signal to four times its sample rate with the
order-48 FIR filter published in the standard, split into four phases of 12
taps, and reports the largest absolute value of the interpolated signal.

Streaming: :class:`TruePeakMeter` keeps the last 11 input samples of each
channel between calls, so feeding a signal block by block gives the same
reading, bit for bit, as feeding it whole.

End of the signal
-----------------
BS.1770-4 does not say what happens to the filter's final 11 samples of
memory when the signal ends. This module treats every signal as surrounded by
digital silence on both sides: the meter starts with zero history (as the
standard's filter does), and :meth:`TruePeakMeter.finish` flushes 11 zero
samples through the filter, so that the last samples are interpolated as
completely as the first. Whole-array functions do the same unless given
``flush=False``. A signal that starts or stops abruptly therefore shows the
filter's step transient (up to +0.95 dB above a DC level, see Notes), as a
converter would when playback starts from or returns to silence.

Notes
-----
Phase ``k`` (k = 0..3) gives the interpolated sample at time ``n + k/4``
(less the filter's fixed delay of 23.5 oversampled samples)::

    y[4 n + k] = sum_{j=0}^{11} phase_k[j] * x[n - j]

which is the polyphase form of filtering the zero-stuffed signal with the
48-tap filter ``h[4 j + k] = phase_k[j]``. Phase 2 is phase 1 reversed and
phase 3 is phase 0 reversed, so ``h`` is symmetric (linear phase).

DC gain: the gain of phase ``k`` at 0 Hz is the sum of its taps. From the
published coefficients these are 1.0015869140625 (phases 0 and 3, +0.0138 dB)
and 0.9730224609375 (phases 1 and 2, -0.2376 dB). A steady DC level ``a``
therefore reads ``1.0015869140625 * a`` (+0.014 dB). A DC step from silence
overshoots: the largest partial sum of a phase is 1.1158447265625 (+0.95 dB).

A sine at fs/4 sampled at 45 degrees (samples +-0.7071, sample peak -3.01 dBFS)
reads +0.045 dBTP in steady state: the filter's ripple at fs/4. At other
sampling phases of the same sine the steady reading ranges from -0.20 dBTP
(0 degrees: the crest falls 1/8 sample from the nearest interpolated point)
to +0.06 dBTP (22.5 degrees) [computed with this module]: a 4x meter can
miss a crest that falls between its interpolated points.

The standard's 12.04 dB attenuation before interpolation exists for
fixed-point headroom and is not needed in float64; it is not applied. The same
filter is applied at every sample rate (BS.1770-4 notes that less
oversampling suffices above 48 kHz; more never hurts).

References
----------
ITU-R BS.1770-4 (2015), "Algorithms to measure audio programme loudness and
true-peak audio level", Annex 2.
"""

from __future__ import annotations

import functools

import numpy as np

from requant.dsp import native
from requant.dsp.peakkernel import DUAL_SIGNATURE, build_dual, build_peak, fold_phases
from requant.errors import InputError, UsageError

__all__ = [
    "OVERSAMPLING",
    "HISTORY_FRAMES",
    "PHASES",
    "PHASE_GAIN",
    "DUAL_SIGNATURE",
    "DualTruePeakMeter",
    "SkippingTruePeakMeter",
    "dual_peak_kernel_py",
    "peak_kernel_py",
    "TruePeakMeter",
    "oversample",
    "true_peak",
    "true_peak_dbtp",
]

#: Oversampling factor of the BS.1770-4 Annex 2 meter.
OVERSAMPLING = 4

#: Samples of history kept per channel (taps per phase minus one).
HISTORY_FRAMES = 11

_PHASE0 = (
    0.0017089843750, 0.0109863281250, -0.0196533203125, 0.0332031250000,
    -0.0594482421875, 0.1373291015625, 0.9721679687500, -0.1022949218750,
    0.0476074218750, -0.0266113281250, 0.0148925781250, -0.0083007812500,
)
_PHASE1 = (
    -0.0291748046875, 0.0292968750000, -0.0517578125000, 0.0891113281250,
    -0.1665039062500, 0.4650878906250, 0.7797851562500, -0.2003173828125,
    0.1015625000000, -0.0582275390625, 0.0330810546875, -0.0189208984375,
)

#: The four 12-tap phases, shape (4, 12), from ITU-R BS.1770-4 Annex 2.
#: Phase 2 is phase 1 reversed; phase 3 is phase 0 reversed.
PHASES = np.array([_PHASE0, _PHASE1, _PHASE1[::-1], _PHASE0[::-1]], dtype=np.float64)
PHASES.setflags(write=False)

# Frames handled per kernel call; bounds temporary memory for huge arrays.
_CHUNK_FRAMES = 65536


def _peak_kernel_py(xs, phases, peak):
    """Update ``peak`` with the largest |interpolated sample| of ``xs``.

    Plain-Python twin of the compiled kernel (the tests compare the two).

    Parameters
    ----------
    xs : ndarray, float64, shape (channels, 11 + frames), C-contiguous
        Per channel: 11 samples of history, then the new samples.
    phases : ndarray, float64, shape (4, 12)
    peak : ndarray, float64, shape (channels,)
        Running peaks; updated in place.
    """
    n_ch, m = xs.shape
    for c in range(n_ch):
        row = xs[c]
        p0 = 0.0
        p1 = 0.0
        p2 = 0.0
        p3 = 0.0
        for n in range(11, m):
            a0 = 0.0
            a1 = 0.0
            a2 = 0.0
            a3 = 0.0
            for j in range(12):
                v = row[n - j]
                a0 += phases[0, j] * v
                a1 += phases[1, j] * v
                a2 += phases[2, j] * v
                a3 += phases[3, j] * v
            p0 = max(p0, abs(a0))
            p1 = max(p1, abs(a1))
            p2 = max(p2, abs(a2))
            p3 = max(p3, abs(a3))
        peak[c] = max(peak[c], max(max(p0, p1), max(p2, p3)))


_compiled_kernel = None


def _kernel():
    """Return the numba-compiled kernel, compiling it on first use."""
    global _compiled_kernel
    if _compiled_kernel is None:
        import numba

        _compiled_kernel = numba.njit(cache=True, nogil=True)(_peak_kernel_py)
    return _compiled_kernel


def _as_frames(x, name="x"):
    """Return ``x`` as float64 of shape (frames, channels) and whether it was 1-D."""
    arr = np.asarray(x)
    if arr.dtype.kind not in "fiu" or arr.dtype == np.bool_:
        raise TypeError(f"{name} must be a real numeric array; got dtype {arr.dtype!r}")
    if arr.ndim == 1:
        return arr.astype(np.float64, copy=False)[:, None], True
    if arr.ndim == 2:
        return arr.astype(np.float64, copy=False), False
    raise UsageError(
        f"{name} must have shape (frames,) or (frames, channels); got shape {arr.shape!r}"
    )


def _check_finite(x, name="block"):
    if not np.all(np.isfinite(x)):
        raise InputError(
            f"{name} holds NaN or infinite samples; replace them (e.g. with 0) before metering"
        )


class TruePeakMeter:
    """Streaming true-peak meter (ITU-R BS.1770-4 Annex 2).

    Parameters
    ----------
    channels : int, >= 1
        Number of channels of the blocks to be metered.

    Attributes
    ----------
    channels : int
    frames : int
        Frames processed so far (not counting the flush).
    finished : bool
        True after :meth:`finish`.

    Notes
    -----
    The meter starts with zero history. Blocks of any length (including 0
    and 1 frame) may be fed; the reading after a sequence of blocks equals,
    bit for bit, the reading after the same samples fed at once. Call
    :meth:`finish` at the end of the signal to flush the filter with zeros
    (see the module notes); :func:`true_peak` does so by default.

    Examples
    --------
    >>> import numpy as np
    >>> n = np.arange(48000)
    >>> x = np.sin(np.pi / 2 * n + np.pi / 4)   # fs/4 at 45 degrees
    >>> fade = np.sin(np.linspace(0.0, np.pi / 2, 1024)) ** 2   # smooth start and end
    >>> x[:1024] *= fade; x[-1024:] *= fade[::-1]
    >>> meter = TruePeakMeter(1)
    >>> meter.process(x[:, None]); meter.finish()
    >>> round(float(meter.true_peak_dbtp[0]), 3)
    0.045
    """

    def __init__(self, channels):
        if isinstance(channels, bool) or not isinstance(channels, (int, np.integer)):
            raise TypeError(f"channels must be an int; got {channels!r}")
        if channels < 1:
            raise UsageError(f"channels={channels!r} must be at least 1")
        self.channels = int(channels)
        self.reset()

    def reset(self):
        """Forget all history and readings, as if newly created."""
        self._history = np.zeros((self.channels, HISTORY_FRAMES), dtype=np.float64)
        self._peak = np.zeros(self.channels, dtype=np.float64)
        self.frames = 0
        self.finished = False

    def _run(self, block):
        # block: float64 (frames, channels)
        kernel = _kernel()
        for start in range(0, block.shape[0], _CHUNK_FRAMES):
            part = block[start:start + _CHUNK_FRAMES]
            xs = np.empty((self.channels, HISTORY_FRAMES + part.shape[0]), dtype=np.float64)
            xs[:, :HISTORY_FRAMES] = self._history
            xs[:, HISTORY_FRAMES:] = part.T
            kernel(xs, PHASES, self._peak)
            self._history = np.ascontiguousarray(xs[:, -HISTORY_FRAMES:])

    def process(self, block):
        """Meter one block.

        Parameters
        ----------
        block : array_like, float, shape (frames, channels), full scale = 1.0
            A 1-D array is accepted when ``channels == 1``.

        Raises
        ------
        UsageError (a ValueError)
            If the shape does not match or the meter has already been finished.
        InputError (a ValueError)
            If the block holds NaN or infinity.
        TypeError
            If the block is not numeric.
        """
        if self.finished:
            raise UsageError(
                "this meter has been finished; call reset() or create a new TruePeakMeter"
            )
        arr, _ = _as_frames(block, "block")
        if arr.shape[1] != self.channels:
            raise UsageError(
                f"block has shape {np.shape(block)!r}; expected (frames, {self.channels})"
            )
        if arr.shape[0] == 0:
            return
        _check_finite(arr)
        self._run(arr)
        self.frames += arr.shape[0]

    def finish(self):
        """Flush the filter with 11 zero samples per channel (idempotent).

        After this, :attr:`true_peak` includes the interpolated samples
        between the last input samples and the silence that follows them.
        """
        if self.finished:
            return
        self._run(np.zeros((HISTORY_FRAMES, self.channels), dtype=np.float64))
        self.finished = True

    @property
    def true_peak(self):
        """ndarray, float64, shape (channels,), linear: largest |interpolated sample|."""
        return self._peak.copy()

    @property
    def true_peak_dbtp(self):
        """ndarray, float64, shape (channels,), dBTP: 20 log10(true_peak); -inf for silence."""
        with np.errstate(divide="ignore"):
            return 20.0 * np.log10(self._peak)


def oversample(x, *, flush=True):
    """Interpolate ``x`` to 4x its rate with the BS.1770-4 Annex 2 filter.

    Vectorised numpy version of the meter's arithmetic (same operations in
    the same order), for plots and checks.

    Parameters
    ----------
    x : array_like, float, shape (frames,) or (frames, channels)
    flush : bool, default True
        Append 11 zero samples so the end is interpolated completely.

    Returns
    -------
    y : ndarray, float64, shape (4 * (frames + 11),) or (4 * frames,) [, channels]
        ``y[4 n + k]`` is phase ``k`` at input sample ``n``; the filter delay
        is 23.5 output samples. History before the signal is zero.
    """
    arr, was_1d = _as_frames(x)
    n_in, n_ch = arr.shape
    pad = HISTORY_FRAMES if flush else 0
    xs = np.zeros((HISTORY_FRAMES + n_in + pad, n_ch), dtype=np.float64)
    xs[HISTORY_FRAMES:HISTORY_FRAMES + n_in] = arr
    n_out = n_in + pad
    y = np.empty((n_out, OVERSAMPLING, n_ch), dtype=np.float64)
    for k in range(OVERSAMPLING):
        acc = PHASES[k, 0] * xs[HISTORY_FRAMES:HISTORY_FRAMES + n_out]
        for j in range(1, 12):
            acc = acc + PHASES[k, j] * xs[HISTORY_FRAMES - j:HISTORY_FRAMES - j + n_out]
        y[:, k, :] = acc
    y = y.reshape(n_out * OVERSAMPLING, n_ch)
    return y[:, 0] if was_1d else y


def true_peak(x, *, flush=True):
    """True peak of a whole signal, linear.

    Parameters
    ----------
    x : array_like, float, shape (frames,) or (frames, channels), full scale = 1.0
    flush : bool, default True
        Flush the filter with zeros at the end (see the module notes).

    Returns
    -------
    peak : float or ndarray, float64, shape (channels,)
        A float for 1-D input.

    Raises
    ------
    InputError (a ValueError)
        If ``x`` holds NaN or infinity.
    UsageError (a ValueError)
        If ``x`` has more than 2 dimensions.
    """
    arr, was_1d = _as_frames(x)
    meter = TruePeakMeter(arr.shape[1])
    meter.process(arr)
    if flush:
        meter.finish()
    peak = meter.true_peak
    return float(peak[0]) if was_1d else peak


def true_peak_dbtp(x, *, flush=True):
    """True peak of a whole signal in dBTP (20 log10 of :func:`true_peak`).

    Parameters
    ----------
    x : array_like, float, shape (frames,) or (frames, channels), full scale = 1.0
    flush : bool, default True
        Flush the filter with zeros at the end (see the module notes).

    Returns
    -------
    level : float or ndarray, float64, shape (channels,), dBTP
        ``-inf`` for digital silence.
    """
    peak = np.asarray(true_peak(x, flush=flush), dtype=np.float64)
    with np.errstate(divide="ignore"):
        level = 20.0 * np.log10(peak)
    return float(level) if level.ndim == 0 else level


# --- Input and output together, skipping what provably cannot set a new peak ----------------

#: Largest sum of |coefficients| over the four phases: no interpolated sample
#: can exceed this times the largest |sample| among the 12 it is made from.
PHASE_GAIN = float(np.max(np.sum(np.abs(PHASES), axis=1)))

#: Frames per sub-block of the skipping kernels' test (:mod:`requant.dsp.peakkernel`).
SUB_FRAMES = 64
#: Most frames the skipping kernels screen in one pass (a run of sub-blocks).
RUN_FRAMES = 1024

# The skip test compares gain * max|x| with the running peak; the gain is raised by a
# relative 2**-32 so that a product rounded down can never skip a sample summed up to it.
_SKIP_GAIN = PHASE_GAIN * (1.0 + 2.0**-32)

#: Plain-Python twin of the compiled dual kernel (the tests compare the two).
dual_peak_kernel_py = build_dual()
#: Plain-Python twin of the compiled single kernel.
peak_kernel_py = build_peak()

_PHASES_FLAT = np.ascontiguousarray(PHASES.reshape(-1))
#: The float32 screen's coefficients (:func:`requant.dsp.peakkernel.fold_phases`).
_PHASES32 = fold_phases(PHASES)


@functools.cache
def _dual_kernel(x_dtype, e_dtype):
    """The compiled dual kernel for these storage dtypes, arguments as declared in
    :data:`DUAL_SIGNATURE` and checked on every call (see :mod:`requant.dsp.native`)."""
    return native.kernel("truepeak-dual", xs=x_dtype, es=e_dtype)


@functools.cache
def _single_kernel(x_dtype):
    """The compiled single kernel for a block dtype (float32, float64 or int32)."""
    return native.kernel("truepeak", xs=x_dtype)


def _float_block(a):
    """A C-contiguous float32 or float64 block (other dtypes become float64)."""
    a = np.asarray(a)
    if a.dtype not in (np.float32, np.float64):
        return np.ascontiguousarray(a, dtype=np.float64)
    return np.ascontiguousarray(a)


def _next_history(hist, block):
    """The last :data:`HISTORY_FRAMES` frames of ``hist`` followed by ``block``, float64."""
    n = block.shape[0]
    if n >= HISTORY_FRAMES:
        return block[-HISTORY_FRAMES:].astype(np.float64)
    return np.concatenate((hist[n:], block.astype(np.float64)))


class SkippingTruePeakMeter:
    """Streaming true peak of one signal, skipping what provably cannot set a new peak.

    The same reading as :class:`TruePeakMeter` (zero history, a zero flush at
    :meth:`finish`), bit for bit, at a fraction of the cost: the compiled
    kernel of :mod:`requant.dsp.peakkernel` bounds each sub-block by its
    largest sample, screens the rest in float32 and reads in float64 only
    where a new peak is possible.

    Parameters
    ----------
    channels : int, >= 1

    Notes
    -----
    Blocks are (frames, channels) arrays of float32, float64 or int32; int32
    blocks are left-justified integer codes (full scale ``2**31``), metered in
    code units and scaled exactly. Every block of one meter must have the same
    dtype. Samples must be finite (the caller replaces NaN and infinity).
    """

    def __init__(self, channels):
        self.channels = int(channels)
        self._hx = np.zeros((HISTORY_FRAMES, self.channels))
        self._peak = np.zeros(self.channels)
        self._scale = None
        self._v = np.zeros(RUN_FRAMES + SUB_FRAMES + HISTORY_FRAMES)
        self._acc = np.zeros(RUN_FRAMES + SUB_FRAMES)
        self._v32 = np.zeros(RUN_FRAMES + SUB_FRAMES + HISTORY_FRAMES, dtype=np.float32)
        self._acc32 = np.zeros(RUN_FRAMES + SUB_FRAMES, dtype=np.float32)
        self.finished = False

    def process(self, x, *, kernel=None):
        """Meter the next block, (frames, channels) float32, float64 or int32."""
        n = x.shape[0]
        if n == 0:
            return
        x, scale = native.kernel_input(x)
        if self._scale is None:
            self._scale = scale
        elif scale != self._scale:
            raise ValueError("a SkippingTruePeakMeter takes integer codes or float samples, "
                             "not both")
        run = _single_kernel(x.dtype) if kernel is None else kernel
        nsb = -(-n // SUB_FRAMES)
        bx = np.empty(nsb * self.channels)
        ub, pk = np.empty((2, nsb))
        run(self._hx.reshape(-1), x.reshape(-1), HISTORY_FRAMES + n, self.channels,
            _PHASES_FLAT, _PHASES32, _SKIP_GAIN, SUB_FRAMES, RUN_FRAMES, self._peak, bx, ub, pk,
            self._v, self._acc, self._v32, self._acc32)
        self._hx = _next_history(self._hx, x)

    def finish(self):
        """Flush the filter with 11 zeros (idempotent)."""
        if not self.finished:
            dtype = np.int32 if self._scale == 2.0**-31 else np.float64
            self.process(np.zeros((HISTORY_FRAMES, self.channels), dtype=dtype))
            self.finished = True

    @property
    def true_peak(self):
        """ndarray, float64, (channels,), linear: largest |interpolated sample|."""
        return self._peak * (self._scale or 1.0)

    @property
    def true_peak_dbtp(self):
        """ndarray, float64, (channels,), dBTP; -inf for silence."""
        with np.errstate(divide="ignore"):
            return 20.0 * np.log10(self.true_peak)


class DualTruePeakMeter:
    """True peak of an input and of input + error, block by block.

    The same figures as two :class:`TruePeakMeter` (history, and a zero
    flush at :meth:`finish`), at about half the cost: parts of the signal
    that provably cannot raise a peak are skipped (see :func:`build_dual`).

    After each :meth:`process`, :attr:`block_bounds` holds what the kernel's
    first step found on the way, per channel: the block's largest input
    magnitude and a bound on its largest output magnitude (the largest
    ``|x| + |e|`` of a sub-block), each over the block and the 11 frames
    before it; the report's sample peaks come from them at no extra pass.
    """

    def __init__(self, channels):
        self.channels = int(channels)
        # history keeps the blocks' own dtype (float32 input stays float32: exact)
        # the last 11 frames, float64 (exact for float32 blocks too)
        self._hx = np.zeros((HISTORY_FRAMES, self.channels))
        self._he = np.zeros((HISTORY_FRAMES, self.channels))
        self.peak_in = np.zeros(self.channels)
        self.peak_out = np.zeros(self.channels)
        self._v = np.zeros(RUN_FRAMES + SUB_FRAMES + HISTORY_FRAMES)  # kernel working space
        self._acc = np.zeros(RUN_FRAMES + SUB_FRAMES)
        self._v32 = np.zeros(RUN_FRAMES + SUB_FRAMES + HISTORY_FRAMES, dtype=np.float32)
        self._acc32 = np.zeros(RUN_FRAMES + SUB_FRAMES, dtype=np.float32)
        self.finished = False
        self.block_bounds = None

    def process(self, x, e, *, kernel=None):
        """Meter the next block of input ``x`` and error ``e``, (frames, channels)."""
        n = x.shape[0]
        self.block_bounds = None
        if n == 0:
            return
        x = _float_block(x)
        e = _float_block(e)
        run = _dual_kernel(x.dtype, e.dtype) if kernel is None else kernel
        nsb = -(-n // SUB_FRAMES)
        bx, be = np.empty((2, nsb * self.channels))
        ub, pk = np.empty((2, nsb))
        run(self._hx.reshape(-1), self._he.reshape(-1), x.reshape(-1), e.reshape(-1),
            HISTORY_FRAMES + n, self.channels, _PHASES_FLAT, _SKIP_GAIN, SUB_FRAMES, RUN_FRAMES,
            self.peak_in, self.peak_out, self._v, self._acc, bx, be, ub, pk, _PHASES32,
            self._v32, self._acc32)
        ch = self.channels
        be += bx  # per channel a strided max: an axis-0 max of a (sub-blocks, 2) array is 4x slower
        self.block_bounds = ([float(bx[c::ch].max()) for c in range(ch)],
                             [float(be[c::ch].max()) for c in range(ch)])
        self._hx = _next_history(self._hx, x)
        self._he = _next_history(self._he, e)

    def finish(self):
        """Flush both filters with 11 zeros (idempotent)."""
        if not self.finished:
            z = np.zeros((HISTORY_FRAMES, self.channels))
            self.process(z, z)
            self.finished = True

    @staticmethod
    def _db(p):
        with np.errstate(divide="ignore"):
            return 20.0 * np.log10(p)

    @property
    def true_peak_dbtp(self):
        """(input, output) per-channel dBTP arrays."""
        return self._db(self.peak_in), self._db(self.peak_out)
