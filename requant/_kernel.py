"""The one hot loop: dither, error-feedback noise shaping, quantization and
the integer cast, fused, for one block of frames.

This module holds no I/O, no validation and no argument handling. Callers
(:mod:`requant.quantize`) validate, allocate and carry the state. Everything
that passes from one sample to the next (error-feedback history, the
previous uniform draw of high-passed TPDF, the running sums) lives in arrays
that are passed in and updated in place, so that processing a file in blocks
gives the same bits as processing it whole.

Units inside the loop are LSBs of the target word length: ``v = x * scale``
with ``scale = 2**(bits-1)``, so a code ``k`` stands for ``k / scale``.

Dither is made from 64-bit words of one SFC64 generator per channel (Chris
Doty-Humphrey's Small Fast Chaotic generator, as in numpy.random.SFC64; the
state ``rng[c] = (a, b, c, counter)`` is passed in and out, and exactly one
word is drawn per sample and channel while dithering):

* ``rpdf``: the top 53 bits give a uniform ``u`` in [0, 1); dither ``u - 1/2``.
* ``tpdf``: the two 32-bit halves give two independent uniforms on a 2**-32
  grid; dither ``u1 - u2`` (triangular, 2 LSB peak to peak).
* ``tpdf-hp``: ``r[n] - r[n-1]`` with ``r = u - 1/2`` from the top 53 bits.
"""

import numpy as np

__all__ = [
    "DITHER_NONE",
    "DITHER_RPDF",
    "DITHER_TPDF",
    "DITHER_TPDF_HP",
    "ACC_FIELDS",
    "quantize_block",
    "quantize_block_py",
    "quantize_block_plain",
    "sfc64_next_py",
]

DITHER_NONE = 0
DITHER_RPDF = 1
DITHER_TPDF = 2
DITHER_TPDF_HP = 3

#: Columns of the per-channel accumulator array ``acc``.
ACC_FIELDS = (
    "sum_x2", "sum_e", "sum_e2", "clipped", "overloads", "over_full_scale", "nonfinite",
    "max_abs_e", "sum_x", "sum_xe",
)

_SH3 = np.uint64(3)
_SH11 = np.uint64(11)
_SH24 = np.uint64(24)
_SH32 = np.uint64(32)
_SH40 = np.uint64(40)
_ONE = np.uint64(1)
_LO32 = np.uint64(0xFFFFFFFF)
_TWO_M53 = 2.0**-53
_TWO_M32 = 2.0**-32


def sfc64_next_py(rng, c):
    """Advance channel ``c``'s SFC64 state in place and return its next word."""
    a = rng[c, 0]
    b = rng[c, 1]
    cc = rng[c, 2]
    w = rng[c, 3]
    tmp = a + b + w
    rng[c, 3] = w + _ONE
    rng[c, 0] = b ^ (b >> _SH11)
    rng[c, 1] = cc + (cc << _SH3)
    rng[c, 2] = ((cc << _SH24) | (cc >> _SH40)) + tmp
    return tmp


def quantize_block_py(x, rng, dither_mode, round_offset, h, hist, hp_prev,
                      scale, kmin, kmax, e_bound, shift, codes, err, acc):
    """Requantize one block; plain-Python twin of the compiled kernel.

    Parameters
    ----------
    x : ndarray, (frames, channels), float32 or float64, full scale 1.0
    rng : ndarray, (channels, 4), uint64; updated in place
        SFC64 state of each channel's dither generator.
    dither_mode : int
        One of ``DITHER_*``.
    round_offset : float
        0.5 for rounding (half up, mid-tread), 0.0 for truncation.
    h : ndarray, (K,), float64
        Error-feedback coefficients; NTF(z) = 1 - sum h_k z^-k. K may be 0.
    hist : ndarray, (channels, K), float64, LSB; updated in place
        Past loop errors, ``hist[c, 0]`` the most recent.
    hp_prev : ndarray, (channels,), float64; updated in place
        Previous uniform draw of high-passed TPDF.
    scale : float
        2**(bits-1).
    kmin, kmax : int
        Code range of the target word length.
    e_bound : float, LSB
        Bound on the fed-back error; larger errors (overload) are clamped.
    shift : int
        Left shift that places a code in its container.
    codes : ndarray, (frames, channels), int16 or int32; written
    err : ndarray, (frames, channels), float32, or shape (0, 0); written
        Error signal, output minus input, full scale 1.0.
    acc : ndarray, (channels, 10), float64; updated in place
        Running sums, columns as in :data:`ACC_FIELDS`.
    """
    n = x.shape[0]
    nch = x.shape[1]
    taps = h.shape[0]
    want_err = err.shape[0] == n
    inv_scale = 1.0 / scale
    fkmin = float(kmin)
    fkmax = float(kmax)
    for i in range(n):
        for c in range(nch):
            xs = np.float64(x[i, c])  # float() would keep float32 under numba
            if xs - xs != 0.0:
                # NaN or infinity: counted; the caller stops with an error
                acc[c, 6] += 1.0
                xs = 0.0
            v = xs * scale
            if xs > 1.0 or xs < -1.0:
                acc[c, 5] += 1.0
            # dither, in LSB
            if dither_mode == 0:
                d = 0.0
            elif dither_mode == 2:
                w = sfc64_next(rng, c)
                d = (float(np.int64(w >> _SH32)) - float(np.int64(w & _LO32))) * _TWO_M32
            elif dither_mode == 1:
                d = float(np.int64(sfc64_next(rng, c) >> _SH11)) * _TWO_M53 - 0.5
            else:
                r = float(np.int64(sfc64_next(rng, c) >> _SH11)) * _TWO_M53 - 0.5
                d = r - hp_prev[c]
                hp_prev[c] = r
            # error feedback
            fb = 0.0
            for k in range(taps):
                fb += h[k] * hist[c, k]
            u = v - fb
            q = np.floor(u + d + round_offset)
            if q > fkmax:
                q = fkmax
                acc[c, 3] += 1.0
            elif q < fkmin:
                q = fkmin
                acc[c, 3] += 1.0
            if taps > 0:
                e = q - u
                if e > e_bound:
                    e = e_bound
                    acc[c, 4] += 1.0
                elif e < -e_bound:
                    e = -e_bound
                    acc[c, 4] += 1.0
                for k in range(taps - 1, 0, -1):
                    hist[c, k] = hist[c, k - 1]
                hist[c, 0] = e
            eps = q - v
            acc[c, 0] += xs * xs
            acc[c, 8] += xs
            acc[c, 9] += xs * eps
            acc[c, 1] += eps
            acc[c, 2] += eps * eps
            if abs(eps) > acc[c, 7]:
                acc[c, 7] = abs(eps)
            codes[i, c] = int(q) << shift
            if want_err:
                err[i, c] = eps * inv_scale


# The plain twin calls the plain generator; the compiled kernel gets the
# compiled one (numba resolves the global at compile time).
sfc64_next = sfc64_next_py

_compiled = None


def quantize_block(*args):
    """Compiled :func:`quantize_block_py` (numba, cached on disk)."""
    global _compiled
    if _compiled is None:
        _compiled = _compile()
    return _compiled(*args)


def _compile():
    import numba

    global sfc64_next
    sfc64_next = numba.njit(inline="always", cache=True)(sfc64_next_py)
    fn = numba.njit(cache=True, nogil=True)(quantize_block_py)
    return fn


def quantize_block_plain(*args):
    """Run the plain twin with numpy's wrap-around warnings silenced.

    uint64 arithmetic wraps by design (SFC64); numpy scalars warn about it,
    compiled code does not.
    """
    global sfc64_next
    saved = sfc64_next
    sfc64_next = sfc64_next_py
    try:
        with np.errstate(over="ignore"):
            return quantize_block_py(*args)
    finally:
        sfc64_next = saved
