"""What a batch says: the right caution, lossy sources, and why a file was passed through.

The lossy source is an Ogg Vorbis file written by libsndfile (Xiph's Vorbis I
specification: a lossy transform codec, so its decoded samples are the codec's
approximation); the pass-through reasons rest on the container word lengths of
the WAVE format (RIFF 1991: a 24-bit PCM sample whose low 8 bits are zero holds
a 16-bit value).
"""

from __future__ import annotations

import numpy as np
import soundfile as sf
from test_batch import latest_by_source

from requant.report.build import passthrough_reason

from helpers import run_cli

RATE = 48000


def _tone(seconds=0.5, level=0.3):
    t = np.arange(int(RATE * seconds)) / RATE
    return level * np.sin(2 * np.pi * 441 * t)


def test_an_eight_bit_batch_cautions_about_the_outputs_not_about_error_signals(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    sf.write(src / "a.wav", _tone(), RATE, subtype="PCM_24")
    code, out, err = run_cli("batch", src, tmp_path / "out", "--bits", "8", "--seed", "1")
    assert code == 0, err
    assert "few-bit outputs can be loud" in err
    assert "error signal" not in err.lower()


def test_a_lossy_source_is_flagged_in_the_manifest_the_summary_and_convert(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    sf.write(src / "v.ogg", _tone(1.0), RATE, format="OGG", subtype="VORBIS")
    sf.write(src / "p.wav", _tone(1.0), RATE, subtype="PCM_24")
    code, out, err = run_cli("batch", src, tmp_path / "out", "--seed", "1")
    assert code == 0, err
    ev = latest_by_source(tmp_path / "out")[0]
    assert "lossy-source" in ev["v.ogg"]["warning_kinds"]
    assert any("its noise floor is the codec's, not the master's" in w
               for w in ev["v.ogg"]["warnings"])
    assert "lossy-source" not in ev["p.wav"]["warning_kinds"]
    assert "v.ogg: lossy-source" in err  # the summary's list of files with warnings
    code, out, err = run_cli("convert", src / "v.ogg", tmp_path / "v.wav", "--seed", "1")
    assert code == 0 and "lossy-coded (Ogg Vorbis)" in err


def test_pass_through_says_why(tmp_path):
    # the reason from the container alone (RIFF 1991 word lengths)
    assert passthrough_reason("PCM_16", 16) == "it is already 16-bit"
    assert "16-bit audio in a 24-bit file (its low 8 bits" in passthrough_reason("PCM_24", 16)
    assert "8-bit, shorter than the 16-bit target" in passthrough_reason("PCM_U8", 16)
    assert "float file" in passthrough_reason("FLOAT", 16)
    src = tmp_path / "src"
    src.mkdir()
    codes = np.round(_tone() * 32767).astype(np.int32)
    sf.write(src / "in24.wav", codes << 16, RATE, subtype="PCM_24")  # 16-bit values, 24-bit file
    sf.write(src / "in16.wav", codes.astype(np.int16), RATE, subtype="PCM_16")
    code, out, err = run_cli("batch", src, tmp_path / "out", "--seed", "1")
    assert code == 0, err
    ev = latest_by_source(tmp_path / "out")[0]
    assert any("16-bit audio in a 24-bit file" in n for n in ev["in24.wav"]["notes"])
    assert any("it is already 16-bit" in n for n in ev["in16.wav"]["notes"])
    code, out, err = run_cli("convert", src / "in24.wav", tmp_path / "o.wav")
    assert code == 0 and "16-bit audio in a 24-bit file" in out
