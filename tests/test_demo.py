"""The bundled demo: reproducible audio, and the demo job end to end."""

import json

import numpy as np
import pytest
import soundfile as sf

from requant.demo import DEMO_FILES, default_demo_dir, run_demo, synthesize_demo_audio


@pytest.mark.slow
def test_bundled_audio_is_what_the_script_makes(tmp_path):
    # the demo audio is ours, synthesized by seeded code: regenerating it gives the same samples
    synthesize_demo_audio(tmp_path)
    for name in DEMO_FILES:
        a, ra = sf.read(default_demo_dir() / name, dtype="int32")
        b, rb = sf.read(tmp_path / name, dtype="int32")
        assert ra == rb and np.array_equal(a, b), name


@pytest.mark.slow
def test_demo_runs_and_tells_dithered_from_undithered(tmp_path):
    table = run_demo(tmp_path / "out", seed=5)
    lines = table.splitlines()
    rows = {ln.split()[0]: ln for ln in lines if ln.endswith(("YES", "no"))}
    assert len(rows) == 8
    # truncating the 16-bit fade and rounding the 8-bit chime without dither: flagged
    assert rows["tidewater_16bit_truncated.flac"].endswith("YES")
    assert rows["chime_8bit_round.wav"].endswith("YES")
    assert rows["tidewater_16bit_tpdf.flac"].endswith("no")
    rep = json.loads((tmp_path / "out" / "tidewater_16bit_tpdf_report.json").read_text())
    # the cue's 0.5 s head and 0.4 s tail of digital silence are kept silent, in both channels
    assert [ch["measured"]["silent_frames"] for ch in rep["channels"]] == [43200, 43200]
    assert any("Digital silence kept silent: 0.90 s" in n for n in rep["notes"])
    assert "0.90 s of digital silence kept silent" in table
    # TPDF: Δ²/4 (Lipshitz, Wannamaker & Vanderkooy 1992) over the samples requantized; the
    # measured error power within 1 % of it
    share = 1 - 43200 / rep["input"]["frames"]
    assert rep["predicted"]["error_power_lsb2"] == pytest.approx(0.25 * share)
    assert abs(rep["measured"]["error_power_lsb2"] / (0.25 * share) - 1) < 0.01
    assert (tmp_path / "out" / "tidewater_16bit_tpdf_hearing_report.html").stat().st_size > 10000
    # the CD delivery in one pass: 44.1 kHz, true peak at most -1 dBTP before dither, the 0.9 s of
    # digital silence still exact zeros at the new rate (a zero input resamples to exact zeros)
    cd = json.loads((tmp_path / "out" / "tidewater_cd_44k1_16bit_hearing_report.json").read_text())
    assert cd["preparation"]["rate_out"] == 44100
    assert sf.info(tmp_path / "out" / "tidewater_cd_44k1_16bit_hearing.flac").samplerate == 44100
    assert cd["preparation"]["true_peak_after_dbtp"] <= -1.0 + 1e-9
    assert cd["predicted"]["error_power_lsb2"] > 0.25  # shaped: Δ²/4 times the NTF's power gain
