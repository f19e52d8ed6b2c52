"""Tests for requant.inspection: what a file really holds.

Fixture files are written with soundfile from integer arrays (int16, or int32
left-justified), so every sample value is known exactly (python-soundfile docs,
REFERENCES.md section 6).
"""

import math

import numpy as np
import pytest
import soundfile as sf

from requant.errors import InputError, UsageError
from requant.inspection import format_inspection, inspect_file

RATE = 48000


def codes_left_justified(values, bits):
    """int32 codes of a ``bits``-bit word, left-justified as libsndfile expects."""
    v = np.asarray(values, dtype=np.int64)
    assert v.min() >= -(2 ** (bits - 1)) and v.max() <= 2 ** (bits - 1) - 1
    return (v << (32 - bits)).astype(np.int32)


def write(tmp_path, name, data, subtype, *, rate=RATE, fmt=None):
    path = tmp_path / name
    sf.write(path, data, rate, subtype=subtype, format=fmt)
    return path


def random_codes(bits, frames, channels, seed):
    """Random ``bits``-bit codes, each channel holding code 1 (the lowest bit) once."""
    rng = np.random.default_rng(seed)
    hi = 2 ** (bits - 1)
    v = rng.integers(-hi // 4, hi // 4, size=(frames, channels))
    v[0, :] = 1
    v = np.concatenate([v, -v])  # exactly zero mean: no DC finding by accident
    return v


def full_scale_sine_codes(bits, frames, freq=997.0, amplitude=None):
    """Rounded codes of a sine; AES17 uses 997 Hz (not a sub-multiple of fs)."""
    a = (2 ** (bits - 1) - 1) if amplitude is None else amplitude
    n = np.arange(frames)
    return np.round(a * np.sin(2 * np.pi * freq * n / RATE)).astype(np.int64)


# --------------------------------------------------------------------------
# Reading: our int32 path equals libsndfile's own float64 reading


@pytest.mark.parametrize(
    "subtype, fmt, bits",
    [("PCM_U8", "WAV", 8), ("PCM_S8", "AIFF", 8), ("PCM_16", "WAV", 16), ("PCM_24", "WAV", 24),
     ("PCM_32", "WAV", 32)],
)
def test_int32_over_2_31_equals_libsndfile_float_read(tmp_path, subtype, fmt, bits):
    # Reference library: soundfile's float64 reading of PCM divides by 2^(bits-1)
    # (python-soundfile docs); our path reads int32 and divides by 2^31.
    v = random_codes(bits, 500, 2, 1)
    v[1, 0] = -(2 ** (bits - 1))
    v[2, 1] = 2 ** (bits - 1) - 1
    path = write(tmp_path, f"x.{fmt.lower()}", codes_left_justified(v, bits), subtype, fmt=fmt)
    with sf.SoundFile(path) as f:
        ref = f.read(dtype="float64")
        f.seek(0)
        ours = f.read(dtype="int32") * 2.0**-31
    np.testing.assert_array_equal(ours, ref)
    np.testing.assert_array_equal(ref, v / 2 ** (bits - 1))


# --------------------------------------------------------------------------
# Word length in use


@pytest.mark.parametrize(
    "subtype, fmt, content_bits",
    [
        ("PCM_24", "WAV", 16),   # 16-bit audio in a 24-bit file
        ("PCM_16", "WAV", 12),   # 12-bit content in a 16-bit file
        ("PCM_16", "WAV", 16),
        ("PCM_24", "WAV", 24),
        ("PCM_32", "WAV", 20),
        ("PCM_32", "WAV", 32),
        ("PCM_24", "FLAC", 16),
        ("PCM_U8", "WAV", 8),
        ("PCM_U8", "WAV", 5),
    ],
)
def test_bits_used_pcm(tmp_path, subtype, fmt, content_bits):
    container = {"PCM_U8": 8, "PCM_16": 16, "PCM_24": 24, "PCM_32": 32}[subtype]
    v = random_codes(content_bits, 1000, 2, 2)
    path = write(tmp_path, f"x.{fmt.lower()}", codes_left_justified(v, content_bits), subtype,
                 fmt=fmt)
    r = inspect_file(path)
    assert r["bits_used"] == content_bits
    assert [p["bits_used"] for p in r["per_channel"]] == [content_bits, content_bits]
    assert r["bits_kind"] == "pcm"
    assert r["container_bits"] == container
    assert (r["container"], r["subtype"]) == (fmt, subtype)
    expected = "lossless-reduction" if content_bits < container else "full-word-length"
    assert expected in r["findings"]
    assert {"lossless-reduction", "full-word-length"} - {expected} & set(r["findings"]) == set()
    if content_bits < container:
        assert f"converting to {content_bits} bits is lossless" in " ".join(r["recommendations"])


def test_bits_used_per_channel_differ(tmp_path):
    v16 = random_codes(16, 500, 1, 3)
    v10 = random_codes(10, 500, 1, 4)
    data = np.column_stack([codes_left_justified(v16[:, 0], 16),
                            codes_left_justified(v10[:, 0], 10)])
    r = inspect_file(write(tmp_path, "x.wav", data, "PCM_24"))
    assert [p["bits_used"] for p in r["per_channel"]] == [16, 10]
    assert r["bits_used"] == 16


@pytest.mark.parametrize("subtype, container_bits", [("FLOAT", 24), ("DOUBLE", 53)])
@pytest.mark.parametrize("grid_bits", [8, 16, 24])
def test_bits_used_float_file_on_a_grid(tmp_path, subtype, container_bits, grid_bits):
    v = random_codes(grid_bits, 1000, 2, 5)
    x = v / 2.0 ** (grid_bits - 1)  # exact in float32 for grid_bits <= 24
    r = inspect_file(write(tmp_path, "x.wav", x.astype(np.float32), subtype))
    assert r["bits_used"] == grid_bits
    assert r["bits_kind"] == "grid"
    assert r["container_bits"] == container_bits
    assert "lossless-reduction" in r["findings"]
    assert f"converting to {grid_bits}-bit PCM is lossless" in " ".join(r["recommendations"])


@pytest.mark.parametrize("subtype, expected_bits", [("FLOAT", 24), ("DOUBLE", 53)])
def test_float_content_off_any_grid_reports_container_bits(tmp_path, subtype, expected_bits):
    rng = np.random.default_rng(6)
    x = rng.uniform(-0.5, 0.5, size=(1000, 1))
    x = np.concatenate([x, -x])
    if subtype == "FLOAT":
        x = x.astype(np.float32)
    r = inspect_file(write(tmp_path, "x.wav", x, subtype))
    assert r["bits_kind"] == "float"
    assert r["bits_used"] == expected_bits
    assert "float-content" in r["findings"] and "lossless-reduction" not in r["findings"]


def test_float_grid_content_at_plus_full_scale_is_not_lossless(tmp_path):
    # +1.0 has no code in PCM (the top code is 1 - 1 LSB), so the reduction is
    # not lossless even though the samples are on the 16-bit grid.
    v = random_codes(16, 1000, 1, 7) / 32768.0
    v[5, 0] = 1.0
    r = inspect_file(write(tmp_path, "x.wav", v.astype(np.float32), "FLOAT"))
    assert r["bits_used"] == 16 and r["bits_kind"] == "grid"
    assert "grid-over" in r["findings"] and "lossless-reduction" not in r["findings"]


@pytest.mark.parametrize("subtype", ["PCM_16", "PCM_24", "FLOAT"])
def test_all_zero_file(tmp_path, subtype):
    data = np.zeros((4800, 2), dtype=np.float32 if subtype == "FLOAT" else np.int32)
    r = inspect_file(write(tmp_path, "x.wav", data, subtype))
    assert r["bits_used"] == 0
    assert r["peak_dbfs"] is None and r["true_peak_dbtp"] is None and r["rms_dbfs"] is None
    assert r["silent_fraction"] == 1.0
    assert r["noise_floor_dbfs"] is None
    assert r["findings"] == ["all-silent"]


def test_empty_file(tmp_path):
    r = inspect_file(write(tmp_path, "x.wav", np.zeros((0, 1), dtype=np.int16), "PCM_16"))
    assert r["frames"] == 0 and r["findings"] == ["empty"]
    assert r["silent_fraction"] is None
    format_inspection(r)


# --------------------------------------------------------------------------
# Levels


def test_full_scale_sine_reads_0_dbfs_rms(tmp_path):
    # AES17 [V, REFERENCES.md 5]: a full-scale sine is 0 dBFS. 997 whole cycles
    # in 48000 samples, so the mean of sin^2 is exactly 1/2.
    v = full_scale_sine_codes(24, RATE)
    r = inspect_file(write(tmp_path, "x.wav", codes_left_justified(v, 24), "PCM_24"))
    assert r["rms_dbfs"] == pytest.approx(0.0, abs=1e-4)
    # Peak: 20 log10(max|x|), from the codes themselves; the crest falls between
    # samples, so it lies a little under 0 dBFS: cos(pi * 997 / 48000) at worst.
    assert r["peak_dbfs"] == pytest.approx(20 * math.log10(np.abs(v).max() / 2**23), abs=1e-12)
    assert 20 * math.log10(math.cos(math.pi * 997 / RATE)) <= r["peak_dbfs"] <= 0.0
    assert r["duration_s"] == 1.0 and r["frames"] == RATE and r["sample_rate"] == RATE


def test_full_scale_square_reads_plus_3_01_dbfs(tmp_path):
    # AES17 [V, REFERENCES.md 5]: a full-scale square wave reads +3.01 dBFS.
    v = np.tile([2**15 - 1] * 24 + [-(2**15 - 1)] * 24, 1000)
    r = inspect_file(write(tmp_path, "x.wav", v.astype(np.int16), "PCM_16"))
    assert r["rms_dbfs"] == pytest.approx(3.0103, abs=0.001)
    assert r["per_channel"][0]["rms_dbfs"] == r["rms_dbfs"]


def test_overall_rms_is_over_all_channels(tmp_path):
    # AES17 levels: -6.02 and -12.04 dBFS sines; the overall mean square is the
    # mean of the two (closed form).
    a = full_scale_sine_codes(16, RATE, amplitude=16384)
    b = full_scale_sine_codes(16, RATE, amplitude=8192)
    r = inspect_file(write(tmp_path, "x.wav", np.column_stack([a, b]).astype(np.int16), "PCM_16"))
    ch = [p["rms_dbfs"] for p in r["per_channel"]]
    assert ch == pytest.approx([20 * math.log10(0.5), 20 * math.log10(0.25)], abs=1e-3)
    expected = 10 * math.log10((0.5**2 + 0.25**2) / 2)
    assert r["rms_dbfs"] == pytest.approx(expected, abs=1e-3)


def test_true_peak_of_quarter_rate_sine_at_45_degrees(tmp_path):
    # Check value: BS.1770-4 Annex 2 / REFERENCES.md section 5 [C]: sample peak
    # -3.01 dBFS, true peak 0 dBTP +-0.05 dB. Smooth fades keep the switch-on
    # transient out of the reading.
    n = np.arange(RATE)
    x = np.sin(np.pi / 2 * n + np.pi / 4)
    w = np.sin(np.linspace(0.0, np.pi / 2, 1024)) ** 2
    x[:1024] *= w
    x[-1024:] *= w[::-1]
    v = np.round(x * (2**23 - 1)).astype(np.int64)
    r = inspect_file(write(tmp_path, "x.wav", codes_left_justified(v, 24), "PCM_24"))
    assert r["peak_dbfs"] == pytest.approx(-3.0103, abs=0.001)
    assert r["true_peak_dbtp"] == pytest.approx(0.0, abs=0.05)


def test_dc_offset(tmp_path):
    # The mean of (constant + zero-mean signal) is the constant (closed form).
    rng = np.random.default_rng(8)
    s = rng.integers(-3000, 3000, size=2000)
    left = np.concatenate([s, -s]) + 328
    right = np.concatenate([s, -s]) + 10
    data = np.column_stack([left, right]).astype(np.int16)
    r = inspect_file(write(tmp_path, "x.wav", data, "PCM_16"))
    p0, p1 = r["per_channel"]
    assert p0["dc_offset"] == pytest.approx(328 / 32768, rel=1e-12)
    assert p0["dc_offset_dbfs"] == pytest.approx(20 * math.log10(328 / 32768), rel=1e-12)
    assert p1["dc_offset"] == pytest.approx(10 / 32768, rel=1e-12)
    assert r["dc_offset"] == p0["dc_offset"]  # the channel of largest |mean|
    # -39.99 dBFS on channel 1 triggers (threshold -60 dBFS, our choice);
    # -70.3 dBFS on channel 2 does not.
    assert "dc-offset" in r["findings"]
    text = " ".join(r["recommendations"])
    assert "channel 1" in text and "channel 2" not in text


# --------------------------------------------------------------------------
# Clipping, silence, noise floor


CLIP_RUNS = [  # (start, length, code) in a 16-bit file of 2000 frames
    (0, 3, 32767),      # at the very start
    (100, 1, 32767),
    (200, 2, -32768),
    (300, 3, -32768),
    (400, 5, 32767),
    (500, 4, -32767),   # -32767/32768 is within 1 LSB of full scale
    (600, 3, 32766),    # 2 LSB below: not full scale
    (1996, 4, 32767),   # at the very end
]


def _clip_file(tmp_path):
    rng = np.random.default_rng(9)
    v = rng.integers(-20000, 20000, size=2000)
    for start, length, code in CLIP_RUNS:
        v[start:start + length] = code
    return write(tmp_path, "clip.wav", v.astype(np.int16), "PCM_16")


@pytest.mark.parametrize("clip_run", [1, 2, 3, 4])
def test_clipped_runs_counted(tmp_path, clip_run):
    r = inspect_file(_clip_file(tmp_path), clip_run=clip_run)
    runs = [length for _, length, code in CLIP_RUNS if abs(code) >= 32767]
    assert r["clipped_samples"] == sum(n for n in runs if n >= clip_run)
    assert r["clip_runs"] == sum(1 for n in runs if n >= clip_run)
    assert ("clipping" in r["findings"]) == (r["clipped_samples"] > 0)


def test_clipping_of_16_bit_content_in_24_bit_file(tmp_path):
    v = np.zeros(1000, dtype=np.int64)
    v[10:20] = 32767  # 16-bit top code, left-justified into 24 bits
    v[50:55] = -32768
    r = inspect_file(write(tmp_path, "x.wav", codes_left_justified(v, 16), "PCM_24"))
    assert (r["clipped_samples"], r["clip_runs"]) == (15, 2)


def test_float_overs_are_not_clipping(tmp_path):
    x = np.zeros(1000, dtype=np.float32)
    x[10:20] = 1.5
    x[100:103] = 1.0
    r = inspect_file(write(tmp_path, "x.wav", x, "FLOAT"))
    assert r["over_samples"] == 10
    assert (r["clipped_samples"], r["clip_runs"]) == (3, 1)
    assert {"float-overs", "clipping", "true-peak-over"} <= set(r["findings"])


def test_silent_fraction(tmp_path):
    rng = np.random.default_rng(10)
    v = rng.integers(1, 1000, size=(1000, 2)) * rng.choice([-1, 1], size=(1000, 2))
    v[:300, 0] = 0
    v[100:1000, 1] = 0
    # runs of 6.25 and 18.75 ms: listed (so digital silence) from a 5 ms minimum
    r = inspect_file(write(tmp_path, "x.wav", v.astype(np.int16), "PCM_16"), silence_min_ms=5)
    assert [p["silent_fraction"] for p in r["per_channel"]] == [0.3, 0.9]
    assert r["silent_fraction"] == 0.6
    assert "mostly-silent" in r["findings"]  # 60 % in runs >= 50 % (our threshold)
    r = inspect_file(r["path"], silent_threshold=0.7, silence_min_ms=5)
    assert not {"mostly-silent", "scattered-zeros"} & set(r["findings"])
    # under the default 20 ms minimum the same zeros are no runs: scattered, not silence
    r = inspect_file(r["path"])
    assert "mostly-silent" not in r["findings"] and "scattered-zeros" in r["findings"]


def test_noise_floor_is_quiet_passage_level(tmp_path):
    # 80 % loud sine, 20 % quiet square wave of +-a, and a stretch of digital
    # silence that must be ignored. The 10th percentile of 50 ms blocks falls in
    # the quiet part, whose AES17 level is 20 log10(a) + 3.01 dB (closed form).
    a = 40
    loud = full_scale_sine_codes(16, 8 * 4800, amplitude=16000)
    quiet = np.tile([a] * 12 + [-a] * 12, 2 * 4800 // 24)
    silence = np.zeros(3 * 4800, dtype=np.int64)
    v = np.concatenate([loud, silence, quiet])
    r = inspect_file(write(tmp_path, "x.wav", v.astype(np.int16), "PCM_16"))
    expected = 20 * math.log10(a / 32768) + 10 * math.log10(2)
    assert r["quiet_level_dbfs"] == pytest.approx(expected, abs=0.01)  # 0.01 dB bins
    assert r["settings"]["floor_block_frames"] == 2400
    # a square wave is lines (its odd harmonics), no noise: no noise floor is claimed
    assert r["quiet_kind"] == "tonal" and r["quiet_tonal_fraction"] > 0.9
    assert r["noise_floor_dbfs"] is None


# --------------------------------------------------------------------------
# Recommendations fire when they should, and not otherwise


def _fixture(kind, tmp_path):
    rng = np.random.default_rng(11)
    base = rng.integers(-8000, 8000, size=(4000, 2))
    base = np.concatenate([base, -base])  # zero mean, far from full scale
    if kind == "clean-16":
        return write(tmp_path, "a.wav", base.astype(np.int16), "PCM_16"), ["full-word-length"]
    if kind == "16-in-24":
        return (write(tmp_path, "a.wav", codes_left_justified(base, 16), "PCM_24"),
                ["lossless-reduction"])
    if kind == "true-peak":
        n = np.arange(8000)
        x = np.round(32767 * np.sin(np.pi / 2 * n + np.pi / 4)).astype(np.int16)
        x[-1] = 1  # the codes +-23170 are even: set the lowest bit once
        return (write(tmp_path, "a.wav", x, "PCM_16"), ["full-word-length", "true-peak-over"])
    if kind == "clipped":
        v = base.copy()
        v[1000:1010, 0] = 32767
        v[5000:5010, 0] = -32767  # frames 5000.. hold minus frames 1000..: mean stays 0
        # Flat tops between busy samples also overshoot between samples.
        return (write(tmp_path, "a.wav", v.astype(np.int16), "PCM_16"),
                ["full-word-length", "true-peak-over", "clipping"])
    if kind == "dc":
        v = base + 100  # 20 log10(100/32768) = -50.3 dBFS
        return (write(tmp_path, "a.wav", v.astype(np.int16), "PCM_16"),
                ["full-word-length", "dc-offset"])
    if kind == "mostly-silent":
        v = base.copy()
        v[: int(0.75 * len(v))] = 0
        return (write(tmp_path, "a.wav", v.astype(np.int16), "PCM_16"),
                ["mostly-silent", "full-word-length"])
    if kind == "float-overs":
        x = (base / 8000.0 * 0.9).astype(np.float32)
        x[10, 0] = 1.25
        return (write(tmp_path, "a.wav", x, "FLOAT"),
                ["float-content", "float-overs", "true-peak-over"])
    if kind == "nonfinite":
        x = (base / 32768).astype(np.float32)
        x[10, 1] = np.nan
        return write(tmp_path, "a.wav", x, "FLOAT"), ["nonfinite", "lossless-reduction"]
    raise AssertionError(kind)


@pytest.mark.parametrize(
    "kind",
    ["clean-16", "16-in-24", "true-peak", "clipped", "dc", "mostly-silent", "float-overs",
     "nonfinite"],
)
def test_recommendations_fire_exactly_when_they_should(tmp_path, kind):
    path, expected = _fixture(kind, tmp_path)
    r = inspect_file(path)
    assert r["findings"] == expected
    assert len(r["recommendations"]) == len(expected)
    assert all(isinstance(s, str) and s.endswith(".") for s in r["recommendations"])


def test_true_peak_recommendation_only_above_0_dbtp(tmp_path):
    # The same fs/4 45-degree sine at half amplitude reads -6 dBTP: no finding.
    n = np.arange(8000)
    x = np.round(16384 * np.sin(np.pi / 2 * n + np.pi / 4)).astype(np.int16)
    r = inspect_file(write(tmp_path, "a.wav", x, "PCM_16"))
    assert "true-peak-over" not in r["findings"]
    assert r["true_peak_dbtp"] < 0.0


# --------------------------------------------------------------------------
# Streaming


def _busy_file(tmp_path, subtype):
    rng = np.random.default_rng(12)
    frames = 9001
    v = rng.integers(-3000, 3000, size=(frames, 3)) + np.array([0, 50, -7])
    v[:1000, 1] = 0
    v[4000:4400, 2] = 0
    v[2000:2010, 0] = 32767
    v[2399:2402, 2] = -32768
    if subtype == "FLOAT":
        data = (v / 32768.0).astype(np.float32)
        data[5000:5200, 0] *= np.float32(1.7)
        data[7000, 1] = np.float32(0.1234567)
    elif subtype == "DOUBLE":
        # Full-precision values, so that sums round and their order matters.
        data = v / 32768.0 + rng.uniform(-1e-3, 1e-3, size=v.shape) * (v != 0)
    else:
        data = codes_left_justified(v, 16)
    return write(tmp_path, "busy.wav", data, subtype, rate=8000)


@pytest.mark.parametrize("subtype", ["PCM_24", "FLOAT", "DOUBLE"])
@pytest.mark.parametrize("block_frames", [pytest.param(1, marks=pytest.mark.slow), 7, 400, 4096])
def test_tiny_blocks_give_the_same_report(tmp_path, subtype, block_frames):
    path = _busy_file(tmp_path, subtype)
    ref = inspect_file(path)
    got = inspect_file(path, block_frames=block_frames)
    assert got["settings"].pop("block_frames") == block_frames
    ref["settings"].pop("block_frames")
    assert got == ref  # exact equality, floats included


def test_nonfinite_samples_across_blocks_give_the_same_report(tmp_path):
    # Blocks go through three threads (scan, true peak of the block before, loudness): the
    # true-peak meter must get each block as the scan cleared it of NaN and infinity, in
    # order, whatever the block size (split equals whole, the scipy.signal.max_len_seq test
    # pattern).
    path = _busy_file(tmp_path, "FLOAT")
    x = sf.read(path, dtype="float32")[0]
    x[[5, 401, 4399, 8999], [0, 1, 2, 0]] = [np.nan, np.inf, -np.inf, np.nan]
    path = write(tmp_path, "nonfinite.wav", x, "FLOAT", rate=8000)
    ref = inspect_file(path)
    assert ref["nonfinite_samples"] == 4
    for block_frames in (400, 1000, 4096):
        got = inspect_file(path, block_frames=block_frames)
        got["settings"].pop("block_frames")
        assert got == {**ref, "settings": {k: v for k, v in ref["settings"].items()
                                           if k != "block_frames"}}


# --------------------------------------------------------------------------
# Rendering and errors


def test_format_inspection(tmp_path):
    path, _ = _fixture("16-in-24", tmp_path)
    r = inspect_file(path)
    text = format_inspection(r)
    assert "WAV, PCM_24, 48000 Hz, 2 channels" in text
    assert "Bits in use  16 of 24" in text
    assert "ch 1" in text and "ch 2" in text and "all" in text
    assert f"{r['peak_dbfs']:+.2f}" in text
    assert r["recommendations"][0] in text
    mono = format_inspection(inspect_file(write(tmp_path, "m.wav", np.zeros(10, np.int16),
                                                "PCM_16")))
    assert "n/a" in mono and "all" not in mono.split("\n")[5]


def test_missing_file_raises_input_error(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        inspect_file(tmp_path / "missing.wav")


def test_not_audio_raises_input_error(tmp_path):
    p = tmp_path / "x.wav"
    p.write_bytes(b"not audio at all")
    with pytest.raises(InputError, match="not an audio file"):
        inspect_file(p)


@pytest.mark.parametrize(
    "kwargs, error, match",
    [({"block_frames": 0}, UsageError, "block_frames"),
     ({"block_frames": 1.5}, TypeError, "block_frames"),
     ({"clip_run": 0}, UsageError, "clip_run"),
     ({"silent_threshold": 1.5}, UsageError, "silent_threshold"),
     ({"floor_percentile": -1}, UsageError, "floor_percentile"),
     ({"dc_threshold_dbfs": "x"}, TypeError, "dc_threshold_dbfs")],
)
def test_bad_options(tmp_path, kwargs, error, match):
    path = write(tmp_path, "x.wav", np.zeros(10, np.int16), "PCM_16")
    with pytest.raises(error, match=match):
        inspect_file(path, **kwargs)


# --------------------------------------------------------------------------
# The compiled scan kernel, and loudness


def test_scan_kernel_equals_plain_twin():
    # The same figures from the compiled kernel and its plain-Python twin, on blocks that take
    # every path: zeros, full-scale runs, NaN, values above full scale, uneven block sizes.
    from requant.dsp import native
    from requant.dsp.scan import CHANNEL_FIELDS, LANE_FIELDS, scan_block_plain

    rng = np.random.default_rng(13)
    for nch in (1, 2, 3):
        x = (rng.integers(-3000, 3000, (3001, nch)) / 32768.0).astype(np.float32)
        x[100:110, 0] = 1.0
        x[500, -1] = np.nan
        x[700:705] = 0.0
        x[900, 0] = 1.5
        outs = []
        for kern in (native.kernel("scan", x=np.float32), scan_block_plain):
            w = max(4, nch)
            lanes = np.zeros((len(LANE_FIELDS), w))
            lanes[3], lanes[4] = -np.inf, np.inf
            chans = np.zeros((nch, len(CHANNEL_FIELDS)))
            orb, ctl = np.zeros(w, np.uint64), np.zeros(2)
            got = []
            for a, b in ((0, 7), (7, 1200), (1200, 1201), (1201, 3001)):
                blocks = np.zeros(2 * nch * 8)
                part = np.ascontiguousarray(x[a:b])
                kern(part.reshape(-1), b - a, nch, 1.0, 1 - 2.0**-15, 3, 25, 480,
                     lanes.reshape(-1), chans.reshape(-1), orb, ctl, blocks)
                got.append(blocks[:2 * nch * int(ctl[1])].copy())
            outs.append((lanes, chans, ctl, np.concatenate(got)))
        for a, b in zip(*outs):
            assert np.array_equal(a, b, equal_nan=True), nch


def test_loudness_of_the_ebu_tech_3341_sine(tmp_path):
    # EBU Tech 3341 test 1, from memory (REFERENCES.md §7): a stereo 1 kHz sine at -23 dBFS
    # reads -23.0 LUFS ±0.1 (ITU-R BS.1770-4); a steady tone's loudness range is 0 LU.
    n = np.arange(20 * RATE)
    x = 10 ** (-23 / 20) * np.sin(2 * np.pi * 1000 * n / RATE)
    path = write(tmp_path, "tone.wav", np.column_stack([x, x]).astype(np.float32), "FLOAT")
    r = inspect_file(path, block_frames=30000)
    assert r["loudness"]["integrated_lufs"] == pytest.approx(-23.0, abs=0.1)
    assert r["loudness"]["range_lu"] == pytest.approx(0.0, abs=0.02)
    assert r["loudness"]["channel_layout"] == "L R"
    assert "LUFS" in format_inspection(r)
    assert r["findings"] == ["float-content"]  # loudness adds no finding


def test_loudness_undefined_below_the_gate_or_too_low_a_rate(tmp_path):
    r = inspect_file(write(tmp_path, "z.wav", np.zeros((48000, 2), np.int16), "PCM_16"))
    assert r["loudness"]["integrated_lufs"] is None and r["loudness"]["range_lu"] is None
    r = inspect_file(write(tmp_path, "low.wav", np.ones((4000, 1), np.int16), "PCM_16",
                           rate=3000))
    assert r["loudness"] == {"integrated_lufs": None, "range_lu": None, "channel_layout": None,
                             "channel_weights": None}
    assert "n/a" in format_inspection(r)


def test_side_thread_runs_in_order_and_reraises():
    # requant.dsp.overlap.SideThread: one call at a time, in order; an exception raised on the
    # thread reaches the caller at join(); close() is safe twice.
    from requant.dsp.overlap import SideThread

    seen = []
    with SideThread() as side:
        for k in range(5):
            side.start(seen.append, k)
        side.join()
        assert seen == [0, 1, 2, 3, 4]
        side.start(int, "not a number")
        with pytest.raises(ValueError):
            side.join()
    side.close()


# --------------------------------------------------------------------------
# Issue 20: the quietest passage, digital silence against dither, true peak, DC sign


def _loud_then(quiet, seconds=2.0):
    """Two seconds of a loud 997 Hz sine (float), then ``quiet``."""
    n = np.arange(int(seconds * RATE))
    return np.concatenate([0.5 * np.sin(2 * np.pi * 997 * n / RATE), quiet])


def test_quietest_passage_of_noise_is_the_noise_floor(tmp_path):
    # Gaussian noise of RMS sigma reads 10 log10(2 sigma^2) dBFS (AES17, closed form); the 10th
    # percentile of its 50 ms block levels lies 1.28 standard deviations (about 0.16 dB for
    # 2400 samples: sqrt(2/2400) relative power) below that.
    sigma = 10 ** (-73 / 20)
    noise = np.random.default_rng(20).normal(0.0, sigma, 2 * RATE)
    r = inspect_file(write(tmp_path, "n.wav", _loud_then(noise), "FLOAT"))
    expected = 10 * math.log10(2 * sigma**2)
    assert r["quiet_kind"] == "noise" and r["quiet_tonal_fraction"] < 0.01
    assert r["quiet_level_dbfs"] == pytest.approx(expected - 0.16, abs=0.15)
    assert r["noise_floor_dbfs"] == r["quiet_level_dbfs"]
    assert r["per_channel"][0]["noise_floor_dbfs"] == r["noise_floor_dbfs"]
    assert f"Noise floor: {r['noise_floor_dbfs']:+.1f} dBFS (the quietest passage is noise" in \
        format_inspection(r)


def test_quietest_passage_of_music_is_not_called_noise(tmp_path):
    # A quiet phrase of notes (a 110 Hz tone with six harmonics, then 165 Hz, each decaying)
    # at about -64 dBFS over 16-bit TPDF noise (-93.3 dBFS): music throughout, no noise floor.
    rng = np.random.default_rng(21)
    n = np.arange(RATE // 2)
    notes = []
    for f0 in (110.0, 165.0, 110.0, 165.0):
        tone = sum(0.6**k * np.sin(2 * np.pi * f0 * (k + 1) * n / RATE) for k in range(7))
        notes.append(tone * np.exp(-n / RATE / 0.8))
    phrase = 10 ** (-62 / 20) * np.concatenate(notes) / 2.0
    x = _loud_then(phrase)
    lsb = 2.0**-15
    codes = np.floor(x / lsb + 0.5 + rng.uniform(-0.5, 0.5, x.size)
                     + rng.uniform(-0.5, 0.5, x.size)).astype(np.int16)
    r = inspect_file(write(tmp_path, "m.wav", codes, "PCM_16"))
    assert r["quiet_kind"] == "tonal" and r["quiet_tonal_fraction"] > 0.5
    assert r["noise_floor_dbfs"] is None and r["quiet_level_dbfs"] < -60.0
    text = format_inspection(r)
    assert "Quietest passage (dBFS)" in text and "Noise floor (dBFS)" not in text
    assert "holds music or tones" in text
    # at 12 bits flat TPDF (-69.2 dBFS) lies under the phrase but is audible played loud
    a = inspect_file(r["path"], for_bits=12)["method_advice"]
    assert (a["choice"], a["reason"], a["quiet_is_noise"]) == ("hearing", "audible", False)
    assert "(music or tones, not noise)" in a["text"] and "--shaping hearing" in a["text"]


def test_noise_shaped_dither_is_noise(tmp_path):
    # Noise through the hearing shaper's NTF (scipy.signal.lfilter as the reference filter):
    # a steep but smooth spectrum, no lines.
    from scipy.signal import lfilter

    from requant.dsp.shaping import design_hearing, ntf_taps

    white = np.random.default_rng(22).uniform(-1, 1, 3 * 44100) * 2.0**-15
    shaped = lfilter(ntf_taps(design_hearing(44100)), [1.0], white)
    r = inspect_file(write(tmp_path, "s.wav", shaped.astype(np.float32), "FLOAT", rate=44100))
    assert r["quiet_kind"] == "noise" and r["noise_floor_dbfs"] is not None


def test_too_short_to_judge(tmp_path):
    # two 50 ms blocks: fewer than MIN_JUDGED_BLOCKS, so the passage is not judged
    x = np.random.default_rng(23).normal(0, 0.01, 2 * 2400)
    r = inspect_file(write(tmp_path, "t.wav", x.astype(np.float32), "FLOAT"))
    assert r["quiet_level_dbfs"] is not None and r["quiet_kind"] is None
    assert r["noise_floor_dbfs"] is None
    assert "not judged" in format_inspection(r)


def _dithered_8_bit_of_quiet_sine(tmp_path):
    """A -60 dBFS 997 Hz sine (4 s) requantized to 8 bits with TPDF by requant itself."""
    from requant.convert import Outputs, convert_file
    from requant.recipe import Recipe

    n = np.arange(4 * RATE)
    src = write(tmp_path, "quiet.wav",
                (10 ** (-60 / 20) * np.sin(2 * np.pi * 997 * n / RATE)).astype(np.float32),
                "FLOAT")
    out = tmp_path / "quiet8.wav"
    convert_file(src, out, Recipe.from_dict({"bits": 8, "dither": "tpdf", "seed": 4}),
                 outputs=Outputs())
    return out


def test_dithered_few_bit_output_is_not_missing_audio(tmp_path):
    # TPDF on a signal far below 1 LSB: codes 0 with probability about 3/4 and +-1 otherwise
    # (REFERENCES.md section 2: on-grid input gives -1, 0, +1 with 1/8, 3/4, 1/8), so most
    # samples are 0 but no run of zeros reaches 20 ms (960 samples: 0.75^960 ~ 1e-120).
    r = inspect_file(_dithered_8_bit_of_quiet_sine(tmp_path))
    assert r["silent_fraction"] == pytest.approx(0.75, abs=0.03)
    assert r["silent_run_count"] == 0 and r["silent_run_fraction"] == 0.0
    assert "mostly-silent" not in r["findings"] and "silent-gap" not in r["findings"]
    assert "scattered-zeros" in r["findings"]
    text = " ".join(r["recommendations"])
    assert "not missing audio" in text and "as dither noise makes them" in text
    assert "check for missing audio" not in text.lower()
    assert r["quiet_kind"] == "noise"  # the dither noise (-45 dBFS) covers the sine


@pytest.mark.parametrize("where", ["every", "one"])
def test_a_dropout_of_exact_zeros_is_missing_audio(tmp_path, where):
    rng = np.random.default_rng(24)
    v = rng.integers(-3000, 3000, size=(10 * RATE, 2))
    cols = slice(None) if where == "every" else slice(1, 2)
    v[4 * RATE:6 * RATE, cols] = 0  # a 2 s dropout in the middle
    r = inspect_file(write(tmp_path, "d.wav", v.astype(np.int16), "PCM_16"))
    assert "silent-gap" in r["findings"] and "mostly-silent" not in r["findings"]
    assert r["silent_run_fraction"] == pytest.approx(0.2 if where == "every" else 0.1)
    text = " ".join(r["recommendations"])
    assert "2.000 s at 4.000 s" in text and "Check for missing audio" in text
    assert ("(every channel)" if where == "every" else "(ch 2 only)") in text


def test_silence_at_the_ends_is_no_dropout(tmp_path):
    v = np.random.default_rng(25).integers(-3000, 3000, size=4 * RATE)
    v[:RATE] = 0
    v[-RATE:] = 0
    r = inspect_file(write(tmp_path, "p.wav", v.astype(np.int16), "PCM_16"))
    assert r["silent_run_count"] == 2 and "silent-gap" not in r["findings"]


def test_true_peak_is_never_below_the_sample_peak(tmp_path):
    # A lone 4-bit code among zeros: the ITU-R BS.1770-4 interpolator's largest tap is phase
    # 0's centre tap 0.9721679687500 (REFERENCES.md section 5), so the meter reads exactly
    # 0.97217 times the sample (-0.245 dB); the true peak shown is the sample peak.
    v = np.zeros(RATE, dtype=np.int64)
    v[RATE // 2] = 7
    r = inspect_file(write(tmp_path, "p.wav", codes_left_justified(v, 4), "PCM_16"))
    peak = 7 / 8
    assert r["peak"] == peak and r["true_peak"] == peak
    assert r["true_peak_meter"] == pytest.approx(0.97216796875 * peak, rel=1e-12)
    assert r["true_peak_meter_dbtp"] == pytest.approx(r["peak_dbfs"] - 0.2447, abs=1e-3)
    assert r["per_channel"][0]["true_peak_dbtp"] == r["peak_dbfs"]
    text = format_inspection(r)
    assert "reading is below the sample peak here (ch 1 -1.41 dBTP against -1.16 dBFS)" in text
    # where the meter reads above the samples, its reading stands
    n = np.arange(8000)
    x = np.round(16384 * np.sin(np.pi / 2 * n + np.pi / 4)).astype(np.int16)
    r = inspect_file(write(tmp_path, "s.wav", x, "PCM_16"))
    assert r["true_peak"] == r["true_peak_meter"] > r["peak"]
    assert "reading is below" not in format_inspection(r)


def test_dc_offset_keeps_its_sign(tmp_path):
    # mean -100 codes: -100/32768 = -0.3052 % of full scale, level 20 log10(100/32768)
    s = np.random.default_rng(26).integers(-3000, 3000, size=4000)
    v = np.concatenate([s, -s]) - 100
    r = inspect_file(write(tmp_path, "dc.wav", v.astype(np.int16), "PCM_16"))
    assert r["dc_offset"] == pytest.approx(-100 / 32768, rel=1e-12)
    assert r["dc_offset_polarity"] == "negative"
    assert r["per_channel"][0]["dc_offset_polarity"] == "negative"
    text = format_inspection(r)
    row = next(line for line in text.splitlines() if line.startswith("DC offset (% of FS)"))
    assert row.split()[-1] == "-0.3052"
    assert "mean -0.003052" in " ".join(r["recommendations"])


def test_method_advice_follows_the_file(tmp_path):
    # 16 bits of loud noise in a 24-bit file: nothing to add at 16 bits; at 12 bits the file's
    # own noise (about -7 dBFS) buries flat TPDF (-69.2 dBFS): plain TPDF
    from requant.dsp.audibility import floor_rise_db, tpdf_noise_dbfs

    path, _ = _fixture("16-in-24", tmp_path)
    r = inspect_file(path)
    assert r["method_advice"]["reason"] == "lossless"
    assert "no method needed" in r["method_advice"]["text"]
    r = inspect_file(path, for_bits=12)
    a = r["method_advice"]
    assert a["bits"] == 12 and a["choice"] == "tpdf" and a["reason"] == "own-noise"
    assert a["tpdf_dbfs"] == pytest.approx(tpdf_noise_dbfs(12))
    assert a["quiet_dbfs"] == r["quiet_level_dbfs"] and a["quiet_is_noise"] is True
    assert a["floor_rise_tpdf_db"] == floor_rise_db(a["quiet_dbfs"], a["tpdf_dbfs"])
    text = format_inspection(r)
    assert "Which method at 12 bits" in text and "Use plain TPDF" in a["text"]
    assert " ".join(a["text"].split()[:6]) in " ".join(text.split())
    with pytest.raises(UsageError, match="for_bits"):
        inspect_file(path, for_bits=33)


def test_cli_inspect_shows_what_issue_20_asked(tmp_path):
    # What the user sees: dither is not missing audio, a dropout is; the quietest passage is
    # named; the DC offset keeps its sign; the true peak note; the advice at --for-bits.
    import json

    from helpers import run_cli

    code, out, err = run_cli("inspect", _dithered_8_bit_of_quiet_sine(tmp_path))
    assert code == 0, err
    assert "not missing audio" in out and "check for missing audio" not in out.lower()
    assert "Quietest passage (dBFS)" in out and "Noise floor: " in out

    rng = np.random.default_rng(27)
    v = rng.integers(-3000, 3000, size=(6 * RATE, 2)) - 100
    v[2 * RATE:4 * RATE] = 0
    v[RATE, 1] = -32767 - 1  # a lone full-scale sample: the meter reads 0.245 dB under it
    path = write(tmp_path, "d.wav", v.astype(np.int16), "PCM_16")
    facts = tmp_path / "facts.json"
    code, out, err = run_cli("inspect", path, "--for-bits", "12", "--json", facts)
    assert code == 0, err
    assert "Check for missing audio (a dropout)" in " ".join(out.split())
    assert "2.000 s at 2.000 s (every channel)" in out
    row = next(line for line in out.splitlines() if line.startswith("DC offset (% of FS)"))
    assert all(cell.startswith("-") for cell in row.split()[-3:])
    assert "reading is below the sample peak here (ch 2" in out
    assert "Which method at 12 bits (--for-bits)" in out
    data = json.loads(facts.read_text())
    assert data["dc_offset_polarity"] == "negative" and data["dc_offset"] < 0
    assert data["true_peak"] == 1.0 and data["true_peak_meter"] < 1.0
    assert data["method_advice"]["bits"] == 12 and data["settings"]["for_bits"] == 12
    assert "silent-gap" in data["findings"]


def test_cli_for_bits_default_is_the_library_default():
    # STYLE.md: CLI defaults never drift from the library's
    import inspect as pyinspect

    from requant.cli.info import inspect_command
    from requant.inspection import DEFAULT_FOR_BITS

    assert pyinspect.signature(inspect_command).parameters["for_bits"].default == \
        DEFAULT_FOR_BITS == pyinspect.signature(inspect_file).parameters["for_bits"].default
