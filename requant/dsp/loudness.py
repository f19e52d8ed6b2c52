"""Programme loudness per ITU-R BS.1770-4: K-weighting, gated blocks, integrated loudness.

:func:`integrated_loudness` measures an array in memory. The work is done
block-wise, so that a streaming meter can reuse the pieces: the signal is
K-weighted (:func:`k_weighting_sos`, one filter state carried from block to
block by ``scipy.signal.sosfilt``), its squares are summed per 100 ms step
(:func:`step_sums`), four consecutive steps make one 400 ms gating block
(75 % overlap, :func:`block_mean_squares`), and :func:`gated_loudness` applies
the two gates to the blocks' mean squares.

The standard tables the two K-weighting sections at 48 kHz only. Here each
section is turned back into its analog prototype (a second-order section in
``p = s/ω0``, by the bilinear transform pre-warped at the section's own
natural frequency ``f0``, which is read off its poles) and designed again
at the file's rate the same way. At 48 kHz that gives the tabled
coefficients back; at other rates the response keeps its shape around each
section's ``f0``.

Loudness is in LUFS (= LKFS): ``L = -0.691 + 10*log10(sum_i G_i * z_i)``,
where ``z_i`` is the mean square of channel ``i`` after K-weighting and
``G_i`` its weight (1.0 for left, right and centre, 1.41 for surrounds).
"""

import functools
import math

import numpy as np

from requant.dsp import native

__all__ = ["BLOCK_SECONDS", "STEP_SECONDS", "ABSOLUTE_GATE_LUFS", "RELATIVE_GATE_LU",
           "SHORT_TERM_SECONDS", "RANGE_RELATIVE_GATE_LU", "RANGE_PERCENTILES", "GATE_BIN_LU",
           "K_WEIGHTING_48K", "SIGNATURE", "k_weighting_sos", "step_sums", "block_mean_squares",
           "gated_loudness", "integrated_loudness", "channel_weights", "build", "kernel_py",
           "k_step_helper", "LoudnessMeter"]

#: Gating block length, s (BS.1770-4 §2.4).
BLOCK_SECONDS = 0.4
#: Step between gating blocks, s: 75 % overlap.
STEP_SECONDS = 0.1
#: Absolute gate, LUFS.
ABSOLUTE_GATE_LUFS = -70.0
#: Relative gate, LU below the loudness of the blocks above the absolute gate.
RELATIVE_GATE_LU = 10.0

#: The two K-weighting sections at 48 kHz, ``(b, a)`` each: the high shelf ("pre-filter",
#: BS.1770-4 Table 1) and the high-pass ("RLB", Table 2). Values from memory (REFERENCES.md
#: §7 records the standard's tables as unverified); tests check them against pyloudnorm.
K_WEIGHTING_48K = (
    ((1.53512485958697, -2.69169618940638, 1.19839281085285),
     (1.0, -1.69065929318241, 0.73248077421585)),
    ((1.0, -2.0, 1.0),
     (1.0, -1.99004745483398, 0.99007225036621)),
)
_TABLE_RATE = 48000.0

_OFFSET_DB = -0.691


def _prototype(b, a, rate):
    """The analog prototype of one digital section: ``(f0 Hz, numerator, denominator)``.

    The section is read as the bilinear transform of ``H(p)``, ``p = s/ω0``,
    pre-warped at ``f0`` (``p = (1/K)(1 - z^-1)/(1 + z^-1)``, ``K = tan(π f0/fs)``), where
    ``f0`` is the natural frequency of its poles. Polynomials in ``p``, highest power first.
    """
    a0, a1, a2 = (float(v) / a[0] for v in a)
    b0, b1, b2 = (float(v) / a[0] for v in b)
    k = math.sqrt((1.0 + a1 + a2) / (1.0 - a1 + a2))
    f0 = rate * math.atan(k) / math.pi

    def back(c0, c1, c2):
        return ((c0 - c1 + c2) * k * k, 2.0 * k * (c0 - c2), c0 + c1 + c2)

    return f0, back(b0, b1, b2), back(a0, a1, a2)


def _discretize(f0, num, den, rate):
    """Bilinear transform of ``H(p)`` pre-warped at ``f0`` for ``rate``: one sos row."""
    k = math.tan(math.pi * f0 / rate)

    def fwd(c2, c1, c0):
        return (c2 + c1 * k + c0 * k * k, 2.0 * (c0 * k * k - c2), c2 - c1 * k + c0 * k * k)

    b, a = fwd(*num), fwd(*den)
    return [b[0] / a[0], b[1] / a[0], b[2] / a[0], 1.0, a[1] / a[0], a[2] / a[0]]


def k_weighting_sos(rate):
    """The K-weighting filter for a sample rate, as second-order sections.

    Parameters
    ----------
    rate : float, Hz
        Above twice the shelf's natural frequency (about 3.4 kHz).

    Returns
    -------
    ndarray, float64, (2, 6)
        The shelf, then the high-pass, in ``scipy.signal.sosfilt`` form.

    Raises
    ------
    ValueError
        For a rate too low to hold the shelf.
    """
    rate = float(rate)
    rows = []
    for b, a in K_WEIGHTING_48K:
        f0, num, den = _prototype(b, a, _TABLE_RATE)
        if not math.isfinite(rate) or f0 >= rate / 2.0:
            raise ValueError(f"rate={rate!r} Hz is too low for K-weighting (the shelf sits at "
                             f"{f0:.0f} Hz)")
        rows.append(_discretize(f0, num, den, rate))
    return np.array(rows, dtype=np.float64)


def _steps(rate):
    """(frames per 100 ms step, frames per 400 ms block = 4 steps)."""
    step = max(1, int(round(STEP_SECONDS * rate)))
    return step, step * int(round(BLOCK_SECONDS / STEP_SECONDS))


def step_sums(y, step):
    """Sums of squares over whole steps of ``step`` frames, per channel.

    Parameters
    ----------
    y : ndarray, (frames, channels)
        K-weighted signal.
    step : int, frames

    Returns
    -------
    ndarray, float64, (frames // step, channels)
        A frame left over after the last whole step is not counted.
    """
    y = np.asarray(y, dtype=np.float64)
    n = y.shape[0] // step
    parts = y[: n * step].reshape(n, step, y.shape[1])
    return np.einsum("ijk,ijk->ik", parts, parts)


def block_mean_squares(sums, step):
    """Mean squares of the 400 ms gating blocks from consecutive step sums.

    Parameters
    ----------
    sums : ndarray, (steps, channels)
        :func:`step_sums`.
    step : int, frames

    Returns
    -------
    ndarray, (blocks, channels)
        Block ``j`` spans steps ``j .. j+3``; none when fewer than four steps.
    """
    per = int(round(BLOCK_SECONDS / STEP_SECONDS))
    sums = np.asarray(sums, dtype=np.float64)
    if sums.shape[0] < per:
        return np.zeros((0, sums.shape[1]))
    c = np.concatenate([np.zeros((1, sums.shape[1])), np.cumsum(sums, axis=0)])
    return (c[per:] - c[:-per]) / (per * step)


def gated_loudness(block_ms, weights=None):
    """Integrated loudness of gated blocks (BS.1770-4 §2.6), LUFS.

    Parameters
    ----------
    block_ms : ndarray, (blocks, channels)
        Mean squares of the K-weighted blocks.
    weights : sequence of float, optional
        Channel weights ``G_i``; default 1.0 each.

    Returns
    -------
    float or None
        None when no block passes the absolute gate (silence, or a signal
        shorter than one block): the loudness is undefined.
    """
    block_ms = np.asarray(block_ms, dtype=np.float64)
    g = np.ones(block_ms.shape[1]) if weights is None else np.asarray(weights, dtype=np.float64)
    if g.shape != (block_ms.shape[1],):
        raise ValueError(f"{g.size} channel weights for {block_ms.shape[1]} channels")
    power = block_ms @ g
    with np.errstate(divide="ignore"):
        lj = _OFFSET_DB + 10.0 * np.log10(power)
    above = lj > ABSOLUTE_GATE_LUFS
    if not above.any():
        return None
    relative = _OFFSET_DB + 10.0 * math.log10(float(np.mean(power[above]))) - RELATIVE_GATE_LU
    keep = above & (lj > relative)
    return _OFFSET_DB + 10.0 * math.log10(float(np.mean(power[keep])))


def integrated_loudness(x, rate, *, weights=None):
    """ITU-R BS.1770-4 integrated loudness of a signal in memory.

    Parameters
    ----------
    x : ndarray, (frames,) or (frames, channels), full scale 1.0
    rate : float, Hz
    weights : sequence of float, optional
        Channel weights (1.0 for L, R, C; 1.41 for the surrounds; leave out
        an LFE channel by giving it 0). Default: 1.0 for every channel.

    Returns
    -------
    float or None, LUFS
        None when the loudness is undefined: no 400 ms block above the
        absolute gate (-70 LUFS), or fewer than 400 ms of signal.

    Examples
    --------
    >>> t = np.arange(48000 * 2) / 48000
    >>> s = 10 ** (-23 / 20) * np.sin(2 * np.pi * 1000 * t)
    >>> round(integrated_loudness(np.stack([s, s], axis=1), 48000), 1)
    -23.0
    """
    from scipy.signal import sosfilt

    x = np.asarray(x, dtype=np.float64)
    if x.ndim == 1:
        x = x[:, None]
    step, _ = _steps(rate)
    y = sosfilt(k_weighting_sos(rate), x, axis=0)
    return gated_loudness(block_mean_squares(step_sums(y, step), step), weights)


# --- Streaming: the compiled K-weighting kernel, the meter, the gates and the range ------------

#: Short-term loudness window for the loudness range, s (EBU Tech 3342; from memory).
SHORT_TERM_SECONDS = 3.0
#: Relative gate of the loudness range, LU below the power mean of the short-term values
#: above the absolute gate (EBU Tech 3342; from memory).
RANGE_RELATIVE_GATE_LU = 20.0
#: The percentiles of the gated short-term distribution whose difference is the range.
RANGE_PERCENTILES = (10.0, 95.0)
#: Width of the gates' histogram bins, LU: blocks are kept per bin (see :class:`_Gates`).
GATE_BIN_LU = 0.01
#: The histogram spans the absolute gate to this loudness; anything louder shares the top bin.
_GATE_TOP_LUFS = 30.0
_GATE_BINS = int(round((_GATE_TOP_LUFS - ABSOLUTE_GATE_LUFS) / GATE_BIN_LU))

#: Channel weights ``G_i`` of BS.1770-4 Table 3 by channel count, in the usual file order
#: (L R C LFE Ls Rs): 1.0 for left, right and centre, 1.41 for the surrounds, 0 for the LFE
#: (left out). Other channel counts weigh every channel 1.0.
_LAYOUTS = {
    1: ("mono", (1.0,)),
    2: ("L R", (1.0, 1.0)),
    3: ("L R C", (1.0, 1.0, 1.0)),
    5: ("L R C Ls Rs", (1.0, 1.0, 1.0, 1.41, 1.41)),
    6: ("L R C LFE Ls Rs", (1.0, 1.0, 1.0, 0.0, 1.41, 1.41)),
}


def channel_weights(channels):
    """BS.1770-4 channel weights for a channel count, and the layout assumed.

    Parameters
    ----------
    channels : int

    Returns
    -------
    layout : str
        e.g. ``"L R C LFE Ls Rs"``; for counts BS.1770-4 does not place,
        ``"N channels, each weighted 1.0"``.
    weights : tuple of float
    """
    if channels in _LAYOUTS:
        return _LAYOUTS[channels]
    return f"{channels} channels, each weighted 1.0", (1.0,) * int(channels)


#: The kernel's arguments, in order, declared once for :mod:`requant.dsp.native`
#: (name, type code, least length of an array or condition on a scalar; ``signals`` is the
#: build parameter). See :func:`build`.
SIGNATURE = (
    ("x", "f32*|f64*|i32*", "n * nch"),
    ("e", "f32*", "n * nch * (signals - 1)"),
    ("n", "i64", "n >= 0"),
    ("nch", "i64", "nch >= 1"),
    ("scale", "f64", None),
    ("gain", "f64", None),
    ("sos", "f64*", "12"),
    ("step", "i64", "step >= 1"),
    ("z", "f64*", "12 * signals * ((nch + 1) // 2)"),
    ("part", "f64*", "2 * signals * ((nch + 1) // 2)"),
    ("ctl", "f64*", "2"),
    ("sums", "f64*", "signals * nch * ((n + step - 1) // step)"),
)


def k_step_helper(wrap):
    """One sample through both K-weighting sections, compiled by ``wrap``.

    ``kw(u, u1, u2, y1, y2, w1, w2, k)`` returns ``(w, u, u1, y, y1, w, w1)``:
    the K-weighted sample and the new state (the last two inputs, shelf
    outputs and outputs); ``k`` holds the ten coefficients ``b00, b01, b02,
    a01, a02, b10, b11, b12, a11, a12``. Direct form I, the newest output
    entering last, so the sample-to-sample chain is one multiplication and one
    subtraction per section.
    """

    def kw(u, u1, u2, y1, y2, w1, w2, k):
        b00, b01, b02, a01, a02, b10, b11, b12, a11, a12 = k
        y = (((b00 * u + b01 * u1) + b02 * u2) - a02 * y2) - a01 * y1
        w = (((b10 * y + b11 * y1) + b12 * y2) - a12 * w2) - a11 * w1
        return w, u, u1, y, y1, w, w1

    return wrap(kw)


def _quad_helper(wrap, kw):
    """The two-signal pass of :func:`build` (its kernel's ``quad``), compiled by ``wrap``."""

    def quad(x, e, i0, i1, nch, c, g, go, k, z, part):
        # The same for two signals at once: channels c and c + 1 of the block (g its scale:
        # lanes a, b) and of go * block + error (lanes p, r), four recursions side by side.
        # Each lane does what ``pair`` does for it, operation for operation (the same bits);
        # two independent pairs of lanes in one loop keep the multipliers busier than two
        # passes of one pair each (2.45 to 1.9 ns a sample and signal, measured).
        d = 1 if c + 1 < nch else 0
        o = (c // 2) * 24  # the block's state; the output's follows at o + 12
        q = (c // 2) * 4
        a1, a2, a3, a4, a5, a6 = z[o], z[o + 2], z[o + 4], z[o + 6], z[o + 8], z[o + 10]
        b1, b2, b3, b4, b5, b6 = z[o + 1], z[o + 3], z[o + 5], z[o + 7], z[o + 9], z[o + 11]
        p1, p2, p3, p4, p5, p6 = z[o + 12], z[o + 14], z[o + 16], z[o + 18], z[o + 20], z[o + 22]
        r1, r2, r3, r4, r5, r6 = z[o + 13], z[o + 15], z[o + 17], z[o + 19], z[o + 21], z[o + 23]
        pa = part[q]
        pb = part[q + 1]
        pp = part[q + 2]
        pr = part[q + 3]
        for j in range(i0, i1):
            xa = np.float64(x[j * nch + c])
            xb = np.float64(x[j * nch + c + d])
            ua = g * xa
            ub = g * xb
            up = go * xa + np.float64(e[j * nch + c])
            ur = go * xb + np.float64(e[j * nch + c + d])
            ua = ua if ua - ua == 0.0 else 0.0
            ub = ub if ub - ub == 0.0 else 0.0
            up = up if up - up == 0.0 else 0.0
            ur = ur if ur - ur == 0.0 else 0.0
            wa, a1, a2, a3, a4, a5, a6 = kw(ua, a1, a2, a3, a4, a5, a6, k)
            wb, b1, b2, b3, b4, b5, b6 = kw(ub, b1, b2, b3, b4, b5, b6, k)
            wp, p1, p2, p3, p4, p5, p6 = kw(up, p1, p2, p3, p4, p5, p6, k)
            wr, r1, r2, r3, r4, r5, r6 = kw(ur, r1, r2, r3, r4, r5, r6, k)
            pa += wa * wa
            pb += wb * wb
            pp += wp * wp
            pr += wr * wr
        z[o], z[o + 2], z[o + 4], z[o + 6], z[o + 8], z[o + 10] = a1, a2, a3, a4, a5, a6
        z[o + 1], z[o + 3], z[o + 5], z[o + 7], z[o + 9], z[o + 11] = b1, b2, b3, b4, b5, b6
        z[o + 12], z[o + 14], z[o + 16], z[o + 18], z[o + 20], z[o + 22] = p1, p2, p3, p4, p5, p6
        z[o + 13], z[o + 15], z[o + 17], z[o + 19], z[o + 21], z[o + 23] = r1, r2, r3, r4, r5, r6
        part[q] = pa
        part[q + 1] = pb
        part[q + 2] = pp
        part[q + 3] = pr

    return wrap(quad)


def build(jit=None, signals=1):
    """Return the K-weighting kernel, its per-sample helper compiled by ``jit``.

    Parameters
    ----------
    jit : callable, optional
        numba's ``njit(inline="always")`` for the compiled kernel
        (:mod:`requant.dsp.native`); ``None`` gives the plain-Python twin.
    signals : {1, 2}
        1: the block itself; 2: the block and ``gain * block + error`` (the
        output of a conversion, or a delivery beside its master).

    Returns
    -------
    callable
        ``kweight(x, e, n, nch, scale, gain, sos, step, z, part, ctl, sums)``
        over flat, frame-interleaved buffers:

        x : float32, float64 or int32 [n*nch]; times ``scale`` is full scale
        e : float32 [n*nch] (signals 2; unused for 1)
        sos : float64 [12], the two sections of :func:`k_weighting_sos`
        step : frames per 100 ms step
        z : float64 [12*signals*ceil(nch/2)]; the filters' state, updated
        part : float64 [2*signals*ceil(nch/2)]; the current step's sums of squares so far
        ctl : float64 [2]; in: frames already in the current step; out: the
            same after the block, and the number of steps completed
        sums : float64; out: the completed steps' sums of squares, step ``k``
            of signal ``s`` and channel ``c`` at ``(k*signals + s)*nch + c``

    Notes
    -----
    Each section is a direct form I in float64, summed so that the newest
    output enters last: the sample-to-sample chain is one multiplication and
    one subtraction per section (a transposed form II, as in
    ``scipy.signal.sosfilt``, has two more additions on it: 1.5x slower).
    Results agree with ``sosfilt`` to rounding. Channels go two at a time,
    their two independent recursions in one vector register (the family is
    compiled with the SLP vectorizer); with two signals the block's and the
    output's recursions of the two channels run in the same loop, and the
    block's lanes do exactly what they do with one signal (the same bits).
    Every sample is filtered and summed the same way whatever the block
    boundaries, so blocks equal the whole, bit for bit.
    """
    wrap = (lambda f: f) if jit is None else jit
    sig = 2 if signals == 2 else 1

    kw = k_step_helper(wrap)

    def pair(x, e, i0, i1, nch, c, g, k, z, part):
        # Frames [i0, i1) of channels c and c + 1 (the same channel twice when c is the last:
        # the second copy is discarded) of the block (g its scale), into the current step's
        # sums. The state is stored variable by variable, the two lanes side by side
        # (z[o + 2*v + lane]), which is what lets the SLP vectorizer put the lanes, not a
        # lane's variables, into one register.
        d = 1 if c + 1 < nch else 0
        o = (c // 2) * 12
        q = (c // 2) * 2
        a1, a2, a3, a4, a5, a6 = z[o], z[o + 2], z[o + 4], z[o + 6], z[o + 8], z[o + 10]
        b1, b2, b3, b4, b5, b6 = z[o + 1], z[o + 3], z[o + 5], z[o + 7], z[o + 9], z[o + 11]
        pa = part[q]
        pb = part[q + 1]
        for j in range(i0, i1):
            ua = g * np.float64(x[j * nch + c])
            ub = g * np.float64(x[j * nch + c + d])
            # NaN or infinity counts as 0 (as in inspect's figures), never in the state
            ua = ua if ua - ua == 0.0 else 0.0
            ub = ub if ub - ub == 0.0 else 0.0
            wa, a1, a2, a3, a4, a5, a6 = kw(ua, a1, a2, a3, a4, a5, a6, k)
            wb, b1, b2, b3, b4, b5, b6 = kw(ub, b1, b2, b3, b4, b5, b6, k)
            pa += wa * wa
            pb += wb * wb
        z[o], z[o + 2], z[o + 4], z[o + 6], z[o + 8], z[o + 10] = a1, a2, a3, a4, a5, a6
        z[o + 1], z[o + 3], z[o + 5], z[o + 7], z[o + 9], z[o + 11] = b1, b2, b3, b4, b5, b6
        part[q] = pa
        part[q + 1] = pb

    pair = wrap(pair)

    quad = _quad_helper(wrap, kw)

    def kweight(x, e, n, nch, scale, gain, sos, step, z, part, ctl, sums):
        k = (sos[0], sos[1], sos[2], sos[4], sos[5], sos[6], sos[7], sos[8], sos[10], sos[11])
        pos = int(ctl[0])
        cnt = 0
        i = 0
        while i < n:
            # up to the end of the current 100 ms step, two channels at a time
            take = min(n - i, step - pos)
            c = 0
            while c < nch:
                if sig == 2:
                    quad(x, e, i, i + take, nch, c, scale, gain * scale, k, z, part)
                else:
                    pair(x, e, i, i + take, nch, c, scale, k, z, part)
                c += 2
            i += take
            pos += take
            if pos == step:
                c = 0
                while c < nch:
                    d = 1 if c + 1 < nch else 0
                    for s in range(sig):
                        q = ((c // 2) * sig + s) * 2
                        t = (cnt * sig + s) * nch
                        sums[t + c] = part[q]
                        sums[t + c + d] = part[q + 1]
                        part[q] = 0.0
                        part[q + 1] = 0.0
                    c += 2
                pos = 0
                cnt += 1
        ctl[0] = float(pos)
        ctl[1] = float(cnt)

    return kweight


class _Gates:
    """One signal's gated blocks and short-term values, kept in fixed-size histograms.

    Each 400 ms block (every 100 ms) and each 3 s short-term value (every
    100 ms) whose loudness passes the absolute gate is counted in a bin of
    :data:`GATE_BIN_LU`, and its power is added to the bin's sum, so the means
    the gates need are exact whatever the length, in memory that does not grow.
    The relative gate keeps whole bins: a bin above the gate counts whole, the
    bin the gate falls in counts when the mean of its blocks is above the
    gate, so only blocks within 0.01 LU of the gate can be decided with their
    bin rather than alone. Powers are the weighted sums over channels of the
    mean squares (BS.1770-4 §2.4).
    """

    _BLOCK_STEPS = int(round(BLOCK_SECONDS / STEP_SECONDS))
    _SHORT_STEPS = int(round(SHORT_TERM_SECONDS / STEP_SECONDS))

    def __init__(self, step):
        self.step = int(step)
        self._tail = np.zeros(0)  # the last weighted step sums, for blocks still open
        self.blocks = (np.zeros(_GATE_BINS, np.int64), np.zeros(_GATE_BINS))
        self.short = (np.zeros(_GATE_BINS, np.int64), np.zeros(_GATE_BINS))
        self._floor = 10.0 ** ((ABSOLUTE_GATE_LUFS - _OFFSET_DB) / 10.0)

    @staticmethod
    def _window_sums(w, width):
        """Sums of ``width`` consecutive values, each added in the same order (left to right)."""
        k = w.size - width + 1
        if k <= 0:
            return np.zeros(0)
        out = w[:k].copy()
        for j in range(1, width):
            out += w[j:j + k]
        return out

    def _count(self, hist, power):
        keep = power > self._floor  # the absolute gate, strictly above -70 LUFS
        p = power[keep]
        if p.size == 0:
            return
        lj = _OFFSET_DB + 10.0 * np.log10(p)
        idx = np.floor((lj - ABSOLUTE_GATE_LUFS) / GATE_BIN_LU).astype(np.int64)
        np.clip(idx, 0, _GATE_BINS - 1, out=idx)
        np.add.at(hist[0], idx, 1)
        np.add.at(hist[1], idx, p)

    def add(self, weighted):
        """Take the next completed steps' weighted sums of squares (1-D, in order)."""
        if weighted.size == 0:
            return
        held = self._tail.size
        w = np.concatenate((self._tail, weighted))
        for hist, width in ((self.blocks, self._BLOCK_STEPS), (self.short, self._SHORT_STEPS)):
            # the windows that end in the new steps (those inside the tail were counted)
            new = w[max(0, held - width + 1):]
            self._count(hist, self._window_sums(new, width) / (width * self.step))
        self._tail = w[-(self._SHORT_STEPS - 1):].copy()

    @staticmethod
    def _relative(hist, gate_lu):
        """(counts, sums) of the bins kept by the relative gate ``gate_lu`` below the mean."""
        counts, sums = hist
        total = int(counts.sum())
        if total == 0:
            return None
        mean = float(sums.sum()) / total
        gate = _OFFSET_DB + 10.0 * math.log10(mean) - gate_lu
        edges = ABSOLUTE_GATE_LUFS + GATE_BIN_LU * np.arange(_GATE_BINS)
        keep = edges > gate
        b = int(np.searchsorted(edges, gate, side="right")) - 1  # the bin the gate falls in
        if 0 <= b < _GATE_BINS and counts[b]:
            keep[b] = _OFFSET_DB + 10.0 * math.log10(sums[b] / counts[b]) > gate
        return np.where(keep, counts, 0), np.where(keep, sums, 0.0)

    def integrated(self):
        """Integrated loudness, LUFS (BS.1770-4 §2.6); None when no block passes the gate."""
        kept = self._relative(self.blocks, RELATIVE_GATE_LU)
        if kept is None or not kept[0].any():
            return None
        return _OFFSET_DB + 10.0 * math.log10(float(kept[1].sum()) / int(kept[0].sum()))

    def range(self):
        """Loudness range, LU (EBU Tech 3342): the 10th to the 95th percentile of the
        short-term values left by the gates; None without any."""
        kept = self._relative(self.short, RANGE_RELATIVE_GATE_LU)
        if kept is None or not kept[0].any():
            return None
        cum = np.cumsum(kept[0])
        total = int(cum[-1])
        lo, hi = (int(np.searchsorted(cum, max(1, math.ceil(p / 100.0 * total))))
                  for p in RANGE_PERCENTILES)  # nearest rank
        return (hi - lo) * GATE_BIN_LU


class LoudnessMeter:
    """Streaming ITU-R BS.1770-4 loudness: integrated loudness and loudness range.

    Fed block by block; memory does not grow with the length, and any
    division into blocks gives the same readings, bit for bit.

    Parameters
    ----------
    channels : int, >= 1
    rate : float, Hz
        Above about 3.4 kHz (see :func:`k_weighting_sos`).
    weights : sequence of float, optional
        Channel weights; default :func:`channel_weights` of the channel count.
    with_output : bool, default False
        Also measure ``gain * x + e`` (the output of a conversion, or a
        delivery measured against its master): :meth:`process` then takes the
        error ``e`` too, and both are filtered in the same pass.
    gain : float, default 1.0
        The gain of ``x`` in the output.

    Notes
    -----
    Blocks are (frames, channels) float32, float64 or int32 (left-justified
    codes, full scale ``2**31``); errors float32. A NaN or infinite sample
    is taken as 0.
    The integrated loudness and the range come from :class:`_Gates`.
    """

    def __init__(self, channels, rate, *, weights=None, with_output=False, gain=1.0):
        self.channels = int(channels)
        self.rate = float(rate)
        layout, default = channel_weights(self.channels)
        self.layout = layout if weights is None else "given weights"
        self.weights = np.asarray(default if weights is None else weights, dtype=np.float64)
        if self.weights.shape != (self.channels,):
            raise ValueError(f"{self.weights.size} channel weights for {self.channels} channels")
        self.signals = 2 if with_output else 1
        self.gain = float(gain)
        self._sos = np.ascontiguousarray(k_weighting_sos(self.rate).reshape(-1))
        self.step, _ = _steps(self.rate)
        pairs = (self.channels + 1) // 2
        self._z = np.zeros(12 * self.signals * pairs)
        self._part = np.zeros(2 * self.signals * pairs)
        self._ctl = np.zeros(2)
        self._gates = [_Gates(self.step) for _ in range(self.signals)]
        self._pending = []
        self._npending = 0
        self.frames = 0

    def process(self, x, e=None, *, kernel=None):
        """Meter the next block ``x`` (and error ``e`` with ``with_output``), (frames, channels)."""
        n = x.shape[0]
        if n == 0:
            return
        x, scale = native.kernel_input(x)
        if self.signals == 2:
            e = np.ascontiguousarray(e, dtype=np.float32)
        else:
            e = np.zeros(1, np.float32)
        run = _kernel(x.dtype, self.signals) if kernel is None else kernel
        steps = (n + self.step - 1) // self.step
        sums = np.empty(self.signals * self.channels * max(steps, 1))
        run(x.reshape(-1), e.reshape(-1), n, self.channels, scale, self.gain, self._sos,
            self.step, self._z, self._part, self._ctl, sums)
        self.add_steps(sums, n)

    def add_steps(self, sums, frames):
        """Take the steps the kernel completed (``sums``, ``ctl[1]`` of them) in a block of
        ``frames`` frames. They wait in a short list and go to the gates :data:`_BATCH_STEPS`
        at a time (the gates' numpy work per call costs more than a block's filtering)."""
        done = int(self._ctl[1])
        if done:
            self._pending.append(sums[:done * self.signals * self.channels].reshape(
                done, self.signals, self.channels).copy())
            self._npending += done
            if self._npending >= _BATCH_STEPS:
                self._flush()
        self.frames += frames

    def _flush(self):
        if not self._pending:
            return
        per = np.concatenate(self._pending) if len(self._pending) > 1 else self._pending[0]
        self._pending = []
        self._npending = 0
        for s, gates in enumerate(self._gates):
            w = per[:, s, 0] * self.weights[0]  # weighted in channel order: exact repeats
            for c in range(1, self.channels):
                w = w + per[:, s, c] * self.weights[c]
            gates.add(w)

    def readings(self):
        """One dict per signal (the block; then the output): ``integrated_lufs`` and
        ``range_lu`` (None when undefined: no block above the gates, or too short)."""
        self._flush()
        return [{"integrated_lufs": g.integrated(), "range_lu": g.range()} for g in self._gates]


#: Completed 100 ms steps held before they go to the gates together (fixed memory).
_BATCH_STEPS = 256


@functools.cache
def _kernel(x_dtype, signals):
    """The compiled K-weighting kernel for a block dtype and signal count."""
    return native.kernel("loudness", x=x_dtype, signals=signals)


#: Plain-Python twins of the compiled kernel (the tests compare them), by signal count.
def kernel_py(signals):
    """The plain-Python K-weighting kernel for 1 or 2 signals (slow; for tests)."""
    return build(None, signals)
