"""Tests for requant.dsp.truepeak (ITU-R BS.1770-4 Annex 2 true-peak meter)."""


import numpy as np
import pytest
import scipy.signal

from requant.dsp import truepeak
from requant.dsp.truepeak import (
    PHASES,
    TruePeakMeter,
    oversample,
    true_peak,
    true_peak_dbtp,
)
from requant.errors import InputError, UsageError

# ITU-R BS.1770-4 Annex 2, interpolation filter coefficients (typed here a second
# time from /work/shared/REFERENCES.md section 5, independently of the module).
BS1770_PHASE0 = [
    0.0017089843750, 0.0109863281250, -0.0196533203125, 0.0332031250000,
    -0.0594482421875, 0.1373291015625, 0.9721679687500, -0.1022949218750,
    0.0476074218750, -0.0266113281250, 0.0148925781250, -0.0083007812500,
]
BS1770_PHASE1 = [
    -0.0291748046875, 0.0292968750000, -0.0517578125000, 0.0891113281250,
    -0.1665039062500, 0.4650878906250, 0.7797851562500, -0.2003173828125,
    0.1015625000000, -0.0582275390625, 0.0330810546875, -0.0189208984375,
]
# BS.1770-4 Annex 2: phase 2 is phase 1 reversed, phase 3 is phase 0 reversed.
REF_PHASES = np.array(
    [BS1770_PHASE0, BS1770_PHASE1, BS1770_PHASE1[::-1], BS1770_PHASE0[::-1]]
)
# The order-48 FIR as one filter on the zero-stuffed signal: h[4 j + k] = phase_k[j].
REF_H = REF_PHASES.T.reshape(-1)


def smooth_fade(x, length):
    """Raised-cosine fade-in and fade-out, so the signal starts and ends softly."""
    w = np.sin(np.linspace(0.0, np.pi / 2, length)) ** 2
    y = np.array(x, dtype=np.float64)
    y[:length] *= w if y.ndim == 1 else w[:, None]
    y[-length:] *= w[::-1] if y.ndim == 1 else w[::-1, None]
    return y


def naive_oversample(x):
    """Direct 48-tap formula: zero-stuff by 4, then y[m] = sum_i h[i] u[m - i].

    Slow on purpose; the full convolution (zero history before, zeros after).
    """
    x = np.asarray(x, dtype=np.float64)
    u = np.zeros(4 * len(x))
    u[::4] = x
    y = np.zeros(len(u) + len(REF_H) - 1)
    for m in range(len(y)):
        acc = 0.0
        for i in range(len(REF_H)):
            if 0 <= m - i < len(u):
                acc += REF_H[i] * u[m - i]
        y[m] = acc
    return y


def random_signal(frames, channels, seed):
    rng = np.random.default_rng(seed)
    return rng.uniform(-1.0, 1.0, size=(frames, channels))


# --------------------------------------------------------------------------
# The filter table


def test_phase_table_is_the_standards_table():
    # Source: ITU-R BS.1770-4 Annex 2 (REFERENCES.md section 5).
    np.testing.assert_array_equal(PHASES, REF_PHASES)
    assert truepeak.OVERSAMPLING == 4
    assert truepeak.HISTORY_FRAMES == 11


def test_filter_is_linear_phase():
    # BS.1770-4 Annex 2: phase 2 = phase 1 reversed, phase 3 = phase 0 reversed,
    # hence the 48-tap filter is symmetric.
    np.testing.assert_array_equal(REF_H, REF_H[::-1])


# --------------------------------------------------------------------------
# Check values


def test_sine_at_quarter_rate_45_degrees_reads_0_dbtp():
    # Check value: BS.1770-4 Annex 2 / REFERENCES.md section 5 [C]: a sine at fs/4
    # sampled at 45 degrees has a sample peak of -3.01 dBFS and a true peak of
    # 0 dBTP within +-0.05 dB. Smooth fades keep the switch-on transient out.
    n = np.arange(48000)
    x = smooth_fade(np.sin(np.pi / 2 * n + np.pi / 4), 1024)
    sample_peak_db = 20 * np.log10(np.max(np.abs(x)))
    assert sample_peak_db == pytest.approx(-3.0103, abs=0.0005)  # 20 log10(sin 45 deg) [C]
    level = true_peak_dbtp(x)
    assert level == pytest.approx(0.0, abs=0.05)
    # The reading must differ from the sample peak (the point of oversampling).
    assert level - sample_peak_db > 2.9


def test_impulse_reads_largest_tap_only_when_flushed():
    # Closed form: the response to a unit impulse is the filter itself, so its
    # true peak is the largest tap, 0.97216796875 (BS.1770-4 Annex 2 table).
    # An impulse on the last sample needs the zero flush to be interpolated.
    x = np.zeros(100)
    x[-1] = 1.0
    assert true_peak(x, flush=True) == np.max(np.abs(REF_H))
    assert np.max(np.abs(REF_H)) == 0.9721679687500
    # Without the flush only tap j = 0 of each phase has seen the impulse.
    assert true_peak(x, flush=False) == np.max(np.abs(REF_PHASES[:, 0]))


# --------------------------------------------------------------------------
# DC


def test_dc_gain_is_sum_of_each_phase():
    # Closed form: in steady state phase k outputs a * sum_j phase_k[j]
    # (BS.1770-4 Annex 2 coefficients). Phases 0 and 3 sum to 1.0015869140625,
    # phases 1 and 2 to 0.9730224609375.
    a = 0.5
    y = oversample(np.full(200, a), flush=False)
    steady = y[4 * 12:].reshape(-1, 4)
    expected = a * REF_PHASES.sum(axis=1)
    np.testing.assert_allclose(steady, np.broadcast_to(expected, steady.shape), rtol=0, atol=1e-15)
    np.testing.assert_allclose(REF_PHASES.sum(axis=1)[[0, 3]], 1.0015869140625, rtol=1e-15)
    np.testing.assert_allclose(REF_PHASES.sum(axis=1)[[1, 2]], 0.9730224609375, rtol=1e-15)


def test_dc_level_reads_its_level_times_dc_gain():
    # A DC level entered and left smoothly reads a * max_k sum(phase_k), i.e.
    # +0.0138 dB above its level (closed form from the BS.1770-4 table).
    a = -0.25
    x = smooth_fade(np.full(20000, a), 1024)
    expected = abs(a) * REF_PHASES.sum(axis=1).max()
    assert true_peak(x) == pytest.approx(expected, rel=1e-5)
    assert 20 * np.log10(expected / abs(a)) == pytest.approx(0.0138, abs=1e-4)


def test_dc_step_from_silence_reads_step_response_peak():
    # Closed form: an abrupt DC level a between silences is interpolated as the
    # filter's step response; its peak is a * the largest |partial sum| of a
    # phase, taken from either end (BS.1770-4 Annex 2 table).
    a = 0.5
    x = np.full(100, a)
    partial = np.cumsum(REF_PHASES, axis=1)
    tails = REF_PHASES.sum(axis=1, keepdims=True) - partial
    expected = a * max(np.abs(partial).max(), np.abs(tails).max())
    assert true_peak(x) == pytest.approx(expected, rel=1e-14)
    assert expected / a == pytest.approx(1.1158447265625, rel=1e-14)


def test_silence_reads_minus_infinity():
    assert true_peak_dbtp(np.zeros(1000)) == -np.inf
    assert true_peak(np.zeros((0, 2))).tolist() == [0.0, 0.0]


# --------------------------------------------------------------------------
# Against a slow naive reference and scipy


@pytest.mark.parametrize("seed", [1, 2])
def test_oversample_matches_naive_48_tap_formula(seed):
    # Reference: the direct 48-tap formula in this file (zero-stuff, convolve).
    x = random_signal(301, 1, seed)[:, 0]
    ref = naive_oversample(x)
    got = oversample(x, flush=True)
    n_full = 4 * (len(x) + 11)
    np.testing.assert_allclose(got, ref[:n_full], rtol=0, atol=1e-13)
    # The last 3 outputs of the full convolution are structurally zero.
    np.testing.assert_array_equal(ref[n_full:], 0.0)


def test_oversample_matches_scipy_upfirdn():
    # Reference library: scipy.signal.upfirdn(h, x, up=4) is zero-stuffing and
    # FIR filtering in one call.
    x = random_signal(5000, 2, 3)
    ref = scipy.signal.upfirdn(REF_H, x, up=4, axis=0)
    got = oversample(x)
    np.testing.assert_allclose(got, ref[: got.shape[0]], rtol=0, atol=1e-13)


@pytest.mark.parametrize("seed", [4, 5, 6])
def test_meter_matches_naive_reference(seed):
    x = random_signal(257, 2, seed)
    meter = TruePeakMeter(2)
    meter.process(x)
    meter.finish()
    expected = [np.max(np.abs(naive_oversample(x[:, c]))) for c in range(2)]
    np.testing.assert_allclose(meter.true_peak, expected, rtol=1e-13)
    # Same arithmetic, same order as the vectorised oversampler: equal bit for bit.
    np.testing.assert_array_equal(meter.true_peak, np.abs(oversample(x)).max(axis=0))


def test_compiled_kernel_equals_plain_twin():
    x = random_signal(500, 3, 7)
    xs = np.ascontiguousarray(np.concatenate([np.zeros((11, 3)), x]).T)
    peak_py = np.zeros(3)
    peak_nb = np.zeros(3)
    truepeak._peak_kernel_py(xs, PHASES, peak_py)
    truepeak._kernel()(xs, PHASES, peak_nb)
    np.testing.assert_array_equal(peak_py, peak_nb)


# --------------------------------------------------------------------------
# Streaming


def _uneven_sizes(total, seed):
    rng = np.random.default_rng(seed)
    sizes = []
    while sum(sizes) < total:
        sizes.append(int(rng.choice([0, 1, 2, 3, 10, 11, 12, 13, 100, 999])))
    return sizes


@pytest.mark.parametrize("block", [1, 7, 4096, "uneven"])
@pytest.mark.parametrize("flush", [False, True])
def test_blocks_equal_whole_bit_for_bit(block, flush):
    x = random_signal(12000, 2, 8)
    # Put the largest interpolated peak somewhere inside: a fs/4 burst at 45 deg.
    n = np.arange(64)
    x[5000:5064, 0] = np.sin(np.pi / 2 * n + np.pi / 4) * 1.2
    whole = TruePeakMeter(2)
    whole.process(x)
    parts = TruePeakMeter(2)
    sizes = _uneven_sizes(len(x), 9) if block == "uneven" else [block] * (len(x) // block + 1)
    start = 0
    for size in sizes:
        parts.process(x[start:start + size])
        start += size
    assert start >= len(x)
    if flush:
        whole.finish()
        parts.finish()
    assert parts.frames == whole.frames == len(x)
    np.testing.assert_array_equal(parts.true_peak, whole.true_peak)
    np.testing.assert_array_equal(parts.true_peak_dbtp, whole.true_peak_dbtp)


def test_one_dimensional_and_two_dimensional_agree():
    x = random_signal(1000, 1, 10)
    assert true_peak_dbtp(x[:, 0]) == true_peak_dbtp(x)[0]
    assert isinstance(true_peak_dbtp(x[:, 0]), float)
    meter = TruePeakMeter(1)
    meter.process(x[:, 0])
    meter.finish()
    assert meter.true_peak[0] == true_peak(x[:, 0])


def test_finish_is_idempotent_and_reset_restarts():
    x = random_signal(100, 1, 11)
    meter = TruePeakMeter(1)
    meter.process(x)
    meter.finish()
    first = meter.true_peak
    meter.finish()
    np.testing.assert_array_equal(meter.true_peak, first)
    meter.reset()
    assert meter.true_peak[0] == 0.0 and not meter.finished and meter.frames == 0


# --------------------------------------------------------------------------
# Errors


@pytest.mark.parametrize(
    "channels, error, match",
    [(0, UsageError, "at least 1"), (-2, UsageError, "at least 1"), ("2", TypeError, "int"),
     (2.0, TypeError, "int"), (True, TypeError, "int")],
)
def test_bad_channel_count(channels, error, match):
    with pytest.raises(error, match=match):
        TruePeakMeter(channels)


def test_bad_blocks():
    meter = TruePeakMeter(2)
    with pytest.raises(UsageError, match=r"expected \(frames, 2\)"):
        meter.process(np.zeros((10, 3)))
    with pytest.raises(UsageError, match=r"expected \(frames, 2\)"):
        meter.process(np.zeros(10))
    with pytest.raises(UsageError, match="shape"):
        meter.process(np.zeros((2, 2, 2)))
    with pytest.raises(InputError, match="NaN or infinite"):
        meter.process(np.array([[0.0, np.nan]]))
    with pytest.raises(TypeError, match="numeric"):
        meter.process(np.array([["a", "b"]]))
    meter.finish()
    with pytest.raises(UsageError, match="finished"):
        meter.process(np.zeros((1, 2)))


# --------------------------------------------------------------------------
# Speed


# --- DualTruePeakMeter: the skipping meter must equal two plain meters exactly ---------------

from requant.dsp.truepeak import DualTruePeakMeter, dual_peak_kernel_py  # noqa: E402


@pytest.mark.parametrize("kind", ["noise", "bursts", "silence-then-tone"])
@pytest.mark.parametrize("block", [pytest.param(7, marks=pytest.mark.slow), 1000, 65536])
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_dual_meter_equals_two_meters(kind, block, dtype):
    # The skip rule (gain × max|x| bounds every interpolated sample) must never change a
    # reading: compare with the plain BS.1770-4 meter on x and on x + e.
    rng = np.random.default_rng(7)
    n = 200_000
    t = np.arange(n) / 48000
    if kind == "noise":
        x = 0.3 * rng.standard_normal((n, 2))
    elif kind == "bursts":
        x = (np.sin(2 * np.pi * 0.7 * t) ** 16)[:, None] * np.sin(2 * np.pi * 3000 * t)[:,
                                                                                        None] * [1,
                                                                                                 0.5]
    else:
        x = np.zeros((n, 2))
        x[n // 2:] = 0.8 * np.sin(np.pi / 2 * np.arange(n - n // 2) + np.pi / 4)[:, None]
    e = rng.uniform(-1.5, 1.5, (n, 2)) * 2.0**-7
    # float32 storage (as the report feeds it) must give the float64 sums of the same values
    x, e = x.astype(dtype), e.astype(dtype)
    d, a, b = DualTruePeakMeter(2), TruePeakMeter(2), TruePeakMeter(2)
    for i in range(0, n, block):
        d.process(x[i:i + block], e[i:i + block])
    d.finish()
    a.process(x.astype(np.float64))
    a.finish()
    b.process(x.astype(np.float64) + e.astype(np.float64))
    b.finish()
    assert np.array_equal(d.peak_in, a.true_peak)
    assert np.array_equal(d.peak_out, b.true_peak)


def test_dual_meter_finds_peaks_float32_cannot_tell_apart():
    # The float32 screen must not hide a later peak that exceeds an earlier one by less
    # than float32 resolution (2**-24 relative): the reading must still equal the plain
    # float64 meter's, bit for bit. Without the screen's rounding margin about half of
    # these cases read the earlier, lower peak.
    t = np.arange(24000)
    tone = 0.7 * np.sin(2 * np.pi * 1000.3 * t / 48000 + 0.3)
    for i in range(1, 25):
        x = np.concatenate([tone, tone * (1 + i * 2e-9)])[:, None]
        e = np.zeros_like(x)
        d, a = DualTruePeakMeter(1), TruePeakMeter(1)
        for k in range(0, x.shape[0], 4096):
            d.process(x[k:k + 4096], e[k:k + 4096])
        d.finish()
        a.process(x)
        a.finish()
        assert np.array_equal(d.peak_in, a.true_peak), i
        assert np.array_equal(d.peak_out, a.true_peak), i


def test_dual_meter_plain_twin_equals_compiled():
    rng = np.random.default_rng(3)
    x = rng.uniform(-1, 1, (3000, 2))
    e = rng.uniform(-0.01, 0.01, (3000, 2))
    d1, d2 = DualTruePeakMeter(2), DualTruePeakMeter(2)
    for a, b in ((0, 5), (5, 1200), (1200, 1203), (1203, 3000)):  # blocks shorter than history
        d1.process(x[a:b], e[a:b])
        d2.process(x[a:b], e[a:b], kernel=dual_peak_kernel_py)
        assert np.array_equal(d1.peak_in, d2.peak_in)
        assert np.array_equal(d1.peak_out, d2.peak_out)


# --- SkippingTruePeakMeter: one signal, the same reading as the plain meter, bit for bit -------

from requant.dsp.truepeak import SkippingTruePeakMeter, peak_kernel_py  # noqa: E402


def _skipping(x, block, kernel=None):
    m = SkippingTruePeakMeter(x.shape[1])
    for i in range(0, x.shape[0], block):
        m.process(x[i:i + block], kernel=kernel)
    m.finish()
    return m.true_peak


@pytest.mark.parametrize("channels", [1, 2, 3, 6])
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("block", [pytest.param(5, marks=pytest.mark.slow), 1000, 65536])
def test_skipping_meter_equals_the_plain_meter(channels, dtype, block):
    # The plain BS.1770-4 meter on the same samples is the reference; the skip rule, the float32
    # screen and its rounding margin must never change a reading.
    rng = np.random.default_rng(channels)
    n = 60000
    t = np.arange(n) / 48000
    x = 0.3 * rng.standard_normal((n, channels)) * (np.sin(2 * np.pi * 0.9 * t) ** 8)[:, None]
    x[n // 3:n // 3 + 64, 0] = 0.9 * np.sin(np.pi / 2 * np.arange(64) + np.pi / 4)  # fs/4 burst
    x = x.astype(dtype)
    ref = TruePeakMeter(channels)
    ref.process(x.astype(np.float64))
    ref.finish()
    assert np.array_equal(_skipping(x, block), ref.true_peak)


def test_skipping_meter_reads_integer_codes_exactly():
    # int32 blocks are left-justified codes; metered in code units and scaled by 2^-31 (a power
    # of two: exact), the reading equals the plain meter's on code / 2^31.
    rng = np.random.default_rng(4)
    codes = (rng.integers(-2**23, 2**23, (30000, 2)) * 256).astype(np.int32)
    codes[100:103, 1] = np.iinfo(np.int32).min  # the most negative code: |x| = 1 exactly
    ref = TruePeakMeter(2)
    ref.process(codes / 2.0**31)
    ref.finish()
    assert np.array_equal(_skipping(codes, 4096), ref.true_peak)


def test_skipping_meter_plain_twin_equals_compiled():
    x = np.random.default_rng(5).uniform(-1, 1, (3000, 2))
    assert np.array_equal(_skipping(x, 700), _skipping(x, 700, kernel=peak_kernel_py))
