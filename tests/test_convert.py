"""File conversion: containers, integer codes, error signal, report, streaming, safety.

Sources: [LWV92] Lipshitz, Wannamaker & Vanderkooy, "Quantization and Dither: A Theoretical
Survey", JAES 40(5), 1992; AES17 for dBFS (a full-scale sine reads 0 dBFS); RIFF/WAVE (IBM &
Microsoft 1991) for unsigned 8-bit WAV.
"""

import json
import os

import numpy as np
import pytest
import soundfile as sf

from requant.convert import Outputs, convert_file
from requant.errors import InputError, OutputError, UsageError
from requant.recipe import Recipe


def sine(fs=48000, seconds=1.0, amp=0.5, f=997.0, channels=2):
    t = np.arange(int(fs * seconds)) / fs
    x = amp * np.sin(2 * np.pi * f * t)
    return np.stack([x * (0.9 ** c) for c in range(channels)], axis=1)


@pytest.fixture
def float_wav(tmp_path):
    p = tmp_path / "in.wav"
    sf.write(p, sine(), 48000, subtype="FLOAT")
    return p


def read_codes(path):
    """Read the container's raw codes, left-justified in int32."""
    return sf.read(path, dtype="int32", always_2d=True)[0]


CONTAINERS = [
    ("wav", 8, "PCM_U8"), ("wav", 12, "PCM_16"), ("wav", 16, "PCM_16"), ("wav", 20, "PCM_24"),
    ("wav", 24, "PCM_24"), ("wav", 32, "PCM_32"),
    ("flac", 8, "PCM_S8"), ("flac", 16, "PCM_16"), ("flac", 24, "PCM_24"),
    ("aiff", 8, "PCM_S8"), ("aiff", 16, "PCM_16"), ("aiff", 24, "PCM_24"), ("aiff", 32, "PCM_32"),
]


@pytest.mark.parametrize("ext, bits, subtype", CONTAINERS)
def test_integer_codes_round_trip_every_container(tmp_path, ext, bits, subtype):
    # Expected codes computed here with the mid-tread rule Δ·floor(x/Δ + 1/2) (REFERENCES §1);
    # 8-bit WAV must be unsigned PCM_U8 (RIFF/WAVE, IBM & Microsoft 1991).
    rng = np.random.default_rng(bits)
    x = rng.uniform(-0.99, 0.99, (3000, 2))
    src = tmp_path / "src.wav"
    sf.write(src, x, 48000, subtype="DOUBLE")
    out = tmp_path / f"out.{ext}"
    rep = convert_file(src, out, Recipe(bits=bits, dither="none", seed=1))
    info = sf.info(out)
    assert info.subtype == subtype
    assert rep.output.subtype == subtype
    got = read_codes(out).astype(np.int64)
    expected = np.floor(x * 2.0 ** (bits - 1) + 0.5).astype(np.int64) << (32 - bits)
    assert np.array_equal(got, expected)
    # the bits below the word length stay zero
    assert np.all(got & ((1 << (32 - bits)) - 1) == 0)


def test_error_signal_reproduces_output(tmp_path, float_wav):
    out, err = tmp_path / "o.wav", tmp_path / "e.wav"
    convert_file(float_wav, out, Recipe(bits=8, dither="tpdf", seed=3), outputs=Outputs(error=err))
    x = sf.read(float_wav, dtype="float64")[0]
    y = sf.read(out, dtype="float64")[0]
    e, rate = sf.read(err, dtype="float64")
    info = sf.info(err)
    assert info.subtype == "FLOAT" and rate == 48000 and e.shape == x.shape
    # input plus error is the output, to float32 precision
    assert np.max(np.abs(x + e - y)) <= 2.0**-24 * 1.01


def test_report_keys_and_consistency(tmp_path, float_wav):
    rep_path = tmp_path / "r.json"
    rep = convert_file(float_wav, tmp_path / "o.flac", Recipe(bits=16, seed=5),
                       outputs=Outputs(report=rep_path))
    on_disk = json.loads(rep_path.read_text())
    assert on_disk["settings"]["seed"] == 5
    for key in ("bits", "quantizer", "dither", "shaping", "seed"):
        assert key in on_disk["settings"]
    for key in ("path", "sample_rate", "channels", "frames", "subtype"):
        assert key in on_disk["input"]
    for key in ("path", "subtype", "bits"):
        assert key in on_disk["output"]
    for key in ("snr_db", "error_power_lsb2", "error_mean_lsb", "error_rms_dbfs",
                "signal_rms_dbfs", "clipped_samples"):
        assert key in on_disk["measured"]
    for key in ("snr_db", "error_power_lsb2", "error_rms_dbfs"):
        assert key in on_disk["predicted"]
    assert len(on_disk["channels"]) == 2 and isinstance(on_disk["warnings"], list)
    # measured figures agree with an independent computation from the files
    x = sf.read(float_wav, dtype="float64")[0]
    y = sf.read(tmp_path / "o.flac", dtype="float64")[0]
    snr = 10 * np.log10(np.sum(x**2) / np.sum((y - x) ** 2))
    assert rep.measured.snr_db == pytest.approx(snr, abs=1e-6)
    # AES17: a sine of amplitude 0.5 reads 20·log10(0.5) = -6.02 dBFS RMS (left channel)
    assert rep.channels[0].measured.signal_rms_dbfs == pytest.approx(-6.0206, abs=0.01)
    # TPDF: Δ²/4 predicted [LWV92]; measured within a few percent on 96k samples
    assert rep.predicted.error_power_lsb2 == 0.25
    assert rep.measured.error_power_lsb2 == pytest.approx(0.25, rel=0.03)


@pytest.mark.parametrize("block", [pytest.param(1, marks=pytest.mark.slow), 7, 4096, 10007])
@pytest.mark.parametrize("shaping", ["none", "1.2,-0.5"])
def test_file_blocks_equal_whole(tmp_path, block, shaping):
    src = tmp_path / "in.wav"
    sf.write(src, sine(seconds=0.25) + 1e-4, 48000, subtype="FLOAT")
    ref = tmp_path / "ref.wav"
    convert_file(src, ref, Recipe(bits=12, seed=9, shaping=shaping),
                 outputs=Outputs(error=tmp_path / "ref_e.wav"), block_frames=65536)
    out = tmp_path / "o.wav"
    convert_file(src, out, Recipe(bits=12, seed=9, shaping=shaping),
                 outputs=Outputs(error=tmp_path / "o_e.wav"), block_frames=block)
    assert ref.read_bytes() == out.read_bytes()
    # the float error file's PEAK chunk carries a time stamp: compare its samples
    e_ref = sf.read(tmp_path / "ref_e.wav", dtype="float32")[0]
    e_out = sf.read(tmp_path / "o_e.wav", dtype="float32")[0]
    assert np.array_equal(e_ref, e_out)


def test_rerun_with_same_seed_is_bit_identical(tmp_path, float_wav):
    convert_file(float_wav, tmp_path / "a.wav", Recipe(bits=16, seed=123))
    convert_file(float_wav, tmp_path / "b.wav", Recipe(bits=16, seed=123))
    convert_file(float_wav, tmp_path / "c.wav", Recipe(bits=16, seed=124))
    assert (tmp_path / "a.wav").read_bytes() == (tmp_path / "b.wav").read_bytes()
    assert (tmp_path / "a.wav").read_bytes() != (tmp_path / "c.wav").read_bytes()


def test_fresh_seed_is_recorded_and_reproduces(tmp_path, float_wav):
    rep = convert_file(float_wav, tmp_path / "a.wav", Recipe(bits=16))
    convert_file(float_wav, tmp_path / "b.wav", Recipe(bits=16, seed=rep.settings.seed))
    assert (tmp_path / "a.wav").read_bytes() == (tmp_path / "b.wav").read_bytes()


def test_passthrough_when_on_grid(tmp_path):
    # 16-bit audio held in a 24-bit file converts to 16 bits unchanged, without dither
    rng = np.random.default_rng(1)
    codes = (rng.integers(-30000, 30000, (5000, 2)).astype(np.int32) << 16)
    src = tmp_path / "in24.wav"
    sf.write(src, codes, 44100, subtype="PCM_24")
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=16, seed=1))
    assert rep.output.passthrough is True
    assert rep.settings.dither_applied == "none"
    assert np.array_equal(read_codes(tmp_path / "o.wav"), codes)
    assert rep.measured.error_power_lsb2 == 0.0
    assert any("unchanged" in n for n in rep.notes)
    forced = convert_file(src, tmp_path / "f.wav", Recipe(bits=16, seed=1, force_dither=True))
    assert forced.output.passthrough is False
    assert not np.array_equal(read_codes(tmp_path / "f.wav"), codes)


def test_integer_container_narrower_than_target_is_passthrough(tmp_path):
    src = tmp_path / "in16.flac"
    sf.write(src, (np.arange(-500, 500, dtype=np.int16) * 7).reshape(-1, 1), 48000,
             subtype="PCM_16")
    rep = convert_file(src, tmp_path / "o24.wav", Recipe(bits=24, seed=2))
    assert rep.output.passthrough is True
    assert rep.measured.error_power_lsb2 == 0.0


def test_float_over_full_scale_is_clipped_and_counted(tmp_path):
    x = np.array([0.0, 1.5, -2.0, 0.5, 1.0, -1.0], dtype=np.float32).reshape(-1, 1)
    src = tmp_path / "hot.wav"
    sf.write(src, x, 48000, subtype="FLOAT")
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=16, dither="none"))
    # 1.5 -> 32767, -2.0 -> -32768, 1.0 -> 32767 (above the largest code 1 - Δ)
    assert read_codes(tmp_path / "o.wav")[:, 0].tolist() == [
        0, 32767 << 16, -32768 << 16, 16384 << 16, 32767 << 16, -32768 << 16]
    assert rep.measured.clipped_samples == 3
    assert rep.measured.over_full_scale_samples == 2
    assert any("clipped" in w for w in rep.warnings)


@pytest.mark.parametrize("bad, kind", [(np.nan, "NaN"), (np.inf, "infinite")])
def test_nonfinite_input_refused_with_time(tmp_path, bad, kind):
    x = np.zeros((48000, 2), dtype=np.float32)
    x[36000, 1] = bad
    src = tmp_path / "bad.wav"
    sf.write(src, x, 48000, subtype="FLOAT")
    with pytest.raises(InputError,
                       match=rf"{kind} sample at 0\.750000 s \(frame 36000, channel 2\)"):
        convert_file(src, tmp_path / "o.wav", Recipe(bits=16),
                     outputs=Outputs(error=tmp_path / "e.wav",
                                     report=tmp_path / "r.json"), block_frames=1000)
    assert sorted(os.listdir(tmp_path)) == ["bad.wav"]  # nothing partial left behind


def test_existing_output_is_kept_without_overwrite(tmp_path, float_wav):
    out = tmp_path / "o.wav"
    out.write_bytes(b"keep me")
    with pytest.raises(OutputError, match="--overwrite"):
        convert_file(float_wav, out)
    assert out.read_bytes() == b"keep me"
    convert_file(float_wav, out, outputs=Outputs(overwrite=True))
    assert sf.info(out).subtype == "PCM_16"


@pytest.mark.parametrize("link", ["same", "symlink", "hardlink"])
def test_never_writes_onto_input(tmp_path, float_wav, link):
    before = float_wav.read_bytes()
    target = float_wav
    if link == "symlink":
        target = tmp_path / "alias.wav"
        target.symlink_to(float_wav)
    elif link == "hardlink":
        target = tmp_path / "hard.wav"
        os.link(float_wav, target)
    with pytest.raises(OutputError, match="is the input"):
        convert_file(float_wav, target, outputs=Outputs(overwrite=True))
    assert float_wav.read_bytes() == before


def test_error_path_may_not_be_input(tmp_path, float_wav):
    with pytest.raises(OutputError, match="is the input"):
        convert_file(float_wav, tmp_path / "o.wav", outputs=Outputs(error=float_wav,
                                                                    overwrite=True))


@pytest.mark.parametrize("name, message", [
    ("o.mp3", "lossy"), ("o.ogg", "lossy"), ("o.opus", "lossy"), ("o.xyz", "unknown"), ("o",
                                                                                        "unknown"),
])
def test_refused_output_names(tmp_path, float_wav, name, message):
    with pytest.raises(UsageError, match=message):
        convert_file(float_wav, tmp_path / name)


def test_flac_cannot_hold_32_bits(tmp_path, float_wav):
    with pytest.raises(UsageError, match="at most 24 bits"):
        convert_file(float_wav, tmp_path / "o.flac", Recipe(bits=32))


def test_unreadable_and_missing_inputs(tmp_path):
    junk = tmp_path / "junk.wav"
    junk.write_bytes(b"RIFF\x00\x00\x00\x00WAVEjunkjunk")
    with pytest.raises(InputError, match="not an audio file"):
        convert_file(junk, tmp_path / "o.wav")
    with pytest.raises(InputError, match="no such file"):
        convert_file(tmp_path / "missing.wav", tmp_path / "o.wav")
    assert not (tmp_path / "o.wav").exists()


def test_missing_output_folder(tmp_path, float_wav):
    with pytest.raises(OutputError, match="does not exist"):
        convert_file(float_wav, tmp_path / "nowhere" / "o.wav")


def test_zero_and_one_frame_files(tmp_path):
    for n in (0, 1):
        src = tmp_path / f"n{n}.wav"
        sf.write(src, np.full((n, 2), 0.25), 48000, subtype="FLOAT")
        rep = convert_file(src, tmp_path / f"o{n}.wav", Recipe(bits=16, seed=1))
        assert sf.info(tmp_path / f"o{n}.wav").frames == n
        assert rep.input.frames == n
        json.dumps(rep.to_dict(), allow_nan=False)


def test_many_channels_and_odd_rate(tmp_path):
    rng = np.random.default_rng(0)
    x = rng.uniform(-0.5, 0.5, (2000, 64)).astype(np.float32)
    src = tmp_path / "multi.wav"
    sf.write(src, x, 8000, subtype="FLOAT")
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=16, seed=4))
    assert len(rep.channels) == 64
    info = sf.info(tmp_path / "o.wav")
    assert info.channels == 64 and info.samplerate == 8000


def test_memory_stays_flat_in_file_length(tmp_path):
    # Peak traced allocations while converting a 4 s and a 32 s file must be about equal:
    # one block buffer is reused, nothing grows with the file.
    import tracemalloc

    peaks = []
    for seconds in (4, 32):
        src = tmp_path / f"s{seconds}.wav"
        sf.write(src, sine(seconds=seconds).astype(np.float32), 48000, subtype="FLOAT")
        tracemalloc.start()
        convert_file(src, tmp_path / f"o{seconds}.wav", Recipe(bits=16, seed=1),
                     outputs=Outputs(error=tmp_path / f"e{seconds}.wav"), block_frames=8192)
        peaks.append(tracemalloc.get_traced_memory()[1])
        tracemalloc.stop()
    assert peaks[1] < 1.5 * peaks[0] + 1_000_000


def test_passthrough_report_has_no_error_and_no_warning(tmp_path):
    codes = (np.arange(-2000, 2000, dtype=np.int32) * 9 << 16).reshape(-1, 1)
    src = tmp_path / "in24.wav"
    sf.write(src, np.concatenate([codes] * 30), 48000, subtype="PCM_24")
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=16),
                       outputs=Outputs(report=tmp_path / "r.json"))
    assert rep.output.passthrough is True
    assert rep.warnings == ()
    assert rep.predicted.a_weighted_noise_dbfs is None


def test_markdown_pictures_are_not_overwritten_silently(tmp_path, float_wav):
    (tmp_path / "r_error_spectrum.png").write_bytes(b"mine")
    with pytest.raises(OutputError, match="already exists"):
        convert_file(float_wav, tmp_path / "o.wav", outputs=Outputs(report=tmp_path / "r.md"))
    assert (tmp_path / "r_error_spectrum.png").read_bytes() == b"mine"
    assert not (tmp_path / "o.wav").exists()
