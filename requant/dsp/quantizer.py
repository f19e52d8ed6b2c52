"""Array API: requantize sample blocks with dither and noise shaping.

:class:`Requantizer` holds everything carried from one block to the next
(one random generator per channel, error-feedback history, high-pass dither
memory, running sums) and hands each block to the compiled kernel in
:mod:`requant.dsp.kernel`. Feeding a signal in blocks of any size gives the same
bits as feeding it whole.

Conventions
-----------
Full scale is 1.0 and one LSB at ``bits`` is ``delta = 2**-(bits-1)``. Codes
run from ``-2**(bits-1)`` to ``2**(bits-1) - 1``.

* ``round``: mid-tread, ``k = floor(x/delta + 1/2)``. Ties (exactly half an
  LSB) go up, toward plus infinity: +0.5 LSB -> 1, -0.5 LSB -> 0,
  -1.5 LSB -> -1. This is the textbook mid-tread form, not numpy's
  round-half-to-even.
* ``truncate``: ``k = floor(x/delta)``, toward minus infinity, as dropping the
  low bits of a two's-complement word does.
"""

import functools
import math
import secrets
from typing import NamedTuple

import numpy as np

from requant.dsp import kernel as _kernel
from requant.dsp import native
from requant.errors import UsageError
from requant.recipe import DITHERS, QUANTIZERS, Recipe, check_dither_in_loop

#: Column of the kernel's accumulator that counts samples kept silent.
_SILENT = _kernel.ACC_FIELDS.index("silent")

__all__ = [
    "QUANTIZERS",
    "DITHERS",
    "DitherModel",
    "DITHER_MODELS",
    "DITHER_POWER_LSB2",
    "Requantizer",
    "requantize",
    "predicted_error_power_lsb2",
    "error_spectrum_lsb2",
    "error_pdf",
    "new_seed",
    "lsb",
]


class DitherModel(NamedTuple):
    """How one dither is made in the kernel and what theory predicts of it.

    Attributes
    ----------
    mode : int
        The kernel's code for it (:mod:`requant.dsp.kernel`).
    power_lsb2 : float, LSB²
        Mean-square total error with an ideal rounding quantizer (busy input).
    pdf : {'none', 'uniform', 'triangular'}
        The dither's own amplitude distribution (the total error's is this
        convolved with the uniform rounding error).
    spectrum_lsb2 : tuple of float, LSB²
        The total error's power spectrum, unshaped, as a cosine series:
        ``S(ω) = Σ_j c_j·cos(j·ω)`` (ω = 2π·f/fs), scaled so that its mean over
        0..π is the power: ``c_0 == power_lsb2``. One term for a white error.

    Notes
    -----
    High-passed TPDF, ``ν[n] = r[n] − r[n−1]`` with ``r`` uniform over one
    LSB: the total error is the requantization error of the dithered signal
    (white, Δ²/12) plus the dither itself, whose spectrum is
    ``(Δ²/12)·|1 − e^{−jω}|² = (Δ²/12)·2(1 − cos ω)``; the two are
    uncorrelated at every lag, because each is conditioned on one uniform
    draw that smooths the other (the RPDF first-moment property of
    nonsubtractive dither, Lipshitz, Wannamaker & Vanderkooy 1992). So
    ``S(ω) = 1/4 − (1/6)·cos ω`` LSB²: Δ²/12 at DC, 5Δ²/12 at Nyquist, Δ²/4
    in all (REFERENCES.md §2, §9).
    """

    mode: int
    power_lsb2: float
    pdf: str
    spectrum_lsb2: tuple = ()


#: Every dither of :data:`requant.recipe.DITHERS`: its kernel mode and its model.
#: Lipshitz, Wannamaker & Vanderkooy (1992), JAES 40(5): none 1/12 (busy signal),
#: RPDF 1/6 (averaged over input), TPDF 1/4 (for every input), each white; high-passed
#: TPDF r[n] - r[n-1] has the marginal of TPDF and the same total power, 1/4, but its
#: spectrum rises from Δ²/12 at DC to 5Δ²/12 at Nyquist (see DitherModel).
DITHER_MODELS = {
    "none": DitherModel(_kernel.DITHER_NONE, 1.0 / 12.0, "none", (1.0 / 12.0,)),
    "rpdf": DitherModel(_kernel.DITHER_RPDF, 1.0 / 6.0, "uniform", (1.0 / 6.0,)),
    "tpdf": DitherModel(_kernel.DITHER_TPDF, 0.25, "triangular", (0.25,)),
    "tpdf-hp": DitherModel(_kernel.DITHER_TPDF_HP, 0.25, "triangular", (0.25, -1.0 / 6.0)),
}
if tuple(DITHER_MODELS) != DITHERS:  # a dither named in one place only is a bug, not a default
    raise ImportError(f"requant.recipe.DITHERS {DITHERS} and DITHER_MODELS "
                      f"{tuple(DITHER_MODELS)} disagree; give every dither a model")
if any(m.spectrum_lsb2[0] != m.power_lsb2 for m in DITHER_MODELS.values()):
    raise ImportError("a DitherModel's spectrum must average to its power (c_0 == power_lsb2)")

#: Mean-square error of each dither with an ideal rounding quantizer, in LSB².
DITHER_POWER_LSB2 = {name: m.power_lsb2 for name, m in DITHER_MODELS.items()}

#: Bound on the fed-back error in the shaping loop, in LSB. In normal
#: operation |e| <= 1.5 (round + TPDF) or 2 (truncate + TPDF); anything larger
#: comes from a clipped code and would make the loop run away.
E_BOUND_LSB = 2.0


@functools.cache
def compiled_kernel(x_dtype, code_dtype, taps):
    """The compiled block kernel for float32/float64 input, int16/int32 codes and
    ``taps`` feedback taps (one machine-code kernel per combination, built on
    first use and cached; its arguments are declared in
    :data:`requant.dsp.kernel.SIGNATURE` and checked on every call; see
    :mod:`requant.dsp.native`)."""
    return native.kernel("quantize", x=x_dtype, codes=code_dtype, taps=taps)


def lsb(bits):
    """One LSB at word length ``bits``, full scale 1.0: 2**-(bits-1)."""
    return 2.0 ** -(bits - 1)


def new_seed():
    """A fresh 63-bit seed (recorded in reports so a run can be repeated)."""
    return secrets.randbits(63)


def _ntf(coeffs):
    """The noise transfer function's taps n = [1, −h_1, …, −h_K]."""
    return np.concatenate(([1.0], -np.asarray(coeffs, dtype=np.float64).reshape(-1)))


def predicted_error_power_lsb2(quantizer, dither, coeffs=()):
    """Predicted mean-square error per sample, in LSB².

    Parameters
    ----------
    quantizer : {'round', 'truncate'}
    dither : {'none', 'rpdf', 'tpdf', 'tpdf-hp'}
    coeffs : sequence of float
        Error-feedback coefficients h_k; the noise transfer function is
        n = [1, -h_1, ..., -h_K].

    Returns
    -------
    float
        ``Σ_j c_j·ρ_j + (bias * sum(n_k))**2``, where ``c_j`` is the dither's
        spectrum as a cosine series (:attr:`DitherModel.spectrum_lsb2`),
        ``ρ_j = Σ_k n_k·n_{k+j}`` the autocorrelation of the NTF's taps and
        ``bias`` −1/2 for truncation, 0 for rounding. For a white dither this
        is ``P_d * sum(n_k**2)`` with ``P_d`` its rounding power (1/12, 1/6,
        1/4).

    Notes
    -----
    The mean over 0..π of ``cos(jω)·|N(e^{jω})|²`` is ``ρ_j``, so the power of
    the spectrum :func:`error_spectrum_lsb2` is exactly this sum.
    Truncation is rounding of ``x - delta/2``, so it adds a constant -1/2 LSB
    to the rounding error: unshaped, Δ²/12 + Δ²/4 = Δ²/3 undithered (Bennett
    1948; Widrow & Kollár 2008). The constant passes the NTF at DC, hence
    ``sum(n_k)``. The "none" figure holds only for busy signals.
    """
    n = _ntf(coeffs)
    spec = DITHER_MODELS[dither].spectrum_lsb2
    power = 0.0
    for j, c in enumerate(spec[:n.size]):  # ρ_j = 0 beyond the NTF's length
        power += c * float(np.dot(n[:n.size - j], n[j:]))
    if quantizer == "truncate":
        power += (0.5 * float(np.sum(n))) ** 2
    return power


def error_spectrum_lsb2(dither, freqs, sample_rate, coeffs=()):
    """The predicted spectrum of the error's noise, LSB², at ``freqs``.

    Parameters
    ----------
    dither : {'none', 'rpdf', 'tpdf', 'tpdf-hp'}
    freqs : array_like of float, Hz
    sample_rate : float, Hz
    coeffs : sequence of float
        Error-feedback coefficients (none: unshaped).

    Returns
    -------
    ndarray
        ``S(ω)·|N(e^{jω})|²`` with ``S`` the dither's spectrum
        (:attr:`DitherModel.spectrum_lsb2`) and ``N`` the noise transfer
        function: LSB² per unit of normalized bandwidth, so that its mean over
        0..fs/2 is the noise power (:func:`predicted_error_power_lsb2` less the
        truncation bias, which sits at 0 Hz). The one-sided PSD in full scale²
        per Hz is ``2·S/(fs·scale²)``.
    """
    w = 2.0 * np.pi * np.asarray(freqs, dtype=np.float64) / float(sample_rate)
    spec = DITHER_MODELS[dither].spectrum_lsb2
    out = np.full(w.shape, float(spec[0]))
    for j, c in enumerate(spec[1:], start=1):
        out += c * np.cos(j * w)
    n = _ntf(coeffs)
    if n.size > 1:
        k = np.arange(n.size)
        resp = np.exp(-1j * np.multiply.outer(w, k)) @ n
        out *= resp.real ** 2 + resp.imag ** 2
    return out


def error_pdf(lsb, *, quantizer, dither, coeffs=()):
    """Theoretical pdf of the total error, in LSB, at the points ``lsb``.

    Unshaped: the rounding error (uniform over one LSB) convolved with the
    dither's pdf, shifted by −1/2 for truncation (nonsubtractive dither with
    a busy input; Lipshitz, Wannamaker & Vanderkooy 1992). Shaped: the sum of
    many weighted terms, drawn as a Gaussian with the predicted mean and
    variance.
    """
    x = np.asarray(lsb, dtype=np.float64)
    n = np.concatenate(([1.0], -np.asarray(coeffs, dtype=np.float64)))
    bias = -0.5 if quantizer == "truncate" else 0.0
    if n.size > 1:
        var = predicted_error_power_lsb2("round", dither, coeffs)  # the noise, no bias
        mean = bias * float(np.sum(n))
        return np.exp(-0.5 * (x - mean) ** 2 / var) / math.sqrt(2 * math.pi * var)
    step = 1e-3
    grid = np.arange(-4.0, 4.0 + step / 2, step)
    uni = ((grid >= -0.5) & (grid < 0.5)).astype(float)
    kind = DITHER_MODELS[dither].pdf
    if kind == "none":
        pdf = uni
    else:
        if kind == "uniform":
            dpdf = uni
        else:  # triangular over (-1, 1): tpdf, and tpdf-hp's marginal
            dpdf = np.clip(1.0 - np.abs(grid), 0.0, None)
        pdf = np.convolve(uni, dpdf, mode="same") * step
    pdf = pdf / (pdf.sum() * step)
    return np.interp(x - bias, grid, pdf, left=0.0, right=0.0)


class Requantizer:
    """Streaming requantizer for one multichannel signal.

    Parameters
    ----------
    channels : int, >= 1
    bits : int, 1..32
    quantizer : {'round', 'truncate'}, default 'round'
    dither : {'none', 'rpdf', 'tpdf', 'tpdf-hp'}, default 'tpdf'
    coeffs : sequence of float, default ()
        Error-feedback coefficients (no shaping when empty). Shaping always
        uses the dither given here inside the loop; use i.i.d. 'tpdf' with
        shaping (Lipshitz, Wannamaker & Vanderkooy, JAES 52(11), 2004).
    seed : int or None
        Each channel gets its own independent stream: an SFC64 generator
        (numpy.random.SFC64's algorithm and seeding) spawned from this seed by
        :class:`numpy.random.SeedSequence`.
    container_bits : int, 8/16/24/32, default: smallest that holds ``bits``
        Codes are left-justified in the container: int16 for 8 and 16,
        int32 for 24 and 32 (the low bits below ``bits`` stay zero).
    silence_frames : int, >= 0, default 0
        Keep digital silence silent: in every run of at least this many exact
        zeros in a channel the codes and the error are exactly zero (0: dither
        everything). To decide a run at its first sample, the requantizer holds
        back a run of zeros that ends a block still shorter than this (at most
        ``silence_frames - 1`` frames) until the next block (or :meth:`flush`)
        shows what follows it.

    Notes
    -----
    Call :meth:`process` repeatedly, then :meth:`flush`; the blocks may have any
    length, and the frames come out in order, whatever the block sizes.
    """

    def __init__(self, channels, *, bits, quantizer="round", dither="tpdf", coeffs=(),
                 seed=None, container_bits=None, silence_frames=0):
        Recipe(bits=bits, quantizer=quantizer, dither=dither, seed=seed)  # validates, or raises
        coeffs = np.ascontiguousarray(coeffs, dtype=np.float64).reshape(-1)
        check_dither_in_loop(dither, coeffs.size > 0)
        if channels < 1:
            raise UsageError(f"channels={channels!r} must be at least 1")
        if container_bits is None:
            container_bits = 8 if bits <= 8 else 16 if bits <= 16 else 24 if bits <= 24 else 32
        if container_bits < bits:
            raise UsageError(f"{container_bits=} cannot hold {bits=}")
        self.channels = int(channels)
        self.bits = int(bits)
        self.quantizer = quantizer
        self.dither = dither
        self.seed = new_seed() if seed is None else int(seed)
        self.coeffs = coeffs
        self.scale = float(2 ** (bits - 1))
        self.kmin = -(2 ** (bits - 1))
        self.kmax = 2 ** (bits - 1) - 1
        self.code_dtype = np.int16 if container_bits <= 16 else np.int32
        self.shift = (16 if container_bits <= 16 else 32) - bits
        self._mode = DITHER_MODELS[dither].mode
        self._round_offset = 0.5 if quantizer == "round" else 0.0
        seqs = np.random.SeedSequence(self.seed).spawn(self.channels)
        # one SFC64 state per channel, seeded by numpy; the kernel advances it
        self.rng = np.stack([np.random.SFC64(s).state["state"]["state"] for s in seqs])
        self.rng = np.ascontiguousarray(self.rng, dtype=np.uint64)
        # feedback state: the next feedback, then a doubled ring of past errors (see _kernel)
        self.fbs = np.zeros((self.channels, 2 * self.coeffs.size + 1), dtype=np.float64)
        self.hp_prev = np.zeros(self.channels, dtype=np.float64)
        self.acc = np.zeros((self.channels, len(_kernel.ACC_FIELDS)), dtype=np.float64)
        self.frames = 0
        self._no_err = np.zeros(1, dtype=np.float32)
        self._h = self.coeffs if self.coeffs.size else np.zeros(1)
        if isinstance(silence_frames, bool) or not isinstance(silence_frames, (int, np.integer)) \
                or silence_frames < 0:
            raise UsageError(f"silence_frames={silence_frames!r} must be a whole number >= 0")
        self.silence_frames = int(silence_frames)
        #: Most frames a call holds back (a run of zeros one frame short of silence).
        self.hold = max(0, self.silence_frames - 1)
        self._zs = np.zeros(self.channels, dtype=np.int64)
        self._kept_silent = False  # whether the last call kept any sample silent
        self._pending = None  # the frames held back, waiting for the next call
        self._held = 0
        self._last_input = None  # (input, frames of it turned into output) of the last call
        self._zs_before = self._zs.copy()  # the silence decisions before the last call

    @classmethod
    def from_recipe(cls, recipe, channels, *, coeffs=(), container_bits=None,
                    sample_rate=None):
        """The requantizer a :class:`~requant.recipe.Recipe` describes.

        ``coeffs`` are the recipe's shaping coefficients resolved for the
        audio's sample rate (:func:`requant.dsp.shaping.coefficients_for`);
        the recipe's seed must be set. With ``silence='keep'`` the sample rate
        turns ``silence_min_ms`` into frames.
        """
        if recipe.seed is None:
            raise UsageError("the recipe has no seed yet; draw one with "
                             "recipe.with_seed(new_seed())")
        silence_frames = 0
        if recipe.silence == "keep":
            if sample_rate is None:
                raise UsageError("keeping digital silence needs the sample rate (frames per ms)")
            silence_frames = recipe.silence_frames(sample_rate)
        return cls(channels, bits=recipe.bits, quantizer=recipe.quantizer, dither=recipe.dither,
                   coeffs=coeffs, seed=recipe.seed, container_bits=container_bits,
                   silence_frames=silence_frames)

    def process(self, x, *, codes=None, error=True, err_out=None, kernel=None):
        """Requantize the next block.

        Parameters
        ----------
        x : ndarray, (frames, channels), float32 or float64
        codes : ndarray, optional
            Output buffer of :attr:`code_dtype`, at least ``frames + hold`` long
            (:attr:`hold`: 0 unless silence is kept).
        error : bool
            Also return the error signal (float32).
        err_out : ndarray, optional
            Buffer for the error signal, float32, as long as ``codes``.
        kernel : callable, optional
            Replacement for the compiled kernel (tests pass the plain twin).

        Returns
        -------
        codes : ndarray, (frames out, channels)
            Left-justified integer codes, the next frames of the output. Without
            silence kept, as many as ``x`` has. With it, a block that ends inside
            a run of zeros too short yet to be called silence (in any channel)
            holds that run's frames back until the next block or :meth:`flush`
            shows how long it is; the next call gives them first (so a call may
            give up to :attr:`hold` frames more than its block).
        err : ndarray, (frames out, channels), float32, or None
            Output minus input, full scale 1.0, for the same frames.
        """
        if x.ndim != 2 or x.shape[1] != self.channels:
            raise UsageError(f"block shape {x.shape!r} does not match {self.channels} channels")
        if x.dtype not in (np.float32, np.float64) or not x.flags.c_contiguous:
            x = np.ascontiguousarray(x, dtype=np.float64)
        if self._held:  # rare: the last block ended inside a short run of zeros
            dtype = x.dtype if x.dtype == self._pending.dtype else np.float64
            x = np.concatenate([self._pending.astype(dtype, copy=False),
                                x.astype(dtype, copy=False)])
        n = x.shape[0]
        hold = self._undecided(x) if self.hold else 0
        return self._run(x, n - hold, hold, codes, error, err_out, kernel)

    @property
    def held(self):
        """Frames held back, waiting for the next block or :meth:`flush` to decide them."""
        return self._held

    def flush(self, *, codes=None, error=True, err_out=None, kernel=None, max_frames=None):
        """The frames held back, at the end of the signal (where a run of zeros ends).

        Returns ``(codes, err)`` as :meth:`process` does, for at most
        ``max_frames`` of them (default all); call it until :attr:`held` is 0,
        after the last block. Nothing is held while silence is not kept.
        """
        if not self._held:
            self._zs_before = self._zs.copy()
            self._last_input = None
            codes, err = self._buffers(0, codes, error, err_out)
            return codes[:0], (err[:0] if error else None)
        x = self._pending
        k = self._held if max_frames is None else min(self._held, int(max_frames))
        return self._run(x, k, self._held - k, codes, error, err_out, kernel)

    def _run(self, x, ready, hold, codes, error, err_out, kernel):
        """The kernel on the first ``ready`` frames of ``x``; the ``hold`` after them are its
        look-ahead and wait for the next call."""
        codes, err = self._buffers(ready, codes, error, err_out)
        self._zs_before = self._zs.copy()
        silent = self.acc[:, _SILENT].sum()
        self._call(self._kernel(x.dtype, kernel), x, ready, hold, codes, err, error)
        self._kept_silent = self.acc[:, _SILENT].sum() != silent
        self._last_input = (x, ready)
        self._pending = x[ready:].copy() if hold else None
        self._held = hold
        self.frames += ready
        return codes[:ready], (err[:ready] if error else None)

    def _undecided(self, x):
        """Frames at the end of ``x`` that must wait: a run of zeros in some channel that
        reaches the end of the block, began in it, and is still shorter than
        :attr:`silence_frames` (the next block decides whether it is silence)."""
        n = x.shape[0]
        last = x[n - 1] == 0 if n else np.zeros(self.channels, bool)
        wait = 0
        for c in np.flatnonzero(last):
            tail = x[max(0, n - self.silence_frames):, c]
            nonzero = np.flatnonzero(tail)
            run = tail.shape[0] - 1 - nonzero[-1] if nonzero.size else tail.shape[0]
            if run >= self.silence_frames:
                continue  # long enough already: silence, decided at its first zero
            if run == n and self._zs[c] != 0:
                continue  # the run began before this block: decided then
            wait = max(wait, run)
        return wait

    def last_input(self, out=None):
        """The input frames the last :meth:`process` or :meth:`flush` turned into output,
        in order (held-back frames of the block before, then the block's own); written
        into ``out`` when given."""
        if self._last_input is None:
            x = np.zeros((0, self.channels))
            return x if out is None else out[:0]
        x, used = self._last_input
        if out is None:
            return x[:used]
        out[:used] = x[:used]
        return out[:used]

    def silent_mask(self, out=None):
        """Which samples of the last :meth:`process` or :meth:`flush` output were kept
        silent, as a boolean array (frames out, channels); written into ``out`` if given.

        It follows the kernel's rule: a sample is kept silent when it lies in a run of
        at least ``silence_frames`` exact zeros of its channel (the ends of the signal
        bound a run). The frames held back are the look-ahead that decides runs near
        the end of the output; the decisions carried from the call before decide a
        run that began there.
        """
        x = self.last_input()
        n = x.shape[0]
        mask = np.zeros(x.shape, dtype=bool) if out is None else out[:n]
        mask[:] = False
        length = self.silence_frames
        if length == 0 or n == 0 or not self._kept_silent:  # the kernel counts them
            return mask
        zero = (np.concatenate([x, self._pending]) if self._held else x) == 0
        edge = np.zeros((1, self.channels), dtype=bool)
        steps = np.diff(np.concatenate([edge, zero, edge]).astype(np.int8), axis=0)
        for c in range(self.channels):
            starts = np.flatnonzero(steps[:, c] == 1)
            stops = np.flatnonzero(steps[:, c] == -1)
            keep = stops - starts >= length
            if starts.size and starts[0] == 0 and self._zs_before[c] != 0:
                keep[0] = self._zs_before[c] == 1  # a run that began before this output
            for a, b in zip(starts[keep], stops[keep], strict=True):
                if a >= n:
                    break
                mask[a:min(b, n), c] = True
        return mask

    def _buffers(self, n, codes, error, err_out):
        if codes is None:
            codes = np.empty((n, self.channels), dtype=self.code_dtype)
        if not (codes.dtype == self.code_dtype and codes.flags.c_contiguous):
            raise UsageError(f"codes buffer must be C-contiguous {np.dtype(self.code_dtype)}")
        if not error:
            err = self._no_err
        elif err_out is not None:
            err = err_out
        else:
            err = np.empty((n, self.channels), dtype=np.float32)
        if error and not (err.dtype == np.float32 and err.flags.c_contiguous):
            raise UsageError("error buffer must be C-contiguous float32")
        return codes, err

    def _kernel(self, dtype, kernel):
        return compiled_kernel(dtype, self.code_dtype, self.coeffs.size) if kernel is None \
            else kernel

    def _call(self, run, x, n, m, codes, err, error):
        """The kernel on frames 0..n-1 of ``x``, then ``m`` frames of look-ahead."""
        c = codes[:n]
        e = err[:n] if error else err
        flat = x.reshape(-1)
        run(flat, n, m, self.channels, self.rng.reshape(-1), self._mode,
            self._round_offset, self._h, self.coeffs.size, self.fbs.reshape(-1), self.hp_prev,
            self.scale, 1.0 / self.scale, self.kmin, self.kmax, E_BOUND_LSB, self.shift,
            c.reshape(-1), e.reshape(-1), int(error), self.acc.reshape(-1),
            self.silence_frames, self._zs)

    def run_all(self, x, *, kernel=None):
        """The codes of a whole signal in one call: :meth:`process`, then :meth:`flush`."""
        codes = np.empty((x.shape[0], self.channels), dtype=self.code_dtype)
        out, _ = self.process(x, codes=codes, error=False, kernel=kernel)
        done = out.shape[0]
        while self._held:
            more, _ = self.flush(codes=codes[done:], error=False, kernel=kernel)
            done += more.shape[0]
        return codes

    def totals(self):
        """Running sums per channel, as a dict of arrays keyed by ACC_FIELDS."""
        return {name: self.acc[:, i].copy() for i, name in enumerate(_kernel.ACC_FIELDS)}


def requantize(x, *, bits, quantizer="round", dither="tpdf", coeffs=(), seed=None,
               silence_frames=0):
    """Requantize a whole signal held in memory.

    Parameters
    ----------
    x : array_like, (frames,) or (frames, channels), full scale 1.0
    bits, quantizer, dither, coeffs, seed, silence_frames
        As for :class:`Requantizer`.

    Returns
    -------
    ndarray, float64, same shape as ``x``
        The requantized signal, on the grid of ``bits``.

    Examples
    --------
    >>> y = requantize([0.3, -0.3], bits=2, dither="none")
    >>> y.tolist()
    [0.5, -0.5]
    """
    arr = np.asarray(x, dtype=np.float64)
    squeeze = arr.ndim == 1
    arr2 = arr.reshape(-1, 1) if squeeze else arr
    rq = Requantizer(arr2.shape[1], bits=bits, quantizer=quantizer, dither=dither,
                     coeffs=coeffs, seed=seed, container_bits=32, silence_frames=silence_frames)
    codes = rq.run_all(np.ascontiguousarray(arr2))
    y = codes.astype(np.float64) / 2.0**31
    return y.reshape(arr.shape)
