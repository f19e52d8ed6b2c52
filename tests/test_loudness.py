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
