"""The one hot loop: dither, error-feedback noise shaping, quantization and
the integer cast, fused, for one block of frames.

This module holds no I/O, no validation and no argument handling. Callers
(:mod:`requant.dsp.quantizer`, through :mod:`requant.dsp.native`) validate, allocate and
carry the state. Everything that passes from one sample to the next (the
generator states, the feedback partial sums, the previous uniform draw of
high-passed TPDF, the running sums) lives in arrays that are passed in and
updated in place, so that processing a file in blocks gives the same bits as
processing it whole.

All buffers are flat: frame ``i`` of channel ``c`` is element ``i*nch + c``.
The same source therefore compiles for raw pointers (the machine code that
:mod:`requant.dsp.native` caches and loads without numba) and for 1-D arrays (the
plain-Python twin the tests run, and the numba fallback).

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

Arithmetic, in this order (it defines the output bits)::

    q   = floor((v + (d + offset)) - fb)      offset 1/2 rounds, 0 truncates
    e   = q - (v - fb)                        loop error, clamped to +-e_bound
    eps = q - v                               the error signal, in LSB
    fb' = sum_k h[k] e[n-k], oldest term first, h[0]*e[n] added last

Digital silence (``sil_len > 0``): a run of at least ``sil_len`` exact zeros in
one channel is written as exact zeros, with no dither and no error, and the
shaping filter's history and the high-pass dither's memory are cleared in it,
so that the first sample after it starts from a clean state. Whether a zero
starts such a run is decided at its first sample by looking ahead: the
``m`` frames after the ``n`` to be processed (a trailing run of zeros still
shorter than ``sil_len``, which the caller holds back) hold the rest of the
run. The decision for a run in progress is carried between calls in ``zs``
(0 no run, 1 silent run, 2 a run too short), so blocks of any size give the
same bits: a sample is kept silent exactly when it lies in a run of at least
``sil_len`` zeros (the file's ends bound a run). The generator still advances
one word per sample inside a silent run.
(:meth:`requant.dsp.quantizer.Requantizer.silent_mask` says which samples were
kept silent, from the same rule.)

Speed: the error feedback is a chain from one sample to the next, so its
latency, not its arithmetic, sets the pace. The newest error enters the
feedback last (one multiply and one add on the chain); the older terms are
summed while the chain runs. The running sums and generator states stay in
registers for the whole block, past errors sit in a doubled ring (no
wrap-around test, two stores per sample), channels go two at a time so that
two independent chains overlap in the core, and callers build one kernel per
tap count so that the compiler unrolls the sum. The family is compiled with
LLVM's SLP vectorizer (:data:`requant.dsp.native.KERNELS`), which pairs some of
the two channels' operations: the same bits, 8 % less time for the 9-tap kernel
on 20 minutes of stereo (0.87 s against 0.95 s, 2-core VM). Holding the past
errors in registers instead of the ring was tried and gained nothing (0.94 s).
"""

import numpy as np

from requant.dsp.native import plain_twin

__all__ = [
    "DITHER_NONE",
    "DITHER_RPDF",
    "DITHER_TPDF",
    "DITHER_TPDF_HP",
    "ACC_FIELDS",
    "SIGNATURE",
    "build",
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
    "max_abs_e", "sum_x", "sum_xe", "silent",
)
_NACC = len(ACC_FIELDS)

#: The block kernel's arguments, in order, declared once for :mod:`requant.dsp.native`:
#: name, type code (``"f32*|f64*"``: the dtype is chosen per compiled kernel), and for an
#: array the least number of elements it must hold, for a scalar a condition it must meet,
#: as expressions in the scalar arguments and ``taps``, the tap count :func:`build` was
#: given. See :func:`build` for what each argument means.
SIGNATURE = (
    ("x", "f32*|f64*", "(n + m) * nch"),
    ("n", "i64", "n >= 0"),
    ("m", "i64", "m >= 0"),
    ("nch", "i64", "nch >= 0"),
    ("rng", "u64*", "4 * nch"),
    ("mode", "i64", "0 <= mode <= 3"),
    ("offset", "f64", None),
    ("h", "f64*", "ntaps"),
    ("ntaps", "i64", "ntaps == taps"),
    ("fbs", "f64*", "nch * (2 * ntaps + 1)"),
    ("hp_prev", "f64*", "nch"),
    ("scale", "f64", None),
    ("inv_scale", "f64", None),
    ("kmin", "i64", None),
    ("kmax", "i64", None),
    ("e_bound", "f64", None),
    ("shift", "i64", "0 <= shift < 32"),
    ("codes", "i16*|i32*", "n * nch"),
    ("err", "f32*", "n * nch if want_err else 0"),
    ("want_err", "i64", None),
    ("acc", "f64*", f"{_NACC} * nch"),
    ("sil_len", "i64", "sil_len >= 0"),
    ("zs", "i64*", "nch"),
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


def sfc64_next_py(a, b, c, w):
    """One SFC64 step: return ``(word, a, b, c, w)`` with the advanced state."""
    tmp = a + b + w
    return (tmp, b ^ (b >> _SH11), c + (c << _SH3), ((c << _SH24) | (c >> _SH40)) + tmp,
            w + _ONE)


def build(jit=None, taps=None):
    """Return the block kernel, its helpers compiled by ``jit``.

    Parameters
    ----------
    jit : callable, optional
        Decorator applied to the per-sample helpers (numba's
        ``njit(inline="always")``); ``None`` gives the plain-Python twin.
    taps : int, optional
        Build for this many feedback taps only: the compiler then unrolls the
        feedback sum (about a fifth faster for 9 taps). The kernel's own
        ``taps`` argument must then equal it. ``None`` takes any number.

    Returns
    -------
    callable
        ``quantize_block(x, n, m, nch, rng, mode, offset, h, taps, fbs, hp_prev,
        scale, inv_scale, kmin, kmax, e_bound, shift, codes, err, want_err,
        acc, sil_len, zs)``, all buffers flat:

        x : float32 or float64 [(n+m)*nch], full scale 1.0: the ``n`` frames
            to requantize, then ``m`` frames of look-ahead (read only to find
            runs of digital silence)
        rng : uint64 [nch*4], SFC64 states; updated
        mode : int, one of ``DITHER_*``
        offset : float, 0.5 to round (half up), 0.0 to truncate
        h : float64 [max(taps, 1)], NTF(z) = 1 - sum h[k] z^-(k+1)
        fbs : float64 [nch*(2*taps+1)], LSB; updated. Per channel: the
            feedback for the next sample, then the last ``taps`` loop errors,
            newest first, twice over (a ring read without wrapping)
        hp_prev : float64 [nch]; updated
        scale, inv_scale : float, 2**(bits-1) and its inverse
        kmin, kmax : int, code range
        e_bound : float, LSB, bound on the fed-back error
        shift : int, left shift into the container
        codes : int16 or int32 [n*nch]; written
        err : float32 [n*nch] when ``want_err``; written, output minus input
        acc : float64 [nch*11], columns as :data:`ACC_FIELDS`; updated
        sil_len : int, frames; runs of this many exact zeros or more stay
            silent; 0 dithers everything. Keeping silence costs little on
            audio without zeros: the plain loop runs until the first frame that
            holds one (a test on values already loaded), and the loop that
            keeps silence takes over from there.
        zs : int64 [nch], the silence decision of the run in progress; updated
    """
    wrap = (lambda f: f) if jit is None else jit
    sfc64 = wrap(sfc64_next_py)
    fixed_taps = -1 if taps is None else int(taps)  # a constant to the compiler

    def sample(xs, st, mode, offset, h, taps, fbs, fo, scale, fkmin, fkmax, e_bound, acc, ao):
        # one sample of one channel; st = (a, b, c, w, hp, fb, sx2, se, se2, me, sx, sxe)
        a, b, c, w, hp, fb, pos, sx2, se, se2, me, sx, sxe = st
        if not abs(xs) <= 1.0:  # one test on the common path
            if xs - xs != 0.0:
                # NaN or infinity: counted; the caller stops with an error
                acc[ao + 6] += 1.0
                xs = 0.0
            else:
                acc[ao + 5] += 1.0
        v = xs * scale
        if mode == 0:
            d = 0.0
        else:
            word, a, b, c, w = sfc64(a, b, c, w)
            if mode == 2:
                d = (float(np.int64(word >> _SH32)) - float(np.int64(word & _LO32))) * _TWO_M32
            elif mode == 1:
                d = float(np.int64(word >> _SH11)) * _TWO_M53 - 0.5
            else:
                r = float(np.int64(word >> _SH11)) * _TWO_M53 - 0.5
                d = r - hp
                hp = r
        q = np.floor((v + (d + offset)) - fb)
        if q > fkmax:
            q = fkmax
            acc[ao + 3] += 1.0
        elif q < fkmin:
            q = fkmin
            acc[ao + 3] += 1.0
        if taps > 0:
            e = q - (v - fb)
            if e > e_bound:
                e = e_bound
                acc[ao + 4] += 1.0
            elif e < -e_bound:
                e = -e_bound
                acc[ao + 4] += 1.0
            # ring[pos + k] = e[n-1-k]; the next feedback sums the older terms, oldest
            # first, and adds the newest, h[0]*e, last
            if taps > 1:
                r = h[taps - 1] * fbs[fo + pos + taps - 2]
                for k in range(taps - 2, 0, -1):
                    r += h[k] * fbs[fo + pos + k - 1]
                fb = r + h[0] * e
            else:
                fb = h[0] * e
            pos -= 1
            if pos < 0:
                pos += taps
            fbs[fo + pos] = e
            fbs[fo + pos + taps] = e
        eps = q - v
        sx2 += xs * xs
        sx += xs
        sxe += xs * eps
        se += eps
        se2 += eps * eps
        ae = abs(eps)
        if ae > me:
            me = ae
        return q, eps, (a, b, c, w, hp, fb, pos, sx2, se, se2, me, sx, sxe)

    sample = wrap(sample)

    def silent(st, mode, taps, fbs, fo, acc, ao):
        # one sample of a silent run: code 0, error 0, the loop's memory cleared
        a, b, c, w, hp, fb, pos, sx2, se, se2, me, sx, sxe = st
        if mode != 0:
            word, a, b, c, w = sfc64(a, b, c, w)  # one word per sample, as ever
        for k in range(2 * taps):
            fbs[fo + k] = 0.0
        acc[ao + 10] += 1.0
        return (a, b, c, w, 0.0, 0.0, 0, sx2, se, se2, me, sx, sxe)

    silent = wrap(silent)

    def run_decision(x, i, n, m, nch, c, sil_len):
        # at the first zero of a run: 1 when at least sil_len zeros follow from here
        count = 0
        k = i
        while k < n + m and count < sil_len:
            if x[k * nch + c] != 0.0:
                break
            count += 1
            k += 1
        return 1 if count >= sil_len else 2

    run_decision = wrap(run_decision)

    def one(x, i, n, m, nch, c, xs, st, z, mode, offset, h, taps, fbs, fo, scale, fkmin, fkmax,
            e_bound, acc, ao, sil_len):
        # a sample, silent or not; z is the channel's silence decision
        if sil_len > 0:
            if xs == 0.0:
                if z == 0:
                    z = run_decision(x, i, n, m, nch, c, sil_len)
                if z == 1:
                    return 0.0, 0.0, silent(st, mode, taps, fbs, fo, acc, ao), z
            else:
                z = 0
        q, e, st = sample(xs, st, mode, offset, h, taps, fbs, fo, scale, fkmin, fkmax, e_bound,
                          acc, ao)
        return q, e, st, z

    one = wrap(one)

    def load(c, rng, hp_prev, fbs, taps, acc):
        ao = c * _NACC
        fb = fbs[c * (2 * taps + 1)] if taps > 0 else 0.0
        return (rng[4 * c], rng[4 * c + 1], rng[4 * c + 2], rng[4 * c + 3], hp_prev[c], fb, 0,
                acc[ao], acc[ao + 1], acc[ao + 2], acc[ao + 7], acc[ao + 8], acc[ao + 9])

    load = wrap(load)

    def store(st, c, rng, hp_prev, fbs, taps, acc):
        a, b, cc, w, hp, fb, pos, sx2, se, se2, me, sx, sxe = st
        rng[4 * c] = a
        rng[4 * c + 1] = b
        rng[4 * c + 2] = cc
        rng[4 * c + 3] = w
        hp_prev[c] = hp
        if taps > 0:
            base = c * (2 * taps + 1)
            fbs[base] = fb
            # turn the ring back to position 0 for the next block
            for k in range(taps):
                fbs[base + 1 + k] = fbs[base + 1 + pos + k]
            for k in range(taps):
                fbs[base + 1 + taps + k] = fbs[base + 1 + k]
        ao = c * _NACC
        acc[ao] = sx2
        acc[ao + 1] = se
        acc[ao + 2] = se2
        acc[ao + 7] = me
        acc[ao + 8] = sx
        acc[ao + 9] = sxe

    store = wrap(store)

    def pair(x, i0, n, nch, c, s0, s1, mode, offset, h, taps, fbs, fo0, fo1, scale, fkmin,
             fkmax, e_bound, acc, ao0, ao1, shift, codes, err, inv_scale, want_err, watch):
        # frames i0..n-1 of two channels at once: their feedback chains overlap. With
        # watch, it stops before the first frame where one of them is zero (or their
        # product underflows to zero: then the loop that keeps silence decides) and
        # returns its index; else n
        for i in range(i0, n):
            j = i * nch + c
            xs0 = np.float64(x[j])
            xs1 = np.float64(x[j + 1])
            if watch and xs0 * xs1 == 0.0:
                return s0, s1, i
            q0, e0, s0 = sample(xs0, s0, mode, offset, h, taps, fbs, fo0, scale, fkmin, fkmax,
                                e_bound, acc, ao0)
            q1, e1, s1 = sample(xs1, s1, mode, offset, h, taps, fbs, fo1, scale, fkmin, fkmax,
                                e_bound, acc, ao1)
            codes[j] = int(q0) << shift
            codes[j + 1] = int(q1) << shift
            if want_err:
                err[j] = e0 * inv_scale
                err[j + 1] = e1 * inv_scale
        return s0, s1, n

    pair = wrap(pair)

    def pair_keeping(x, i0, n, m, nch, c, s0, s1, z0, z1, mode, offset, h, taps, fbs, fo0,
                     fo1, scale, fkmin, fkmax, e_bound, acc, ao0, ao1, shift, codes, err,
                     inv_scale, want_err, sil_len):
        # as pair, keeping runs of digital silence silent, from frame i0 on
        for i in range(i0, n):
            j = i * nch + c
            xs0 = np.float64(x[j])
            xs1 = np.float64(x[j + 1])
            if xs0 == 0.0 or xs1 == 0.0:
                q0, e0, s0, z0 = one(x, i, n, m, nch, c, xs0, s0, z0, mode, offset, h, taps,
                                     fbs, fo0, scale, fkmin, fkmax, e_bound, acc, ao0, sil_len)
                q1, e1, s1, z1 = one(x, i, n, m, nch, c + 1, xs1, s1, z1, mode, offset, h,
                                     taps, fbs, fo1, scale, fkmin, fkmax, e_bound, acc, ao1,
                                     sil_len)
            else:  # the common path: no zero, so no run in progress
                q0, e0, s0 = sample(xs0, s0, mode, offset, h, taps, fbs, fo0, scale, fkmin,
                                    fkmax, e_bound, acc, ao0)
                q1, e1, s1 = sample(xs1, s1, mode, offset, h, taps, fbs, fo1, scale, fkmin,
                                    fkmax, e_bound, acc, ao1)
                z0 = 0
                z1 = 0
            codes[j] = int(q0) << shift
            codes[j + 1] = int(q1) << shift
            if want_err:
                err[j] = e0 * inv_scale
                err[j + 1] = e1 * inv_scale
        return s0, s1, z0, z1

    pair_keeping = wrap(pair_keeping)

    def single(x, n, m, nch, c, s0, z0, mode, offset, h, taps, fbs, fo0, scale, fkmin, fkmax,
               e_bound, acc, ao0, shift, codes, err, inv_scale, want_err, sil_len):
        # the last channel of an odd count
        for i in range(n):
            j = i * nch + c
            xs0 = np.float64(x[j])
            if sil_len > 0 and xs0 == 0.0:
                q0, e0, s0, z0 = one(x, i, n, m, nch, c, xs0, s0, z0, mode, offset, h, taps,
                                     fbs, fo0, scale, fkmin, fkmax, e_bound, acc, ao0, sil_len)
            else:
                q0, e0, s0 = sample(xs0, s0, mode, offset, h, taps, fbs, fo0, scale, fkmin,
                                    fkmax, e_bound, acc, ao0)
                z0 = 0
            codes[j] = int(q0) << shift
            if want_err:
                err[j] = e0 * inv_scale
        return s0, z0

    single = wrap(single)

    def quantize_block(x, n, m, nch, rng, mode, offset, h, ntaps, fbs, hp_prev, scale,
                       inv_scale, kmin, kmax, e_bound, shift, codes, err, want_err, acc, sil_len,
                       zs):
        taps = ntaps if fixed_taps < 0 else fixed_taps
        fkmin = float(kmin)
        fkmax = float(kmax)
        keeping = sil_len > 0
        c = 0
        while c < nch:
            s0 = load(c, rng, hp_prev, fbs, taps, acc)
            fo0 = c * (2 * taps + 1) + 1
            ao0 = c * _NACC
            if c + 1 < nch:
                s1 = load(c + 1, rng, hp_prev, fbs, taps, acc)
                fo1 = fo0 + 2 * taps + 1
                ao1 = ao0 + _NACC
                i = 0
                if not keeping or (zs[c] == 0 and zs[c + 1] == 0):
                    # no run in progress: the plain loop, up to the first zero if keeping
                    s0, s1, i = pair(x, 0, n, nch, c, s0, s1, mode, offset, h, taps, fbs, fo0,
                                     fo1, scale, fkmin, fkmax, e_bound, acc, ao0, ao1, shift,
                                     codes, err, inv_scale, want_err, keeping)
                    if n > 0:  # the samples so far were non-zero: no run in progress
                        zs[c] = 0
                        zs[c + 1] = 0
                if i < n:  # keeping silence, from the first zero (or a run carried over)
                    s0, s1, z0, z1 = pair_keeping(x, i, n, m, nch, c, s0, s1, zs[c], zs[c + 1],
                                                  mode, offset, h, taps, fbs, fo0, fo1, scale,
                                                  fkmin, fkmax, e_bound, acc, ao0, ao1, shift,
                                                  codes, err, inv_scale, want_err, sil_len)
                    zs[c] = z0
                    zs[c + 1] = z1
                store(s1, c + 1, rng, hp_prev, fbs, taps, acc)
                step = 2
            else:
                s0, z0 = single(x, n, m, nch, c, s0, zs[c], mode, offset, h, taps, fbs, fo0,
                                scale, fkmin, fkmax, e_bound, acc, ao0, shift, codes, err,
                                inv_scale, want_err, sil_len if keeping else 0)
                if keeping or n > 0:
                    zs[c] = z0
                step = 1
            store(s0, c, rng, hp_prev, fbs, taps, acc)
            c += step

    return quantize_block


#: The plain-Python twin of the compiled kernel, for tests (small inputs). uint64 arithmetic
#: wraps by design (SFC64) and inf - inf is how NaN/inf are found: numpy scalars warn about
#: both, compiled code does not, so the twin is quiet.
quantize_block_plain = plain_twin(build, quiet=True)
