"""The resampler's hot loop: one block of output frames of a polyphase FIR.

For output frame ``k`` of a block (``k = 0..n-1``) and channel ``c``::

    t = t0 + k*M            position of the frame on the intermediate grid (L*rate_in),
                            counted from the first frame held in ``buf``, plus the delay
    q, p = divmod(t, L)     the newest input frame it uses, and the phase
    y = sum(table[p*K + j] * buf[c*stride + q - K + 1 + j]  for j = 0..K-1)

``table`` holds the ``L`` phases of the prototype lowpass, ``K`` taps each, in
reverse time order, so that the taps and the input are both read forwards
(:func:`requant.dsp.resample.design` builds it). The kernel has no state: the
caller keeps the input history and says where each block starts.

Fixed order
-----------
Every output sample is one fixed sum over the same ``K`` input samples: tap
``j`` goes to lane ``j % 8``, each lane adds its products in order of ``j``,
and the eight lanes are added left to right, ``((l0 + l1) + l2) + ... + l7``.
The result does not depend on where blocks start, which thread computes the
frame or which CPU runs it (no fused multiply-add, no reassociation: IEEE
float64 operations in one written order). The eight lanes are what the SLP
vectorizer puts side by side in one vector register (the family is compiled
with it); written this way (a left-to-right sum of the lanes) it uses the
widest registers, about 9-11 multiply-adds per nanosecond on one core of the
development machine, against 3.5 without the vectorizer and 6.5 when the
lanes were summed as a tree. ``K`` is padded to a multiple of 8 with zero taps.
The phase is stepped from frame to frame rather than divided out (15-25 %
faster). Tried and dropped: 16 lanes (half the speed: the vectorizer packs them
badly), both channels of a frame in one loop sharing the taps' loads (0.6x),
two frames of a channel in one loop (within the noise of one).

Buffers are flat: ``buf`` holds ``nch`` rows of ``stride`` input frames
(channel-major, float64), ``out`` is frame-interleaved (frame ``k`` of channel
``c`` at ``k*nch + c``). The same source compiles for raw pointers
(:mod:`requant.dsp.native`) and runs as a plain-Python twin on arrays (the
tests compare the two). No I/O, no validation, no allocation.
"""

from requant.dsp.native import plain_twin

__all__ = ["LANES", "SIGNATURE", "build", "resample_block_plain"]

#: Taps summed side by side; the taps per phase are a multiple of it.
LANES = 8

#: The kernel's arguments, in order, declared once for :mod:`requant.dsp.native`: name,
#: type code, and for an array the least number of elements it must hold, for a scalar a
#: condition it must meet. The conditions keep every read inside ``buf``: the first frame
#: read is ``t0 // L - K + 1 >= 0`` and the last ``(t0 + (n-1)*M) // L < stride``.
SIGNATURE = (
    ("buf", "f64*", "nch * stride"),
    ("stride", "i64", "stride >= 1"),
    ("nch", "i64", "nch >= 1"),
    ("table", "f64*", "L * K"),
    ("L", "i64", "L >= 1"),
    ("K", "i64", "K >= 8 and K % 8 == 0"),
    ("M", "i64", "M >= 1"),
    ("t0", "i64", "t0 >= (K - 1) * L"),
    ("n", "i64", "n >= 0 and (n == 0 or (t0 + (n - 1) * M) // L < stride)"),
    ("out", "f64*", "n * nch"),
)


def build(jit=None):
    """Return the block kernel, its dot product compiled by ``jit``.

    Parameters
    ----------
    jit : callable, optional
        Decorator for the helper (numba's ``njit(inline="always")``); ``None``
        gives the plain-Python twin.

    Returns
    -------
    callable
        ``resample_block(buf, stride, nch, table, L, K, M, t0, n, out)``:

        buf : float64 [nch*stride], the input history, one row per channel
        stride : int, frames per row of ``buf``
        table : float64 [L*K], phase ``p`` at ``p*K``, taps in reverse time order
        L, M : int, the ratio rate_out/rate_in = L/M in lowest terms
        K : int, taps per phase, a multiple of :data:`LANES`
        t0 : int, ``k0*M + delay - first*L`` for the block's first output frame
            ``k0`` and the absolute index ``first`` of ``buf``'s first frame
        n : int, output frames to compute
        out : float64 [n*nch]; written, frame-interleaved
    """
    wrap = (lambda f: f) if jit is None else jit

    def dot(table, h, buf, b, K):
        a0 = a1 = a2 = a3 = a4 = a5 = a6 = a7 = 0.0
        for j in range(0, K, 8):
            a0 += table[h + j] * buf[b + j]
            a1 += table[h + j + 1] * buf[b + j + 1]
            a2 += table[h + j + 2] * buf[b + j + 2]
            a3 += table[h + j + 3] * buf[b + j + 3]
            a4 += table[h + j + 4] * buf[b + j + 4]
            a5 += table[h + j + 5] * buf[b + j + 5]
            a6 += table[h + j + 6] * buf[b + j + 6]
            a7 += table[h + j + 7] * buf[b + j + 7]
        return ((((((a0 + a1) + a2) + a3) + a4) + a5) + a6) + a7

    dot = wrap(dot)

    def resample_block(buf, stride, nch, table, L, K, M, t0, n, out):
        q = t0 // L  # the newest input frame of output frame k, and its phase p
        p = t0 - q * L
        mq = M // L  # stepped by M / L per output frame: no division in the loop
        mp = M - mq * L
        for k in range(n):
            s = q - K + 1
            h = p * K
            for c in range(nch):
                out[k * nch + c] = dot(table, h, buf, c * stride + s, K)
            p += mp
            q += mq
            if p >= L:
                p -= L
                q += 1

    return resample_block


#: The plain-Python twin of the compiled kernel, for tests (small inputs).
resample_block_plain = plain_twin(build)
