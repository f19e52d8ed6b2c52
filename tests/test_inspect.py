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
    r = inspect_file(write(tmp_path, "x.wav", v.astype(np.int16), "PCM_16"))
    assert [p["silent_fraction"] for p in r["per_channel"]] == [0.3, 0.9]
    assert r["silent_fraction"] == 0.6
    assert "mostly-silent" in r["findings"]  # 60 % >= 50 % (our threshold)
    r = inspect_file(r["path"], silent_threshold=0.7)
    assert "mostly-silent" not in r["findings"]


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
    assert r["noise_floor_dbfs"] == pytest.approx(expected, abs=0.01)  # 0.01 dB bins
    assert r["settings"]["floor_block_frames"] == 2400


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
