"""ITU-R BS.1770-4 loudness (requant.dsp.loudness) against published check values and
pyloudnorm, the reference library for BS.1770-4 (REFERENCES.md §5, §7)."""

import math

import numpy as np
import pytest
from scipy.signal import sosfilt, sosfilt_zi, sosfreqz

from requant.dsp.loudness import (
    K_WEIGHTING_48K,
    block_mean_squares,
    gated_loudness,
    integrated_loudness,
    k_weighting_sos,
    step_sums,
)

pyln = pytest.importorskip("pyloudnorm", reason="pyloudnorm is the test extra's reference")


def sine(freq, seconds, rate, level_dbfs, channels=1, phase=0.0):
    t = np.arange(int(round(seconds * rate))) / rate
    x = 10 ** (level_dbfs / 20) * np.sin(2 * np.pi * freq * t + phase)
    return np.repeat(x[:, None], channels, axis=1)


def test_ebu_tech_3341_stereo_sine_reads_minus_23():
    # EBU Tech 3341 (from memory, REFERENCES.md §7): a 1 kHz sine at -23 dBFS in both channels
    # of a stereo programme reads -23.0 LUFS ±0.1.
    x = sine(1000.0, 20.0, 48000, -23.0, channels=2)
    assert integrated_loudness(x, 48000) == pytest.approx(-23.0, abs=0.1)


@pytest.mark.parametrize("rate", [44100, 48000, 96000])
def test_full_scale_997_hz_in_one_channel_reads_minus_3_01(rate):
    # BS.1770-4 calibration (REFERENCES.md §5, computed): a 0 dBFS 997 Hz sine in one
    # channel reads -3.01 LKFS. Designed from the analog prototype, other rates read the same.
    x = sine(997.0, 10.0, rate, 0.0)
    assert integrated_loudness(x, rate) == pytest.approx(-3.01, abs=0.02)


def test_48k_design_gives_the_tabled_coefficients_back():
    # Turning each tabled section into its analog prototype and back at 48 kHz must be exact.
    sos = k_weighting_sos(48000)
    for row, (b, a) in zip(sos, K_WEIGHTING_48K):
        np.testing.assert_allclose(row, [*b, *a], rtol=0, atol=1e-12)


@pytest.mark.parametrize("rate", [32000, 44100, 48000, 88200, 96000, 192000])
def test_k_weighting_response_against_pyloudnorm(rate):
    # pyloudnorm (reference library) designs the same two sections for any rate. Its
    # high-pass numerator is normalized to unity pass-band gain, while BS.1770-4 Table 2 has
    # [1, -2, 1] (+0.04 dB above it): the responses agree within 0.06 dB from 20 Hz up.
    meter = pyln.Meter(rate)
    f = np.geomspace(20.0, 0.45 * rate, 300)
    ours = np.abs(sosfreqz(k_weighting_sos(rate), worN=f, fs=rate)[1])
    theirs = np.ones_like(f)
    for stage in meter._filters.values():
        theirs *= np.abs(sosfreqz(np.r_[stage.b, stage.a][None, :], worN=f, fs=rate)[1])
    assert np.max(np.abs(20 * np.log10(ours / theirs))) <= 0.06


def _programme(rate, channels, seed):
    """Noise bursts and tones at several levels, with digital silence, so both gates act."""
    rng = np.random.default_rng(seed)
    parts = []
    for level, seconds in ((-18, 2.0), (-40, 1.5), (0, 0.0), (-25, 2.5), (-85, 1.0), (-30, 1.2)):
        n = int(seconds * rate)
        if level == 0:
            parts.append(np.zeros((int(0.8 * rate), channels)))
            continue
        x = rng.standard_normal((n, channels)) * 10 ** (level / 20)
        x += sine(rng.uniform(80, 9000), seconds, rate, level - 6, channels)[:n]
        parts.append(x)
    return np.concatenate(parts)


@pytest.mark.parametrize("rate, channels, seed", [(48000, 2, 1), (44100, 1, 2), (96000, 2, 3),
                                                  (48000, 1, 4), (22050, 2, 5)])
def test_integrated_loudness_against_pyloudnorm(rate, channels, seed):
    # pyloudnorm (reference library) implements BS.1770-4 gating; the filters differ by at
    # most 0.06 dB (above), the gating not at all on blocks of whole 100 ms steps.
    x = _programme(rate, channels, seed)
    ref = pyln.Meter(rate).integrated_loudness(x)
    assert integrated_loudness(x, rate) == pytest.approx(ref, abs=0.06)


def test_relative_gate_leaves_out_the_quiet_part():
    # BS.1770-4 §2.6 (REFERENCES.md §7, from memory): blocks more than 10 LU below the
    # absolute-gated loudness do not count. A 1 kHz tone at -20 dBFS for 4 s, then 30 dB
    # lower for 4 s. By hand from the definition: 400 ms blocks every 100 ms; the 37 blocks
    # inside the loud part count fully, the three that straddle the step hold 3/4, 1/2 and
    # 1/4 of loud power (plus 1/1000 of the rest) and pass the gate (-1.2, -3, -6 LU); every
    # block of the quiet part (-30 LU) is left out. So the reading is the loud part's plus
    # 10*log10((37 + 1.5 + 0.0015) / 40).
    loud = sine(1000.0, 4.0, 48000, -20.0, channels=2)
    both = np.concatenate([loud, loud * 10 ** (-30 / 20)])
    expected = integrated_loudness(loud, 48000) + 10 * math.log10((37 + 1.5 + 0.0015) / 40)
    assert integrated_loudness(both, 48000) == pytest.approx(expected, abs=0.005)
    # without the relative gate the quiet blocks would pull the reading down by about 3 dB
    assert integrated_loudness(both, 48000) > integrated_loudness(loud, 48000) - 0.2


def test_undefined_loudness_is_none():
    assert integrated_loudness(np.zeros((48000, 2)), 48000) is None  # digital silence
    assert integrated_loudness(sine(1000, 0.3, 48000, -10), 48000) is None  # < one block
    # below the absolute gate of -70 LUFS: a -75 dBFS tone reads about -75
    assert integrated_loudness(sine(1000, 2.0, 48000, -75.0), 48000) is None


def test_blocks_from_chunks_equal_the_whole():
    # The block-wise pieces a streaming meter needs: filtering chunk by chunk with the state
    # carried, and summing whole 100 ms steps, gives the same blocks as the whole array.
    rate = 48000
    x = _programme(rate, 2, 7)
    sos = k_weighting_sos(rate)
    step = 4800
    whole = step_sums(sosfilt(sos, x, axis=0), step)
    zi = np.zeros((sos.shape[0], 2, 2))
    sums, carry = [], np.zeros((0, 2))
    for chunk in np.array_split(x, [7919, 50000, 50001, 200000]):
        y, zi = sosfilt(sos, chunk, axis=0, zi=zi)
        y = np.concatenate([carry, y])
        k = (y.shape[0] // step) * step
        sums.append(step_sums(y[:k], step))
        carry = y[k:]
    np.testing.assert_allclose(np.concatenate(sums), whole, rtol=1e-9, atol=1e-18)
    assert gated_loudness(block_mean_squares(whole, step)) == integrated_loudness(x, rate)
    assert sosfilt_zi(sos).shape == (2, 2)  # the state shape a meter keeps per channel


def test_channel_weights():
    # BS.1770-4: surround channels weigh 1.41; giving a channel weight 0 leaves it out.
    x = sine(1000.0, 3.0, 48000, -20.0, channels=2)
    both = integrated_loudness(x, 48000)
    one = integrated_loudness(x, 48000, weights=[1.0, 0.0])
    assert both - one == pytest.approx(10 * math.log10(2), abs=1e-9)
    surround = integrated_loudness(x, 48000, weights=[1.0, 1.41])
    assert surround - one == pytest.approx(10 * math.log10(2.41), abs=1e-9)
    with pytest.raises(ValueError, match="weights"):
        integrated_loudness(x, 48000, weights=[1.0])


def test_rate_too_low_is_refused():
    with pytest.raises(ValueError, match="too low"):
        k_weighting_sos(3000)


# --- The streaming meter (LoudnessMeter): the same figures for any blocks, outside references ---

from requant.dsp.loudness import (  # noqa: E402
    GATE_BIN_LU,
    LoudnessMeter,
    channel_weights,
    kernel_py,
)


def meter_reading(x, rate, *, block=65536, weights=None):
    m = LoudnessMeter(x.shape[1], rate, weights=weights)
    for i in range(0, x.shape[0], block):
        m.process(x[i:i + block])
    return m.readings()[0]


def parts(rate, levels_seconds, channels=2, freq=1000.0):
    """Consecutive 1 kHz sine stretches (the EBU test signals' shape), (level dBFS, seconds)."""
    return np.concatenate([sine(freq, s, rate, level, channels) for level, s in levels_seconds])


@pytest.mark.parametrize("rate", [44100, 48000])
@pytest.mark.parametrize("case, levels, expected", [
    # EBU Tech 3341 (2016) test signals 1 to 5, from memory (REFERENCES.md §7): stereo 1 kHz
    # sines, the expected reading ±0.1 LU. 2: the level follows the sine. 3: the -36 dBFS parts
    # are 13 LU below: the relative gate leaves them out. 4: the -72 dBFS parts are below the
    # absolute gate. 5: -26/-20/-26 dBFS over 20 s, 20.1 s, 20 s reads -23.0 (the loud part
    # dominates the power mean; the quiet parts pass both gates).
    ("3341-1", [(-23.0, 20.0)], -23.0),
    ("3341-2", [(-33.0, 20.0)], -33.0),
    ("3341-3", [(-36.0, 10.0), (-23.0, 60.0), (-36.0, 10.0)], -23.0),
    ("3341-4", [(-72.0, 10.0), (-36.0, 10.0), (-23.0, 60.0), (-36.0, 10.0), (-72.0, 10.0)], -23.0),
    ("3341-5", [(-26.0, 20.0), (-20.0, 20.1), (-26.0, 20.0)], -23.0),
])
def test_ebu_tech_3341_signals(rate, case, levels, expected):
    got = meter_reading(parts(rate, levels), rate)["integrated_lufs"]
    assert got == pytest.approx(expected, abs=0.1), case


def test_ebu_tech_3341_five_channels_and_an_lfe():
    # EBU Tech 3341 test 6, from memory (REFERENCES.md §7): 1 kHz sines at L, R -28, C -24, Ls,
    # Rs -30 dBFS read -23.0 LUFS ±0.1. Checked by hand from BS.1770-4: the mean squares
    # weighted 1, 1, 1, 1.41, 1.41 sum to 0.00997/2, times the K-weighting's gain at 1 kHz
    # (+0.69 dB) gives -22.33 dB, minus 0.691: -23.02. In the 5.1 order (L R C LFE Ls Rs) the
    # LFE weighs 0 (BS.1770-4), so a loud LFE changes nothing.
    rate = 48000
    levels = [-28.0, -28.0, -24.0, -30.0, -30.0]
    five = np.column_stack([sine(1000.0, 20.0, rate, v)[:, 0] for v in levels])
    assert channel_weights(5) == ("L R C Ls Rs", (1.0, 1.0, 1.0, 1.41, 1.41))
    assert meter_reading(five, rate)["integrated_lufs"] == pytest.approx(-23.0, abs=0.1)
    lfe = sine(60.0, 20.0, rate, -6.0)[:, 0]
    six = np.column_stack([five[:, :3], lfe, five[:, 3:]])
    assert channel_weights(6)[1] == (1.0, 1.0, 1.0, 0.0, 1.41, 1.41)
    assert (meter_reading(six, rate)["integrated_lufs"]
            == pytest.approx(meter_reading(five, rate)["integrated_lufs"], abs=1e-9))


def test_other_channel_counts_weigh_every_channel_one():
    assert channel_weights(4) == ("4 channels, each weighted 1.0", (1.0,) * 4)
    assert channel_weights(1)[1] == (1.0,) and channel_weights(2)[1] == (1.0, 1.0)


@pytest.mark.parametrize("case, levels, expected", [
    # EBU Tech 3342 loudness range test signals 1 to 4, from memory (REFERENCES.md §7): stereo
    # 1 kHz sines, 20 s per part; the standard allows ±1 LU. By hand: the short-term values
    # (3 s windows every 100 ms) sit on the plateaus but for the 29 windows straddling each
    # step, so the 10th and 95th percentiles fall on the quieter and the louder plateau; in
    # test 4 the -50 dBFS parts fall below the relative gate (20 LU under the power mean,
    # about -46.7 LUFS). So the range is the plateaus' difference to the bins' 0.01 LU.
    ("3342-1", [(-20.0, 20.0), (-30.0, 20.0)], 10.0),
    ("3342-2", [(-20.0, 20.0), (-15.0, 20.0)], 5.0),
    ("3342-3", [(-40.0, 20.0), (-20.0, 20.0)], 20.0),
    ("3342-4", [(-50.0, 20.0), (-35.0, 20.0), (-20.0, 20.0), (-35.0, 20.0), (-50.0, 20.0)], 15.0),
])
def test_ebu_tech_3342_loudness_range(case, levels, expected):
    got = meter_reading(parts(48000, levels), 48000)["range_lu"]
    assert got == pytest.approx(expected, abs=2 * GATE_BIN_LU), case


@pytest.mark.parametrize("rate, channels, seed", [(48000, 2, 1), (44100, 1, 2), (96000, 2, 3),
                                                  (48000, 6, 4), (22050, 2, 5)])
def test_streaming_meter_against_pyloudnorm_and_the_array_function(rate, channels, seed):
    # pyloudnorm (reference library): within ±0.1 LU on varied material (tones, noise bursts,
    # silence, levels from -85 to -18 dBFS). The array function's gating is exact; the meter
    # decides the relative gate per 0.01 LU bin, so they agree to well within 0.01 LU.
    x = _programme(rate, channels, seed)
    weights = channel_weights(channels)[1]
    got = meter_reading(x, rate, block=7919)["integrated_lufs"]
    assert got == pytest.approx(integrated_loudness(x, rate, weights=weights), abs=0.01)
    # pyloudnorm weighs channels 4 and 5 as surrounds (1.41) and takes at most five: give it
    # the 5.1 signal without its LFE (weight 0 here)
    ref = pyln.Meter(rate).integrated_loudness(x[:, [0, 1, 2, 4, 5]] if channels == 6 else x)
    assert got == pytest.approx(ref, abs=0.1)


@pytest.mark.parametrize("sizes", [pytest.param([1], marks=pytest.mark.slow), [7], [4800],
                                   [65536], "uneven"])
def test_any_blocks_give_the_same_readings_bit_for_bit(sizes):
    rate = 8000  # short, so that one-frame blocks stay quick
    x = _programme(rate, 2, 6)[: 10 * rate]
    if sizes == "uneven":
        sizes = list(np.random.default_rng(3).integers(0, 3000, 40))
    whole = LoudnessMeter(2, rate)
    whole.process(x)
    parted = LoudnessMeter(2, rate)
    i = k = 0
    while i < x.shape[0]:
        n = int(sizes[k % len(sizes)])
        parted.process(x[i:i + n])
        i += n
        k += 1
    assert parted.readings() == whole.readings()
    assert whole.readings()[0]["integrated_lufs"] is not None


def test_output_is_gain_times_input_plus_error():
    # The second signal is gain * x + e, measured in the same pass: it must read as the array
    # function reads that signal (BS.1770-4, within the meter's 0.01 LU bins).
    rate = 48000
    x = _programme(rate, 2, 8)
    e = (np.random.default_rng(9).uniform(-1, 1, x.shape) * 1e-3).astype(np.float32)
    m = LoudnessMeter(2, rate, with_output=True, gain=0.5)
    for i in range(0, x.shape[0], 30000):
        m.process(x[i:i + 30000], e[i:i + 30000])
    src, out = m.readings()
    assert src["integrated_lufs"] == pytest.approx(integrated_loudness(x, rate), abs=0.01)
    y = 0.5 * x + e.astype(np.float64)
    assert out["integrated_lufs"] == pytest.approx(integrated_loudness(y, rate), abs=0.01)
    assert src["integrated_lufs"] - out["integrated_lufs"] == pytest.approx(6.02, abs=0.05)


@pytest.mark.parametrize("signals", [1, 2])
@pytest.mark.parametrize("channels", [1, 2, 3])
def test_compiled_kernel_equals_plain_twin(signals, channels):
    rate = 8000
    x = _programme(rate, channels, 10)[:9000]
    e = (np.random.default_rng(11).uniform(-1, 1, x.shape) * 1e-3).astype(np.float32)
    a = LoudnessMeter(channels, rate, with_output=signals == 2, gain=0.8)
    b = LoudnessMeter(channels, rate, with_output=signals == 2, gain=0.8)
    for i in range(0, x.shape[0], 2500):
        a.process(x[i:i + 2500], e[i:i + 2500])
        b.process(x[i:i + 2500], e[i:i + 2500], kernel=kernel_py(signals))
    assert a.readings() == b.readings()
    assert np.array_equal(a._z, b._z) and np.array_equal(a._part, b._part)


@pytest.mark.parametrize("channels", [1, 2, 3])
def test_two_signals_meter_the_block_as_one_signal_does(channels):
    # With the output beside it, the block's recursions share a loop with the output's; they
    # must still do exactly what the one-signal pass does (the same state, the same sums).
    rate = 8000
    x = _programme(rate, channels, 10)[:9000]
    e = (np.random.default_rng(12).uniform(-1, 1, x.shape) * 1e-3).astype(np.float32)
    one = LoudnessMeter(channels, rate)
    two = LoudnessMeter(channels, rate, with_output=True, gain=0.8)
    for i in range(0, x.shape[0], 2500):
        one.process(x[i:i + 2500])
        two.process(x[i:i + 2500], e[i:i + 2500])
    assert two.readings()[0] == one.readings()[0]
    pairs = (channels + 1) // 2
    assert np.array_equal(two._z.reshape(pairs, 2, 12)[:, 0], one._z.reshape(pairs, 12))


def test_integer_codes_read_as_their_full_scale_values():
    # int32 blocks are left-justified codes: code / 2^31 is the sample (as for libsndfile).
    x = sine(1000.0, 5.0, 48000, -23.0, channels=2)
    codes = np.round(x * 2**31).astype(np.int32)
    assert (meter_reading(codes, 48000)["integrated_lufs"]
            == pytest.approx(meter_reading(codes / 2**31, 48000)["integrated_lufs"], abs=1e-9))


def test_undefined_readings_are_none():
    assert meter_reading(np.zeros((48000, 2)), 48000) == {"integrated_lufs": None,
                                                          "range_lu": None}
    short = meter_reading(sine(1000.0, 1.0, 48000, -20.0, channels=2), 48000)
    assert short["integrated_lufs"] is not None and short["range_lu"] is None  # < 3 s
