"""Delivery at another sample rate in one pass: resample in float64, then requantize.

What is checked against outside references: the error power of TPDF dither at
the new rate is Δ²/4 (Lipshitz, Wannamaker & Vanderkooy 1992) and white, so its
A-weighted level is the flat level plus the A-weighting's noise-power gain at the
new rate (IEC 61672-1 weighting); the output length is round(n·out/in) (an exact
rational ratio, the sampling theorem's time grid); coding-history rows follow
EBU R 98 (F= the sample rate of the output).
"""

from __future__ import annotations

import json
import math
import re

import numpy as np
import pytest
import soundfile as sf
from test_batch import metadata_wav, walk

from requant import library as B
from requant.convert import Outputs, convert_file
from requant.dsp.resample import Resampler
from requant.library import resolve_settings, run_batch
from requant.recipe import Recipe

from helpers import run_cli

IN_RATE = 96000


def master(path, seconds=3.0, rate=IN_RATE, channels=2):
    """Noise-like music-ish material: tones plus band-limited noise, well above 16-bit LSB."""
    rng = np.random.default_rng(11)
    n = int(rate * seconds)
    t = np.arange(n) / rate
    x = np.zeros((n, channels))
    for c in range(channels):
        x[:, c] = (0.2 * np.sin(2 * np.pi * (220 + 110 * c) * t)
                   + 0.1 * np.sin(2 * np.pi * 3150 * t + c)
                   + 0.02 * np.convolve(rng.standard_normal(n), np.ones(8) / 8, "same"))
    sf.write(path, x.astype(np.float32), rate, subtype="FLOAT")
    return sf.read(path, dtype="float64")[0]


def test_rate_conversion_error_is_tpdf_at_the_new_rate_and_the_input_is_the_resampled_one(
        tmp_path):
    x = master(tmp_path / "m.wav")
    rep = convert_file(tmp_path / "m.wav", tmp_path / "o.wav", Recipe(rate=44100, seed=4),
                       outputs=Outputs(error=tmp_path / "e.wav", report=tmp_path / "r.json"))
    out, rate = sf.read(tmp_path / "o.wav", dtype="float64")
    e = sf.read(tmp_path / "e.wav", dtype="float64")[0]
    assert rate == 44100 and sf.info(tmp_path / "e.wav").samplerate == 44100
    assert out.shape[0] == round(x.shape[0] * 44100 / IN_RATE)  # exact rational ratio
    # the error is the output minus the resampled input (one block: the same bits, any block)
    rs = Resampler(IN_RATE, 44100, 2)
    y = np.concatenate([rs.process(x), rs.finish()])
    np.testing.assert_allclose(out - e, y, atol=2e-7)
    # TPDF: Δ²/4, white (Lipshitz, Wannamaker & Vanderkooy 1992), within 0.1 dB
    assert 10 * math.log10(rep.measured.error_power_lsb2 / 0.25) == pytest.approx(0, abs=0.1)
    m, p = rep.measured, rep.predicted
    assert m.a_weighted_noise_dbfs == pytest.approx(p.a_weighted_noise_dbfs, abs=0.1)
    saved = json.loads((tmp_path / "r.json").read_text())
    prep = saved["preparation"]
    assert prep["rate_in"] == IN_RATE and prep["rate_out"] == 44100
    assert prep["rate_filter"]["stopband_rejection_db"] >= 140
    assert saved["input"]["sample_rate"] == IN_RATE and saved["input"]["frames"] == x.shape[0]


def test_rate_conversion_gives_the_same_bits_for_every_block_size(tmp_path):
    master(tmp_path / "m.wav", seconds=1.0)
    digests = set()
    for bf in (997, 4096, 65536):
        convert_file(tmp_path / "m.wav", tmp_path / f"o{bf}.wav",
                     Recipe(rate=48000, channels=1, seed=2, shaping="hearing"), block_frames=bf)
        digests.add(sf.read(tmp_path / f"o{bf}.wav", dtype="int16")[0].tobytes())
    assert len(digests) == 1


def test_upsampling_a_short_file_fits_the_blocks(tmp_path):
    master(tmp_path / "m.wav", seconds=0.2, rate=44100)
    convert_file(tmp_path / "m.wav", tmp_path / "o.wav", Recipe(rate=96000, seed=1),
                 block_frames=1024)
    info = sf.info(tmp_path / "o.wav")
    assert info.samplerate == 96000 and info.frames == round(8820 * 96000 / 44100)


def test_a_rate_change_drops_the_position_chunks_and_says_so(tmp_path):
    src = tmp_path / "bwf.wav"
    src.write_bytes(metadata_wav(np.random.default_rng(5), frames=9600))
    code, out, err = run_cli("convert", src, tmp_path / "o.wav", "--rate", "44100", "--seed", "1")
    assert code == 0, err
    ids = [c for c, _ in walk((tmp_path / "o.wav").read_bytes())]
    assert "smpl" not in ids and "cue " not in ids
    assert "iXML" in ids and "bext" in ids
    assert "sample positions" in err and "'smpl'" in err and "'cue '" in err
    (bext,) = [p for c, p in walk((tmp_path / "o.wav").read_bytes()) if c == "bext"]
    # EBU R 98: the appended row states the output's rate
    assert re.search(rb"A=PCM,F=44100,W=16,M=stereo,T=", bext[602:])
    assert "rate 48000 -> 44100 Hz" in out


def test_batch_delivers_at_the_new_rate(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    master(src / "a.wav", seconds=0.5)
    master(src / "b.wav", seconds=0.3, rate=48000, channels=1)
    summary = run_batch(src, tmp_path / "out", resolve_settings({"seed": 1, "rate": 44100}),
                        jobs=1)
    assert summary["counts"]["converted"] == 2
    for name, n_in, rate_in in (("a.wav", 48000, IN_RATE), ("b.wav", 14400, 48000)):
        info = sf.info(tmp_path / "out" / name)
        assert info.samplerate == 44100
        assert info.frames == round(n_in * 44100 / rate_in)
    assert (tmp_path / "out" / B.MANIFEST_NAME).exists()


def test_rate_of_the_same_rate_does_nothing(tmp_path):
    master(tmp_path / "m.wav", seconds=0.2, rate=48000)
    a = convert_file(tmp_path / "m.wav", tmp_path / "a.wav", Recipe(rate=48000, seed=1))
    convert_file(tmp_path / "m.wav", tmp_path / "b.wav", Recipe(seed=1))
    assert a.preparation is None
    assert (tmp_path / "a.wav").read_bytes() == (tmp_path / "b.wav").read_bytes()


def test_the_report_page_states_the_filter_and_the_gain(tmp_path):
    master(tmp_path / "m.wav", seconds=0.5)
    rep = convert_file(tmp_path / "m.wav", tmp_path / "o.wav",
                       Recipe(rate=44100, channels=1, peak_ceiling_dbtp=-6.0, seed=1,
                              shaping="hearing"),
                       outputs=Outputs(report=tmp_path / "r.md"))
    text = (tmp_path / "r.md").read_text()
    assert re.search(r"\| output rate and channels \| 44\W?100 Hz, 1 channel\(s\) \|", text)
    assert "exact ratio 147/320" in text  # 44100/96000 in lowest terms
    assert re.search(r"rejection 14\d\.\d dB", text)
    assert "true-peak ceiling -6 dBTP" in text
    assert rep.sample_rate == 44100


def test_a_nan_in_a_resampled_file_is_named_at_its_place_in_the_source(tmp_path):
    x = np.full((48000, 2), 0.1, np.float32)
    x[30000, 1] = np.nan
    sf.write(tmp_path / "nan.wav", x, 48000, subtype="FLOAT")
    code, out, err = run_cli("convert", tmp_path / "nan.wav", tmp_path / "o.wav",
                             "--rate", "44100", "--block-frames", "4096")
    assert code != 0 and "Traceback" not in err
    assert "NaN sample at 0.625000 s (frame 30000, channel 2)" in err
    assert not (tmp_path / "o.wav").exists()
