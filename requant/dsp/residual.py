"""The audit's hot loop: a delivery's error against its aligned master, and its sums.

For one block of frames this computes, in LSBs of the delivery's word length::

    k = codes >> shift        the delivered code (int32 container, left-justified)
    x = gain * m              the aligned master, scaled by the fitted gain, in LSB
    e = k - x                 the error

A sample is *clipped* when its code sits at a rail (``kmin`` or ``kmax``) and
``x`` lies beyond that rail: it is counted, written as 0 in ``e_out`` and left
out of every sum. Everything else is summed per window of ``win`` frames and
channel (:data:`WSUM_FIELDS`), and the smallest and largest error per channel
are kept (:data:`ACC_FIELDS`), so the caller gets every time-domain figure of
the audit from one pass over the samples. ``e_out`` receives the error in full
scale (float32) for the streaming spectral analysis
(:class:`requant.dsp.analysis.ErrorAnalyzer`).

Buffers are flat, frame ``i`` of channel ``c`` at ``i*nch + c``, so the same
source compiles for raw pointers (:mod:`requant.dsp.native`) and runs as a
plain-Python twin on arrays (the tests compare the two). No I/O, no
validation, no allocation.
"""

import numpy as np

from requant.dsp.native import plain_twin

__all__ = ["WSUM_FIELDS", "ACC_FIELDS", "SIGNATURE", "build", "residual_block_plain"]

#: Per window and channel (``wsum[(w*nch + c)*6 + field]``), LSB units: the samples
#: counted (not clipped), Σx, Σe, Σxe, Σx², Σe².
WSUM_FIELDS = ("n", "sum_x", "sum_e", "sum_xe", "sum_x2", "sum_e2")
#: Per channel (``acc[c*3 + field]``), carried from block to block: clipped samples,
#: the smallest and the largest error (LSB) among the samples not clipped.
ACC_FIELDS = ("clipped", "min_e", "max_e")
_NW = len(WSUM_FIELDS)
_NA = len(ACC_FIELDS)

#: The kernel's arguments, in order, declared once for :mod:`requant.dsp.native`: name,
#: type code (``"f32*|f64*"``: the dtype is chosen per compiled kernel), and for an array
#: the least number of elements it must hold, for a scalar a condition it must meet.
SIGNATURE = (
    ("m", "f32*|f64*", "n * nch"),
    ("codes", "i32*", "n * nch"),
    ("n", "i64", "n >= 0"),
    ("nch", "i64", "nch >= 1"),
    ("shift", "i64", "0 <= shift < 32"),
    ("gain", "f64", None),
    ("inv_scale", "f64", None),
    ("kmin", "i64", None),
    ("kmax", "i64", None),
    ("win", "i64", "win >= 1"),
    ("e_out", "f32*", "n * nch"),
    ("wsum", "f64*", f"{_NW} * nch * ((n + win - 1) // win)"),
    ("acc", "f64*", f"{_NA} * nch"),
)


def build(jit=None):
    """Return the block kernel, its per-sample helper compiled by ``jit``.

    Parameters
    ----------
    jit : callable, optional
        Decorator for the helper (numba's ``njit(inline="always")``); ``None``
        gives the plain-Python twin.

    Returns
    -------
    callable
        ``residual_block(m, codes, n, nch, shift, gain, inv_scale, kmin, kmax,
        win, e_out, wsum, acc)``, all buffers flat:

        m : float32 or float64 [n*nch], the aligned master, full scale 1.0
        codes : int32 [n*nch], the delivered codes, left-justified
        shift : int, ``32 - word_length``
        gain : float, the fitted gain times ``2**(word_length-1)`` (master
            full scale to delivery LSB)
        inv_scale : float, ``2**-(word_length-1)``
        kmin, kmax : int, the rails of the word length
        win : int, frames per window of the sums (the block starts a window)
        e_out : float32 [n*nch]; written, full scale (0 where clipped)
        wsum : float64 [6*nch*ceil(n/win)]; written, :data:`WSUM_FIELDS`
        acc : float64 [3*nch]; updated, :data:`ACC_FIELDS`

    Notes
    -----
    Channels go two at a time, so the frame loop reads its buffers in order
    and twice as many independent sums overlap in the core; the extremes are
    kept with ``min``/``max`` (no branch), and the clip test is a branch that
    is almost never taken.
    """
    wrap = (lambda f: f) if jit is None else jit

    def one(m, codes, j, shift, gain, inv_scale, fkmin, fkmax, e_out, st):
        cnt, sx, se, sxe, sx2, se2, lo, hi, clipped = st
        k = float(codes[j] >> shift)
        x = gain * np.float64(m[j])
        e = k - x
        if (k >= fkmax and x > fkmax) or (k <= fkmin and x < fkmin):
            e_out[j] = 0.0
            return cnt, sx, se, sxe, sx2, se2, lo, hi, clipped + 1.0
        e_out[j] = e * inv_scale
        return (cnt + 1.0, sx + x, se + e, sxe + x * e, sx2 + x * x, se2 + e * e, min(lo, e),
                max(hi, e), clipped)

    one = wrap(one)

    def load(acc, c):
        return 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, acc[c * _NA + 1], acc[c * _NA + 2], acc[c * _NA]

    load = wrap(load)

    def store(wsum, acc, st, o, c):
        cnt, sx, se, sxe, sx2, se2, lo, hi, clipped = st
        wsum[o] = cnt
        wsum[o + 1] = sx
        wsum[o + 2] = se
        wsum[o + 3] = sxe
        wsum[o + 4] = sx2
        wsum[o + 5] = se2
        acc[c * _NA] = clipped
        acc[c * _NA + 1] = lo
        acc[c * _NA + 2] = hi

    store = wrap(store)

    def residual_block(m, codes, n, nch, shift, gain, inv_scale, kmin, kmax, win, e_out, wsum,
                       acc):
        fkmin = float(kmin)
        fkmax = float(kmax)
        nwin = (n + win - 1) // win
        c = 0
        while c < nch:
            pair = c + 1 < nch
            for w in range(nwin):
                s0 = load(acc, c)
                s1 = load(acc, c + 1) if pair else s0
                for i in range(w * win, min((w + 1) * win, n)):
                    j = i * nch + c
                    s0 = one(m, codes, j, shift, gain, inv_scale, fkmin, fkmax, e_out, s0)
                    if pair:
                        s1 = one(m, codes, j + 1, shift, gain, inv_scale, fkmin, fkmax, e_out,
                                 s1)
                store(wsum, acc, s0, (w * nch + c) * _NW, c)
                if pair:
                    store(wsum, acc, s1, (w * nch + c + 1) * _NW, c + 1)
            c += 2 if pair else 1

    return residual_block


#: The plain-Python twin of the compiled kernel, for tests (small inputs).
residual_block_plain = plain_twin(build)
