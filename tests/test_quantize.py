"""The quantizer and dither against theory.

Sources (see ../shared/REFERENCES.md):
[B48] Bennett, "Spectra of quantized signals", Bell Syst. Tech. J. 27, 1948 (pages from memory).
[WK08] Widrow & Kollár, Quantization Noise, Cambridge UP, 2008.
[LWV92] Lipshitz, Wannamaker & Vanderkooy, "Quantization and Dither: A Theoretical Survey",
        JAES 40(5):355-375, 1992.
[WLVW00] Wannamaker, Lipshitz, Vanderkooy & Wright, "A theory of nonsubtractive dither",
         IEEE Trans. Signal Processing 48(2):499-516, 2000.
"""

import numpy as np
import pytest

from requant.dsp import kernel as _kernel
from requant.dsp.quantizer import Requantizer, predicted_error_power_lsb2, requantize
from requant.errors import UsageError

N_STAT = 1_000_000


def error_lsb(x, bits, **kw):
    """Output minus input, in LSB."""
    y = requantize(x, bits=bits, **kw)
    return (y - x) * 2.0 ** (bits - 1)


def five_sigma(e2):
    """5-sigma bound on the mean of samples e2 (relative SD sqrt((kappa-1)/n), REFERENCES §2)."""
    return 5.0 * np.std(e2) / np.sqrt(e2.size) + 1e-12


def busy_signal(rng, n=N_STAT):
    # a busy input: uniform over most of the range, far finer than the LSB
    return rng.uniform(-0.9, 0.9, n)


@pytest.mark.parametrize(
    "quantizer, dither, expected",
    [
        ("round", "none", 1 / 12),      # Δ²/12, [B48], [WK08], Zölzer ch. 2
        ("truncate", "none", 1 / 3),    # Δ²/12 + (Δ/2)² = Δ²/3 [C], REFERENCES §1
        ("round", "rpdf", 1 / 6),       # Δ²/6 averaged over input, [LWV92]
        ("round", "tpdf", 1 / 4),       # Δ²/4 for every input, [LWV92], [WLVW00]
        ("round", "tpdf-hp", 1 / 4),    # Δ²/12 + 2·Δ²/12, REFERENCES §2 [C, derived]
        ("truncate", "tpdf", 1 / 2),    # Δ²/4 + (Δ/2)² [C]
    ],
)
@pytest.mark.parametrize("bits", [8, 16])
def test_error_power_matches_theory(rng, quantizer, dither, expected, bits):
    x = busy_signal(rng)
    e = error_lsb(x, bits, quantizer=quantizer, dither=dither, seed=7)
    e2 = e * e
    assert abs(e2.mean() - expected) < five_sigma(e2)
    assert predicted_error_power_lsb2(quantizer, dither) == pytest.approx(expected)


def test_truncation_mean_is_minus_half_lsb(rng):
    # truncation toward -inf: ε in (-Δ, 0], mean -Δ/2 [C], REFERENCES §1
    x = busy_signal(rng)
    e = error_lsb(x, 12, quantizer="truncate", dither="none")
    assert e.max() <= 0.0 and e.min() > -1.0
    assert abs(e.mean() + 0.5) < 5 * e.std() / np.sqrt(e.size)


def test_rounding_error_is_bounded_by_half_lsb(rng):
    # mid-tread rounding: |ε| <= Δ/2 [WK08]
    e = error_lsb(busy_signal(rng, 100_000), 10, dither="none")
    assert np.abs(e).max() <= 0.5


@pytest.mark.parametrize(
    "lsbs, expected",
    [(0.5, 1), (-0.5, 0), (1.5, 2), (-1.5, -1), (2.5, 3), (0.49, 0), (-0.51, -1)],
)
def test_rounding_ties_go_up(lsbs, expected):
    # Documented tie rule: mid-tread Δ·floor(x/Δ + 1/2) (REFERENCES §1), not numpy's half-to-even.
    bits = 8
    y = requantize([lsbs * 2.0**-(bits - 1)], bits=bits, dither="none")
    assert y[0] * 2 ** (bits - 1) == expected


@pytest.mark.parametrize("lsbs, expected", [(0.99, 0), (-0.01, -1), (-1.0, -1), (2.0, 2)])
def test_truncation_goes_toward_minus_infinity(lsbs, expected):
    # two's-complement truncation floors (REFERENCES §1)
    y = requantize([lsbs * 2.0**-7], bits=8, quantizer="truncate", dither="none")
    assert y[0] * 2**7 == expected


def test_tpdf_moments_are_independent_of_input():
    # TPDF 2 LSB p-p: E[ε|x] = 0 and E[ε²|x] = Δ²/4 for every x [LWV92], [WLVW00].
    # A slow ramp across several LSB, binned by fractional offset.
    bits = 10
    n = 1_600_000
    lsbs = np.linspace(-3.0, 3.0, n, endpoint=False) + 1e-7
    x = lsbs * 2.0 ** -(bits - 1)
    e = error_lsb(x, bits, dither="tpdf", seed=11)
    frac = np.mod(lsbs, 1.0)
    bins = np.minimum((frac * 16).astype(int), 15)
    for b in range(16):
        eb = e[bins == b]
        assert abs(eb.mean()) < 5 * eb.std() / np.sqrt(eb.size), b
        e2 = eb * eb
        assert abs(e2.mean() - 0.25) < five_sigma(e2), b


def test_undithered_moments_depend_on_input():
    # The counter-check: without dither the error power follows the input's offset
    # (ε = -a for offset a), so a binned test like the one above must see it [WK08].
    bits = 10
    lsbs = np.linspace(0.0, 1.0, 10_000, endpoint=False) * 0.4  # offsets 0..0.4 LSB
    e = error_lsb(lsbs * 2.0 ** -(bits - 1), bits, dither="none")
    assert np.allclose(e, -lsbs)


@pytest.mark.parametrize("a", [0.0, 0.1, 0.25, 0.5, 0.8])
def test_rpdf_conditional_power(a):
    # RPDF 1 LSB p-p: E[ε|a] = 0, E[ε²|a] = a(1-a)Δ² [LWV92], REFERENCES §2 [C]
    n = 400_000
    x = np.full(n, (3 + a) * 2.0**-11)
    e = error_lsb(x, 12, dither="rpdf", seed=5)
    e2 = e * e
    if a == 0.0:
        assert np.all(e == 0.0)  # an on-grid input gives zero error
        return
    assert abs(e2.mean() - a * (1 - a)) < five_sigma(e2)
    assert abs(e.mean()) < 5 * e.std() / np.sqrt(n)


def test_tpdf_on_grid_outcomes():
    # On-grid input with TPDF: ε ∈ {-Δ, 0, +Δ} with probabilities 1/8, 3/4, 1/8 [C], REFERENCES §2
    n = 800_000
    x = np.full(n, 5 * 2.0**-7)
    e = error_lsb(x, 8, dither="tpdf", seed=3)
    assert set(np.unique(e)) <= {-1.0, 0.0, 1.0}
    for value, p in ((-1.0, 1 / 8), (0.0, 3 / 4), (1.0, 1 / 8)):
        freq = np.mean(e == value)
        assert abs(freq - p) < 5 * np.sqrt(p * (1 - p) / n)


def test_tpdf_halfway_outcomes():
    # Half-way input with TPDF: ±Δ/2 with probability 1/2 each [C], REFERENCES §2
    n = 400_000
    x = np.full(n, 5.5 * 2.0**-7)
    e = error_lsb(x, 8, dither="tpdf", seed=4)
    assert set(np.unique(e)) == {-0.5, 0.5}
    assert abs(np.mean(e == 0.5) - 0.5) < 5 * np.sqrt(0.25 / n)


@pytest.mark.parametrize("bits", range(8, 25))
def test_full_scale_sine_snr(bits):
    # SNR = 6.0206·N + 1.7609 dB for a full-scale sine, rounding [B48], REFERENCES §1 [C].
    # (About 6 dB per bit and about 98 dB at 16 bits are common practice.)
    fs, n = 48000, 1 << 18
    t = np.arange(n) / fs
    amp = 1.0 - 2.0 ** -(bits - 1)  # the largest positive code is 1 - Δ
    x = amp * np.sin(2 * np.pi * 997.0 * t)
    y = requantize(x, bits=bits, dither="none")
    snr = 10 * np.log10(np.sum(x**2) / np.sum((y - x) ** 2))
    expected = 6.0206 * bits + 1.7609 + 20 * np.log10(amp)
    assert abs(snr - expected) < 0.1


def test_sixteen_bit_sine_is_about_98_db():
    # common practice: an ideal 16-bit converter gives about 98 dB
    fs = 48000
    x = (1 - 2.0**-15) * np.sin(2 * np.pi * 997 * np.arange(fs) / fs)
    y = requantize(x, bits=16, dither="none")
    snr = 10 * np.log10(np.sum(x**2) / np.sum((y - x) ** 2))
    assert 97.5 < snr < 98.5


def test_channels_get_independent_dither(rng):
    x = np.zeros((200_000, 2)) + 0.3 * 2.0**-7
    e = requantize(x, bits=8, dither="tpdf", seed=9) - x
    r = np.corrcoef(e[:, 0], e[:, 1])[0, 1]
    assert abs(r) < 5 / np.sqrt(e.shape[0])  # uncorrelated within 5 sigma


def test_same_seed_same_bits_other_seed_other_bits(rng):
    x = busy_signal(rng, 10_000)
    a = requantize(x, bits=8, seed=1)
    assert np.array_equal(a, requantize(x, bits=8, seed=1))
    assert not np.array_equal(a, requantize(x, bits=8, seed=2))


SHAPERS = [(), (1.0,), (1.5, -0.6), (2.412, -3.370, 3.937, -4.174, 3.353, -2.205, 1.281, -0.569,
                                     0.0847)]


def run_blocks(x, sizes, **kw):
    rq = Requantizer(x.shape[1], **kw)
    codes, errs, i = [], [], 0
    k = 0
    while i < x.shape[0]:
        n = sizes[k % len(sizes)]
        c, e = rq.process(x[i:i + n])
        codes.append(c.copy())
        errs.append(e.copy())
        i += n
        k += 1
    return np.concatenate(codes), np.concatenate(errs), rq.acc


# every dither unshaped; inside a shaping loop only the dithers allowed there
DITHER_SHAPER = [(d, c) for d in ("none", "rpdf", "tpdf", "tpdf-hp") for c in SHAPERS
                 if not (d == "tpdf-hp" and c)]
DITHER_SHAPER_IDS = [f"{d}-{len(c)}taps" for d, c in DITHER_SHAPER]


@pytest.mark.parametrize("dither, coeffs", DITHER_SHAPER, ids=DITHER_SHAPER_IDS)
@pytest.mark.parametrize("sizes", [[1], [7], [4096], [3, 1000, 17, 1, 250]], ids=str)
def test_blocks_equal_whole(rng, dither, coeffs, sizes):
    # split-equals-whole, bit for bit (the scipy.signal.max_len_seq test pattern)
    x = rng.uniform(-0.5, 0.5, (6000, 2)).astype(np.float32)
    kw = dict(bits=12, dither=dither, coeffs=coeffs, seed=42)
    whole_c, whole_e, whole_acc = run_blocks(x, [x.shape[0]], **kw)
    c, e, acc = run_blocks(x, sizes, **kw)
    assert np.array_equal(whole_c, c)
    assert np.array_equal(whole_e, e)
    assert np.allclose(whole_acc, acc, rtol=1e-12, atol=1e-9)


@pytest.mark.parametrize("dither, coeffs", [p for p in DITHER_SHAPER if len(p[1]) < 9])
@pytest.mark.parametrize("quantizer", ["round", "truncate"])
def test_plain_twin_equals_compiled(rng, dither, quantizer, coeffs):
    x = rng.uniform(-1.2, 1.2, (800, 3))
    kw = dict(bits=6, dither=dither, quantizer=quantizer, coeffs=coeffs, seed=8)
    a, b = Requantizer(3, **kw), Requantizer(3, **kw)
    ca, ea = a.process(x)
    cb, eb = b.process(x, kernel=_kernel.quantize_block_plain)
    assert np.array_equal(ca, cb) and np.array_equal(ea, eb)
    assert np.array_equal(a.acc, b.acc) and np.array_equal(a.fbs, b.fbs)


def test_shaped_error_follows_ntf(rng):
    # ε = e - Σ h_k e[n-k] (REFERENCES §3, Zölzer ch. 2.3): check the identity sample by sample
    h = np.array([1.5, -0.6])
    x = rng.uniform(-0.5, 0.5, (5000, 1))
    rq = Requantizer(1, bits=12, dither="tpdf", coeffs=h, seed=1)
    codes, err = rq.process(x)
    eps = err[:, 0].astype(np.float64) * 2**11
    # recover e by inverting the NTF: e[n] = ε[n] + Σ h_k e[n-k]
    e = np.zeros_like(eps)
    for n in range(eps.size):
        e[n] = eps[n] + sum(h[k] * e[n - 1 - k] for k in range(2) if n - 1 - k >= 0)
    assert np.abs(e).max() <= 1.5 + 1e-3  # |e| <= 1/2 + 1 LSB with round + TPDF
    power = np.mean(eps**2)
    # predicted (Δ²/4)·Σ n_k² with n = [1, -1.5, 0.6]
    assert power == pytest.approx(0.25 * (1 + 2.25 + 0.36), rel=0.06)


def test_shaping_loop_stays_bounded_when_overloaded():
    # a 3-bit conversion of a full-scale square with a 9-tap shaper: clip, never run away
    x = np.where(np.arange(20000) % 200 < 100, 0.999, -1.0).reshape(-1, 1)
    rq = Requantizer(1, bits=3, dither="tpdf", coeffs=SHAPERS[3], seed=2)
    codes, err = rq.process(x)
    k = codes[:, 0] >> 13
    assert k.min() >= -4 and k.max() <= 3
    assert rq.acc[0, 4] > 0  # overloads counted
    # the feedback state is partial sums of h_k·e with |e| <= 2 LSB: bounded by 2·Σ|h_k|
    assert np.abs(rq.fbs).max() <= 2.0 * np.abs(SHAPERS[3]).sum()


def test_bad_settings_raise_clear_errors():
    with pytest.raises(UsageError, match="from 1 to 32"):
        Requantizer(1, bits=33)
    with pytest.raises(UsageError, match="tpdf"):
        Requantizer(1, bits=16, dither="gauss")
    with pytest.raises(UsageError, match="round, truncate"):
        Requantizer(1, bits=16, quantizer="nearest")
    with pytest.raises(TypeError, match="int"):
        Requantizer(1, bits=16.0)


def test_one_bit_codes():
    y = requantize(np.array([0.7, -0.7, 0.2, -0.2]), bits=1, dither="none")
    assert y.tolist() == [0.0, -1.0, 0.0, 0.0]


def test_kernel_generator_is_numpy_sfc64():
    # The in-kernel generator must be SFC64 exactly as numpy.random.SFC64 (the reference
    # library) defines it: same words from the same state.
    seq = np.random.SeedSequence(99)
    ref = np.random.SFC64(seq)
    state = tuple(np.array(np.random.SFC64(seq).state["state"]["state"], dtype=np.uint64))
    words = []
    with np.errstate(over="ignore"):
        for _ in range(1000):
            word, *state = _kernel.sfc64_next_py(*state)
            words.append(int(word))
    assert words == ref.random_raw(1000).tolist()


def test_tpdf_words_split_into_two_uniforms():
    # the TPDF draw u1 - u2 uses the two 32-bit halves of one word; compare with numpy's
    # own SFC64 stream: with input 0 at 8 bits, code = floor(d + 1/2).
    seed = 21
    rq = Requantizer(1, bits=8, dither="tpdf", seed=seed, container_bits=32)
    codes, _ = rq.process(np.zeros((5000, 1)))
    (seq,) = np.random.SeedSequence(seed).spawn(1)
    w = np.random.SFC64(seq).random_raw(5000)
    hi = (w >> np.uint64(32)).astype(np.float64)
    lo = (w & np.uint64(0xFFFFFFFF)).astype(np.float64)
    d = (hi - lo) * 2.0**-32
    assert np.array_equal(codes[:, 0] >> 24, np.floor(d + 0.5).astype(np.int64))


def test_high_passed_tpdf_refused_inside_a_shaping_loop():
    # only i.i.d. TPDF belongs inside a noise-shaping loop: Lipshitz, Wannamaker & Vanderkooy,
    # "Dithered noise shapers and recursive digital filters", JAES 52(11), 2004
    with pytest.raises(UsageError, match="--dither tpdf"):
        Requantizer(1, bits=16, dither="tpdf-hp", coeffs=(1.0,))
    Requantizer(1, bits=16, dither="tpdf-hp")  # fine without shaping


def test_float32_input_sums_are_exact_float64():
    # numba's float() keeps float32; the kernel must square in float64 like the plain twin
    x = np.random.default_rng(4).uniform(-1, 1, (5000, 2)).astype(np.float32)
    a, b = Requantizer(2, bits=16, seed=1), Requantizer(2, bits=16, seed=1)
    a.process(x)
    b.process(x, kernel=_kernel.quantize_block_plain)
    assert np.array_equal(a.acc, b.acc)
