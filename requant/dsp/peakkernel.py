"""The skipping true-peak kernels: one signal, or an input and input + error together.

Both meter ITU-R BS.1770-4 Annex 2 true peak (the 48-tap interpolator of
:mod:`requant.dsp.truepeak`, four phases of 12 taps) and give the reading of
the plain meter bit for bit, while interpolating only what could set a new
peak. They share every step but the output's (:func:`_helpers`):

1. **Bounds.** An interpolated sample is a weighted sum of 12 samples, so it is
   at most ``gain`` (:data:`~requant.dsp.truepeak.PHASE_GAIN`, the largest sum
   of |coefficients| of a phase) times their largest magnitude. The largest
   magnitude of each sub-block of ``sub`` frames is found in one pass over the
   interleaved block for all channels (eight running maxima when the channel
   count divides 8, one strided pass per channel otherwise); a sub-block's
   bound also covers the frames before it that its first samples are made
   from. A sub-block whose bound does not exceed the running peak is skipped.
2. **Screen.** The rest is interpolated in float32, in runs of up to ``run``
   frames, with the phases folded: phase 3 is phase 0 reversed (and 2 is 1
   reversed), so with ``S_j = x[n-j] + x[n-11+j]`` and ``D_j = x[n-j] -
   x[n-11+j]`` the pair's larger magnitude is ``(|Σ (h_j + h_11-j) S_j| +
   |Σ (h_j - h_11-j) D_j|) / 2`` over ``j < 6``: half the multiplications.
3. **Reading.** A sub-block is read in float64, summed ``j = 0..11`` in order as
   the plain meter does, only where the screen plus a proven bound on its
   rounding could exceed the running peak. The bound: each folded sum is a
   dot product of six terms whose inputs, coefficients, products and sums are
   rounded once each, so its error is at most ``9u Σ|c_j|(|x_a| + |x_b|) <=
   18u G X`` (``u = 2**-24``, ``G`` the gain, ``X`` the largest |sample|);
   two of them and the final sum give ``20u G X``; :data:`SCREEN_MARGIN` is
   ``32u`` per unit of ``G X``.

The output ``x + e`` of the dual kernel is bounded by the input's own bound
(the screen's, or the exact reading) plus ``gain`` times the error's
sub-block maximum, which skips almost everything.

Buffers are flat and frame-interleaved (frame ``n`` of channel ``c`` at
``n*nch + c``), so the same source compiles for raw pointers
(:mod:`requant.dsp.native`) and runs as a plain-Python twin on arrays (the
tests compare the two). Integer blocks (left-justified int32 codes) are
metered in code units: the reading scales by ``2**-31`` exactly.
"""

import numpy as np

__all__ = ["CHUNK_FRAMES", "FLOAT32_SAFE", "SCREEN_MARGIN", "PEAK_SIGNATURE", "DUAL_SIGNATURE",
           "build_peak", "build_dual", "fold_phases"]

#: Samples (frames x channels) handled per chunk of a block: a chunk's bounds and screen
#: reuse the samples while they are still in the core's cache.
CHUNK_FRAMES = 8192

#: Samples at or above this magnitude are never screened in float32 (they could overflow it).
FLOAT32_SAFE = 1e37

#: The float32 screen's rounding bound, per unit of ``gain * max|x|`` (see the notes).
SCREEN_MARGIN = 32.0 * 2.0**-24


def fold_phases(phases):
    """The screen's 24 coefficients (float32) from the four phases, shape (4, 12).

    ``h0_j + h0_11-j``, ``h0_j - h0_11-j``, ``h1_j + h1_11-j``, ``h1_j - h1_11-j``
    for ``j = 0..5``, padded with zeros to 48 (the length the kernels declare).
    """
    p = np.asarray(phases, dtype=np.float64)
    out = np.zeros(48, dtype=np.float32)
    for row, k in enumerate((0, 1)):
        h = p[k]
        out[12 * row:12 * row + 6] = h[:6] + h[11:5:-1]
        out[12 * row + 6:12 * row + 12] = h[:6] - h[11:5:-1]
    return out


#: The single kernel's arguments, in order, declared once for :mod:`requant.dsp.native`:
#: name, type code (``"f32*|f64*|i32*"``: the dtype is chosen per compiled kernel), and for
#: an array the least number of elements it must hold, for a scalar a condition it must
#: meet, as expressions in the scalar arguments. See :func:`build_peak`.
PEAK_SIGNATURE = (
    ("hx", "f64*", "11 * nch"),
    ("xs", "f32*|f64*|i32*", "(m - 11) * nch"),
    ("m", "i64", "m >= 11"),
    ("nch", "i64", "nch >= 1"),
    ("phases", "f64*", "48"),
    ("fold", "f32*", "48"),
    ("gain", "f64", None),
    ("sub", "i64", "sub >= 1"),
    ("run", "i64", "run >= 1"),
    ("peak", "f64*", "nch"),
    ("bx", "f64*", "nch * ((m - 11 + sub - 1) // sub)"),
    ("ub", "f64*", "(m - 11 + sub - 1) // sub"),
    ("pk", "f64*", "(m - 11 + sub - 1) // sub"),
    ("v", "f64*", "max(run, sub) + 11"),
    ("acc", "f64*", "max(run, sub)"),
    ("v32", "f32*", "max(run, sub) + 11"),
    ("acc32", "f32*", "max(run, sub)"),
)

#: The dual kernel's arguments (see :data:`PEAK_SIGNATURE` and :func:`build_dual`).
DUAL_SIGNATURE = (
    ("hx", "f64*", "11 * nch"),
    ("he", "f64*", "11 * nch"),
    ("xs", "f32*|f64*", "(m - 11) * nch"),
    ("es", "f32*|f64*", "(m - 11) * nch"),
    ("m", "i64", "m >= 11"),
    ("nch", "i64", "nch >= 0"),
    ("phases", "f64*", "48"),
    ("gain", "f64", None),
    ("sub", "i64", "sub >= 1"),
    ("run", "i64", "run >= 1"),
    ("peak_in", "f64*", "nch"),
    ("peak_out", "f64*", "nch"),
    ("v", "f64*", "max(run, sub) + 11"),
    ("acc", "f64*", "max(run, sub)"),
    ("bx", "f64*", "nch * ((m - 11 + sub - 1) // sub)"),
    ("be", "f64*", "nch * ((m - 11 + sub - 1) // sub)"),
    ("ub", "f64*", "(m - 11 + sub - 1) // sub"),
    ("pk", "f64*", "(m - 11 + sub - 1) // sub"),
    ("phases32", "f32*", "48"),
    ("v32", "f32*", "max(run, sub) + 11"),
    ("acc32", "f32*", "max(run, sub)"),
)


def _read_helpers(wrap):
    """A sample of the history-then-block sequence; a channel's largest |sample|."""

    def at(h, b, n, nch, c):
        # frame n of the history-then-block sequence, as float64
        if n < 11:
            return np.float64(h[n * nch + c])
        return np.float64(b[(n - 11) * nch + c])

    at = wrap(at)

    def maxabs(b, nch, c, lo, hi):
        # largest |b[n*nch + c]| for block frames n in [lo, hi); four running maxima, so
        # that no compare waits for the one before
        m0 = 0.0
        m1 = 0.0
        m2 = 0.0
        m3 = 0.0
        n = lo
        while n + 4 <= hi:
            t0 = abs(np.float64(b[n * nch + c]))
            t1 = abs(np.float64(b[(n + 1) * nch + c]))
            t2 = abs(np.float64(b[(n + 2) * nch + c]))
            t3 = abs(np.float64(b[(n + 3) * nch + c]))
            m0 = t0 if t0 > m0 else m0
            m1 = t1 if t1 > m1 else m1
            m2 = t2 if t2 > m2 else m2
            m3 = t3 if t3 > m3 else m3
            n += 4
        while n < hi:
            t0 = abs(np.float64(b[n * nch + c]))
            m0 = t0 if t0 > m0 else m0
            n += 1
        return max(max(m0, m1), max(m2, m3))

    maxabs = wrap(maxabs)
    return at, maxabs


def _bound_helpers(wrap, maxabs):
    """The sub-blocks' bounds (step 1 of the module notes)."""

    def lanes8(b, lo, hi, nch, out, o):
        # out[o + c] = largest |b[i]| over flat i in [lo, hi) with i % nch == c, for a
        # channel count dividing 8 (lo a multiple of it): eight running maxima (in vector
        # registers), lane l holding channel l % nch
        m0 = 0.0
        m1 = 0.0
        m2 = 0.0
        m3 = 0.0
        m4 = 0.0
        m5 = 0.0
        m6 = 0.0
        m7 = 0.0
        i = lo
        while i + 8 <= hi:
            t0 = abs(np.float64(b[i]))
            t1 = abs(np.float64(b[i + 1]))
            t2 = abs(np.float64(b[i + 2]))
            t3 = abs(np.float64(b[i + 3]))
            t4 = abs(np.float64(b[i + 4]))
            t5 = abs(np.float64(b[i + 5]))
            t6 = abs(np.float64(b[i + 6]))
            t7 = abs(np.float64(b[i + 7]))
            m0 = t0 if t0 > m0 else m0
            m1 = t1 if t1 > m1 else m1
            m2 = t2 if t2 > m2 else m2
            m3 = t3 if t3 > m3 else m3
            m4 = t4 if t4 > m4 else m4
            m5 = t5 if t5 > m5 else m5
            m6 = t6 if t6 > m6 else m6
            m7 = t7 if t7 > m7 else m7
            i += 8
        ms = (m0, m1, m2, m3, m4, m5, m6, m7)
        for c in range(nch):
            out[o + c] = 0.0
        for lane in range(8):
            c = lane % nch
            if ms[lane] > out[o + c]:
                out[o + c] = ms[lane]
        while i < hi:
            t = abs(np.float64(b[i]))
            c = (i - lo) % nch
            if t > out[o + c]:
                out[o + c] = t
            i += 1

    lanes8 = wrap(lanes8)

    def bounds(h, b, m, nch, sub, k0, k1, out):
        # out[k*nch + c] for sub-blocks k in [k0, k1): the largest |sample| of channel c
        # among those sub-block k's interpolated samples are made from: its own frames and
        # the 11 before it (whole sub-blocks before it, or the history)
        n = m - 11
        if nch == 1 or nch == 2 or nch == 4 or nch == 8:
            for k in range(k0, k1):
                lanes8(b, k * sub * nch, min((k + 1) * sub, n) * nch, nch, out, k * nch)
        else:
            for k in range(k0, k1):
                for c in range(nch):
                    out[k * nch + c] = maxabs(b, nch, c, k * sub, min((k + 1) * sub, n))
        nprev = (11 + sub - 1) // sub
        for k in range(k1 - 1, k0 - 1, -1):  # backwards: the sub-blocks before hold their own
            for c in range(nch):
                best = out[k * nch + c]
                for j in range(1, nprev + 1):
                    if k - j >= 0:
                        t = (out[(k - j) * nch + c] if k - j >= k0 else
                             maxabs(b, nch, c, (k - j) * sub, (k - j + 1) * sub))
                        if t > best:
                            best = t
                if k * sub < 11:
                    for f in range(11):
                        t = abs(h[f * nch + c])
                        if t > best:
                            best = t
                out[k * nch + c] = best

    bounds = wrap(bounds)
    return bounds


def _exact_helper(wrap, at):
    """The float64 reading of runs of sub-blocks, as the plain meter sums (step 3)."""

    def run_peaks(hx, he, xs, es, nch, c, use_err, phases, s0, s1, sub, v, acc, out, k0, zero):
        # Interpolate inputs n in [s0, s1) (history before s0) in one pass and put the
        # largest |interpolated sample| of each sub-block into out[k0], out[k0 + 1], ...
        # The samples are gathered into a contiguous row first; each output is summed
        # j = 0..11 in order, as in the plain meter (float64 here: the reading).
        m = s1 - s0
        for n in range(s0 - 11, s1):
            t = at(hx, xs, n, nch, c)
            if use_err:
                t += at(he, es, n, nch, c)
            v[n - s0 + 11] = t
        for i in range(m):
            a0 = zero
            a1 = zero
            a2 = zero
            a3 = zero
            for j in range(12):
                t = v[i + 11 - j]
                a0 += phases[j] * t
                a1 += phases[12 + j] * t
                a2 += phases[24 + j] * t
                a3 += phases[36 + j] * t
            acc[i] = max(max(abs(a0), abs(a1)), max(abs(a2), abs(a3)))
        k = k0
        i0 = 0
        while i0 < m:
            i1 = min(i0 + sub, m)
            best = zero
            for i in range(i0, i1):
                if acc[i] > best:
                    best = acc[i]
            out[k] = best
            k += 1
            i0 = i1

    run_peaks = wrap(run_peaks)
    return run_peaks


def _screen_helper(wrap):
    """The float32 screen with the phases folded (step 2)."""

    def rowmax(a, lo, hi):
        # largest a[i], i in [lo, hi), of a nonnegative row: eight running maxima (one
        # vector register), so that no compare waits for the one before
        m0 = a[lo]
        m1 = m0
        m2 = m0
        m3 = m0
        m4 = m0
        m5 = m0
        m6 = m0
        m7 = m0
        i = lo
        while i + 8 <= hi:
            m0 = a[i] if a[i] > m0 else m0
            m1 = a[i + 1] if a[i + 1] > m1 else m1
            m2 = a[i + 2] if a[i + 2] > m2 else m2
            m3 = a[i + 3] if a[i + 3] > m3 else m3
            m4 = a[i + 4] if a[i + 4] > m4 else m4
            m5 = a[i + 5] if a[i + 5] > m5 else m5
            m6 = a[i + 6] if a[i + 6] > m6 else m6
            m7 = a[i + 7] if a[i + 7] > m7 else m7
            i += 8
        while i < hi:
            m0 = a[i] if a[i] > m0 else m0
            i += 1
        return np.float64(max(max(max(m0, m1), max(m2, m3)), max(max(m4, m5), max(m6, m7))))

    rowmax = wrap(rowmax)

    def screen(hx, xs, nch, c, s0, s1, sub, fold, v32, acc32, out, k0):
        # The float32 screen of inputs n in [s0, s1), phases folded in pairs (module
        # notes): the largest screened |interpolated sample| of each sub-block into
        # out[k0], out[k0 + 1], ... No running maximum in the sample loop, so the compiler
        # computes several outputs at once in vector registers. (A sample beyond the
        # float32 range makes a screened value NaN, which a maximum may drop: the caller
        # reads such sub-blocks exactly, see input_pass.)
        m = s1 - s0
        lo = s0 - 11
        n = lo
        while n < 11 and n < s1:
            v32[n - lo] = np.float32(hx[n * nch + c])
            n += 1
        while n < s1:
            v32[n - lo] = np.float32(xs[(n - 11) * nch + c])
            n += 1
        half = np.float32(0.5)
        for i in range(m):
            p0 = np.float32(0.0)
            q0 = np.float32(0.0)
            p1 = np.float32(0.0)
            q1 = np.float32(0.0)
            for j in range(6):
                a = v32[i + 11 - j]
                b = v32[i + j]
                s = a + b
                d = a - b
                p0 += fold[j] * s
                q0 += fold[6 + j] * d
                p1 += fold[12 + j] * s
                q1 += fold[18 + j] * d
            r0 = abs(p0) + abs(q0)
            r1 = abs(p1) + abs(q1)
            acc32[i] = half * (r0 if r0 > r1 else r1)
        k = k0
        i0 = 0
        while i0 < m:
            i1 = min(i0 + sub, m)
            out[k] = rowmax(acc32, i0, i1)
            k += 1
            i0 = i1

    screen = wrap(screen)
    return screen


def _input_helper(wrap, screen, run_peaks):
    """One channel's input: bounds, screen, reading (steps 1 to 3)."""

    def input_pass(hx, xs, m, nch, c, phases, fold, gain, sub, run, p, k0, k1, bx, ub, pk, v,
                   acc, v32, acc32):
        # Channel c's input over sub-blocks [k0, k1): runs of sub-blocks whose bound exceeds
        # the peak so far are screened in float32; the float64 reading is made only where
        # the screen cannot rule out a new peak. ub[k] receives a bound of sub-block k's
        # interpolated samples; returns the channel's new peak.
        per_run = max(1, run // sub)
        margin = SCREEN_MARGIN * gain
        k = k0
        while k < k1:
            if gain * bx[k * nch + c] > p:
                k2 = k + 1
                while k2 < k1 and k2 - k < per_run and gain * bx[k2 * nch + c] > p:
                    k2 += 1
                screen(hx, xs, nch, c, 11 + k * sub, min(11 + k2 * sub, m), sub, fold, v32,
                       acc32, pk, k)
                for kk in range(k, k2):
                    bound = pk[kk] + margin * bx[kk * nch + c]
                    if bound <= p and bx[kk * nch + c] < FLOAT32_SAFE:
                        ub[kk] = bound
                    else:  # (also where float32 cannot hold the samples)
                        s0 = 11 + kk * sub
                        run_peaks(hx, hx, xs, xs, nch, c, False, phases, s0, min(s0 + sub, m),
                                  sub, v, acc, pk, kk, 0.0)
                        p = max(p, pk[kk])
                        ub[kk] = pk[kk]
                k = k2
            else:
                ub[k] = gain * bx[k * nch + c]
                k += 1
        return p

    input_pass = wrap(input_pass)
    return input_pass


def _helpers(wrap):
    """The steps both kernels share, each wrapped by ``wrap`` (see the module notes)."""
    at, maxabs = _read_helpers(wrap)
    bounds = _bound_helpers(wrap, maxabs)
    run_peaks = _exact_helper(wrap, at)
    screen = _screen_helper(wrap)
    return bounds, run_peaks, _input_helper(wrap, screen, run_peaks)


def build_peak(jit=None):
    """Return the single-signal kernel, its helpers compiled by ``jit``.

    ``jit`` is numba's ``njit(inline="always")`` for the compiled kernel
    (loaded through :mod:`requant.dsp.native`), ``None`` for the plain-Python
    twin. The kernel is ``peak(hx, xs, m, nch, phases, fold, gain, sub, run,
    peak, bx, ub, pk, v, acc, v32, acc32)`` over flat buffers:

    hx : float64 [11*nch]
        The 11 frames before this block (in the block's own units).
    xs : float32, float64 or int32 [(m - 11)*nch]
        The block, frame-interleaved; ``m`` counts the history too.
    phases : float64 [48]
        :data:`~requant.dsp.truepeak.PHASES`, row by row.
    fold : float32 [48]
        :func:`fold_phases`.
    gain : float
        :data:`~requant.dsp.truepeak.PHASE_GAIN`.
    sub, run : int
        Sub-block length of the skip test; most frames screened in one pass.
    peak : float64 [nch]; updated in place
    bx : float64 [nch * sub-blocks]; working space (the bounds, frame-major)
    ub, pk : float64 [sub-blocks]; working space
    v, acc, v32, acc32 : working space of ``max(run, sub) + 11`` and ``max(run, sub)``
    """
    wrap = (lambda f: f) if jit is None else jit
    bounds, _, input_pass = _helpers(wrap)

    def peak(hx, xs, m, nch, phases, fold, gain, sub, run, peak, bx, ub, pk, v, acc, v32,
             acc32):
        nsb = (m - 11 + sub - 1) // sub
        step = max(1, CHUNK_FRAMES // (sub * nch))  # sub-blocks per chunk: stays in cache
        for k0 in range(0, nsb, step):
            k1 = min(k0 + step, nsb)
            bounds(hx, xs, m, nch, sub, k0, k1, bx)
            for c in range(nch):
                peak[c] = input_pass(hx, xs, m, nch, c, phases, fold, gain, sub, run, peak[c],
                                     k0, k1, bx, ub, pk, v, acc, v32, acc32)

    return peak


def build_dual(jit=None):
    """Return the dual kernel (an input and input + error), its helpers compiled by ``jit``.

    The kernel is ``dual_peak(hx, he, xs, es, m, nch, phases, gain, sub, run,
    peak_in, peak_out, v, acc, bx, be, ub, pk, phases32, v32, acc32)`` over
    flat buffers, as :func:`build_peak`, with:

    he, es : the error's history (float64) and block (float32 or float64)
    peak_in, peak_out : float64 [nch]; updated in place
    be : float64 [nch * sub-blocks]; working space
    phases32 : float32 [48]
        :func:`fold_phases` (the screen's coefficients).

    Notes
    -----
    The output ``x + e`` is summed in float64 as the plain meter would sum
    ``x + e`` formed in float64. Its bound per sub-block is the smaller of
    ``gain * (bx + be)`` and the input's own bound plus ``gain * be``.
    """
    wrap = (lambda f: f) if jit is None else jit
    bounds, run_peaks, input_pass = _helpers(wrap)

    def dual_peak(hx, he, xs, es, m, nch, phases, gain, sub, run, peak_in, peak_out, v, acc,
                  bx, be, ub, pk, phases32, v32, acc32):
        nsb = (m - 11 + sub - 1) // sub
        per_run = max(1, run // sub)
        step = max(1, CHUNK_FRAMES // (sub * nch))  # sub-blocks per chunk: stays in cache
        for k0 in range(0, nsb, step):
            k1 = min(k0 + step, nsb)
            bounds(hx, xs, m, nch, sub, k0, k1, bx)
            bounds(he, es, m, nch, sub, k0, k1, be)
            for c in range(nch):
                peak_in[c] = input_pass(hx, xs, m, nch, c, phases, phases32, gain, sub, run,
                                        peak_in[c], k0, k1, bx, ub, pk, v, acc, v32, acc32)
                # output x + e: bounded by the input's own bound plus gain * max|e|
                for k in range(k0, k1):
                    ge = gain * be[k * nch + c]
                    ub[k] = min(gain * bx[k * nch + c] + ge, ub[k] + ge)
                k = k0
                while k < k1:
                    if ub[k] > peak_out[c]:
                        k2 = k + 1
                        while k2 < k1 and k2 - k < per_run and ub[k2] > peak_out[c]:
                            k2 += 1
                        run_peaks(hx, he, xs, es, nch, c, True, phases, 11 + k * sub,
                                  min(11 + k2 * sub, m), sub, v, acc, pk, k, 0.0)
                        for kk in range(k, k2):
                            peak_out[c] = max(peak_out[c], pk[kk])
                        k = k2
                    else:
                        k += 1

    return dual_peak
