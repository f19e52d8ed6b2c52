"""``requant convert --error-gain``: the error file follows the listening kit's rules
(a stated gain, a -6 dBFS cap, the caution), and stays exact by default."""

import json
import math

import numpy as np
import pytest
import soundfile as sf

from requant.convert import Outputs, convert_file, error_gain_db
from requant.errors import UsageError
from requant.recipe import Recipe

from helpers import run_cli

RATE = 48000


def tone(path, *, amp=0.5, seconds=1.0, channels=2):
    t = np.arange(int(RATE * seconds)) / RATE
    x = amp * np.sin(2 * np.pi * 997.0 * t)
    sf.write(path, np.repeat(x[:, None], channels, axis=1), RATE, subtype="FLOAT")
    return path


def read(path):
    return sf.read(path, dtype="float64", always_2d=True)[0]


def rms_dbfs(x):
    return 10 * math.log10(2 * np.mean(x**2))  # AES17: a full-scale sine is 0 dBFS


def test_default_error_is_exact_at_unity_gain(tmp_path):
    src = tone(tmp_path / "in.wav")
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=16, seed=1),
                       outputs=Outputs(error=tmp_path / "e.wav", report=tmp_path / "r.json"))
    e, y, x = read(tmp_path / "e.wav"), read(tmp_path / "o.wav"), read(src)
    np.testing.assert_array_equal(e, (y - x).astype(np.float32).astype(np.float64))
    assert rep.error_signal.gain.rule == "exact" and rep.error_signal.gain.gain_db == 0.0
    on_disk = json.loads((tmp_path / "r.json").read_text())["error_signal"]["gain"]
    assert on_disk == {"gain_db": 0.0, "rule": "exact", "cap_dbfs": None, "limited_samples": 0}
    assert sf.SoundFile(tmp_path / "e.wav").comment == ""  # no comment chunk when exact


@pytest.mark.parametrize("bits", [8, 16, 24])
def test_auto_puts_flat_tpdf_noise_at_minus_40_dbfs(tmp_path, bits):
    # TPDF error power is Δ²/4 (REFERENCES.md §2), i.e. 6.0206·N + 1.7609 - 4.7712 dB below
    # a full-scale sine (§1, §2): auto raises it to -40 dBFS RMS.
    expected = -40.0 + 6.0206 * bits + 1.7609 - 4.7712
    gain, rule = error_gain_db("auto", bits)
    assert rule == "auto" and gain == pytest.approx(expected, abs=0.01)
    src = tone(tmp_path / "in.wav", amp=0.3)
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=bits, seed=2),
                       outputs=Outputs(error=tmp_path / "e.wav", error_gain="auto"))
    e = read(tmp_path / "e.wav")
    # 96000 samples of TPDF error: the power is within ±2 % (REFERENCES.md §2 Monte-Carlo
    # bound, kurtosis <= 4), about ±0.1 dB
    assert rms_dbfs(e) == pytest.approx(-40.0, abs=0.15)
    assert rep.error_signal.gain.gain_db == pytest.approx(expected, abs=0.01)
    assert rep.error_signal.gain.cap_dbfs == -6.0 and rep.error_signal.gain.limited_samples == 0
    assert f"raised by {gain:+.1f} dB (auto)" in sf.SoundFile(tmp_path / "e.wav").comment


def test_fixed_gain_is_exact_error_times_gain_then_capped(tmp_path):
    # A float source 3.5 dB over full scale: the clipped-off peaks are in the error, and
    # raised by 20 dB they pass the -6 dBFS cap, which must hold on every written sample.
    t = np.arange(RATE // 2) / RATE
    src = tmp_path / "loud.wav"
    sf.write(src, 1.5 * np.sin(2 * np.pi * 440 * t), RATE, subtype="FLOAT")
    convert_file(src, tmp_path / "exact.wav", Recipe(bits=16, seed=3),
                 outputs=Outputs(error=tmp_path / "exact_e.wav"))
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=16, seed=3),
                       outputs=Outputs(error=tmp_path / "e.wav", error_gain=20.0))
    exact, raised = read(tmp_path / "exact_e.wav"), read(tmp_path / "e.wav")
    cap = 10 ** (-6 / 20)
    assert np.max(np.abs(raised)) <= cap
    free = np.abs(exact * 10) < cap * 0.999
    np.testing.assert_allclose(raised[free], exact[free] * 10, rtol=1e-6, atol=1e-12)
    limited = int(np.count_nonzero(~free))
    g = rep.error_signal.gain
    assert g.rule == "fixed" and g.gain_db == 20.0 and g.limited_samples == limited > 0


@pytest.mark.parametrize("value", ["loud", "nan", "121", "-121", True, float("inf")])
def test_bad_error_gain_is_a_usage_error(value):
    with pytest.raises(UsageError, match="give 'auto' or a gain in dB from -120 to 120"):
        error_gain_db(value, 16)


def test_error_gain_without_error_file(tmp_path):
    with pytest.raises(UsageError, match="without an error file"):
        convert_file(tone(tmp_path / "in.wav"), tmp_path / "o.wav",
                     outputs=Outputs(error_gain="auto"))
    assert not (tmp_path / "o.wav").exists()


def test_aiff_error_file_carries_the_gain(tmp_path):
    convert_file(tone(tmp_path / "in.wav"), tmp_path / "o.wav", Recipe(bits=12, seed=4),
                 outputs=Outputs(error=tmp_path / "e.aiff", error_gain="-3"))
    assert "raised by -3.0 dB (fixed)" in sf.SoundFile(tmp_path / "e.aiff").comment


@pytest.mark.slow
def test_cli_states_gain_and_prints_caution(tmp_path):
    src = tone(tmp_path / "in.wav")
    code, out, err = run_cli("convert", src, tmp_path / "o.wav", "--error", tmp_path / "e.wav",
                             "--error-gain", "auto", "--seed", 5)
    assert code == 0, err
    assert "raised by +53.3 dB (auto: flat TPDF noise at -40 dBFS RMS)" in out
    assert "hard-limited at -6 dBFS peak" in out and "Caution" in err
    # the caution is printed whenever an error file is written, even with --quiet
    code, out, err = run_cli("convert", src, tmp_path / "o2.wav", "--error", tmp_path / "e2.wav",
                             "--quiet")
    assert code == 0 and out == "" and "Caution" in err
    code, out, err = run_cli("convert", src, tmp_path / "o3.wav", "--error", tmp_path / "e3.wav")
    assert "(the exact error, unity gain)" in out


@pytest.mark.parametrize("args, with_error, message", [
    (["--error-gain", "loud"], True, "error gain 'loud' is not allowed"),
    (["--error-gain=-200"], True, "from -120 to 120"),
    (["--error-gain", "auto"], False, "without an error file"),
])
def test_cli_bad_error_gain_is_one_line(tmp_path, args, with_error, message):
    err_args = ["--error", tmp_path / "e.wav"] if with_error else []
    code, _, err = run_cli("convert", tone(tmp_path / "in.wav"), tmp_path / "o.wav", *err_args,
                           *args)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and message in lines[0] and "Traceback" not in err
    assert not (tmp_path / "o.wav").exists()
