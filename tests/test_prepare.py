"""Gain, true-peak ceiling and channel count before the quantizer (requant.dsp.prepare).

The checks lean on outside references: the true peak of the gained input is
measured by scipy's polyphase resampler (``scipy.signal.resample_poly``, 8x)
as well as by our ITU-R BS.1770-4 meter; a gain in dB is 20·log10 of an
amplitude ratio (IEC 60027-3 / AES17 level conventions); the error power of
TPDF dither is Δ²/4 (Lipshitz, Wannamaker & Vanderkooy 1992).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import soundfile as sf
from scipy.signal import resample_poly

from requant.convert import Outputs, convert_file
from requant.dsp.prepare import Preparer, ceiling_gain_db
from requant.dsp.truepeak import true_peak_dbtp
from requant.errors import UsageError
from requant.recipe import Recipe, RecipeError

from helpers import run_cli

RATE = 48000


def hot_master(path, *, seconds=4.0, peak_db=1.2):
    """Two tones whose sample peak sits ``peak_db`` above full scale (a float master)."""
    t = np.arange(int(RATE * seconds)) / RATE
    x = np.stack([0.9 * np.sin(2 * np.pi * 997 * t), 0.6 * np.sin(2 * np.pi * 1499 * t + 0.3)],
                 axis=1)
    x *= 10 ** (peak_db / 20) / np.max(np.abs(x))
    sf.write(path, x.astype(np.float32), RATE, subtype="FLOAT")
    return sf.read(path, dtype="float64")[0]


def peak_db_8x(x):
    """Largest |sample| after 8x band-limited oversampling by scipy, dBFS (max over channels)."""
    return 20 * math.log10(np.max(np.abs(resample_poly(x, 8, 1, axis=0))))


# ---------------------------------------------------------------------------- recipe

def test_recipe_checks_the_new_fields_and_keeps_old_settings_ids():
    with pytest.raises(RecipeError, match="gain_db"):
        Recipe(gain_db=80.0)
    with pytest.raises(RecipeError, match="peak_ceiling_dbtp"):
        Recipe(peak_ceiling_dbtp=0.5)
    with pytest.raises(RecipeError, match="channels"):
        Recipe(channels=3)
    with pytest.raises(RecipeError, match="downmix"):
        Recipe(downmix="sum")
    with pytest.raises(RecipeError, match="rate"):
        Recipe(rate=4000)
    r = Recipe(gain_db=-2.0, peak_ceiling_dbtp=-1.0, channels=1, downmix="-3db")
    assert Recipe.from_dict(r.to_dict()) == r
    # a library converted before these stages existed keeps its settings id
    assert set(Recipe().identity()) == {
        "bits", "quantizer", "dither", "shaping", "shaping_order", "shaping_limit_db",
        "shaping_coeffs", "shaping_rate", "seed", "force_dither", "silence", "silence_min_ms"}
    assert "gain_db" in r.identity() and "downmix" in r.identity()
    assert "downmix" not in Recipe(gain_db=1.0).identity()  # it decides nothing then


def test_the_ceiling_lowers_and_never_raises():
    assert ceiling_gain_db(0.0, 1.2, -1.0) == pytest.approx(-2.2)
    assert ceiling_gain_db(0.0, -6.0, -1.0) == 0.0           # already under: no raise
    assert ceiling_gain_db(4.0, -6.0, -1.0) == pytest.approx(4.0)  # the asked gain fits
    assert ceiling_gain_db(6.0, -6.0, -1.0) == pytest.approx(5.0)  # lowered to the ceiling
    assert ceiling_gain_db(0.0, -math.inf, -1.0) == 0.0      # digital silence


# ---------------------------------------------------------------------------- channels

def test_mean_downmix_of_correlated_full_scale_cannot_clip_and_minus_3db_is_equal_power():
    rng = np.random.default_rng(1)
    full = np.repeat(np.sin(np.linspace(0, 200, 5000))[:, None], 2, axis=1)
    y = Preparer(Recipe(channels=1), 2, RATE).process(full)
    assert y.shape == (5000, 1) and np.max(np.abs(y)) <= 1.0
    np.testing.assert_array_equal(y[:, 0], (full[:, 0] + full[:, 1]) * 0.5)
    # equal-power law for uncorrelated channels (common practice): power is kept
    noise = rng.standard_normal((200000, 2)) * 0.1
    z = Preparer(Recipe(channels=1, downmix="-3db"), 2, RATE).process(noise)
    assert 10 * math.log10(np.mean(z**2) / np.mean(noise**2)) == pytest.approx(0.0, abs=0.05)
    # and for the correlated full-scale file it rises by 20·log10(√2) = +3.01 dB
    w = Preparer(Recipe(channels=1, downmix="-3db"), 2, RATE).process(full)
    assert 20 * math.log10(np.max(np.abs(w))) == pytest.approx(3.01, abs=0.01)


def test_one_channel_is_copied_to_two_and_more_than_two_do_not_fold_to_two():
    x = np.linspace(-0.5, 0.5, 100)[:, None]
    y = Preparer(Recipe(channels=2), 1, RATE).process(x)
    np.testing.assert_array_equal(y[:, 0], y[:, 1])
    np.testing.assert_array_equal(y[:, 0], x[:, 0])
    with pytest.raises(UsageError, match="speaker layout"):
        Preparer(Recipe(channels=2), 6, RATE)
    assert Preparer.for_file(Recipe(channels=2), 2, RATE) is None  # nothing to do
    assert Preparer.for_file(Recipe(), 2, RATE) is None


def test_the_float64_input_block_is_never_written_into():
    x = np.full((64, 2), 0.25)
    Preparer(Recipe(gain_db=6.0), 2, RATE).process(x)
    assert np.all(x == 0.25)


# ---------------------------------------------------------------------------- conversions

def test_peak_ceiling_puts_a_hot_master_at_the_ceiling_without_clipping(tmp_path):
    x = hot_master(tmp_path / "hot.wav")
    assert true_peak_dbtp(x).max() > 1.0
    rep = convert_file(tmp_path / "hot.wav", tmp_path / "out.wav",
                       Recipe(peak_ceiling_dbtp=-1.0, shaping="hearing", seed=3),
                       outputs=Outputs(error=tmp_path / "e.wav", report=tmp_path / "r.json"))
    prep = rep.preparation
    g = 10 ** (prep["gain_db"] / 20)
    # the gained input's true peak, by scipy's 8x band-limited interpolation: at the ceiling
    assert peak_db_8x(x * g) == pytest.approx(-1.0, abs=0.05)
    assert prep["true_peak_after_dbtp"] == pytest.approx(-1.0, abs=1e-9)
    assert rep.measured.over_full_scale_samples == 0
    assert rep.measured.shaping_overloads == 0
    # the error signal is the output minus the *gained* input
    out = sf.read(tmp_path / "out.wav", dtype="float64")[0]
    e = sf.read(tmp_path / "e.wav", dtype="float64")[0]
    np.testing.assert_allclose(e, out - (x * g), atol=1e-6)
    saved = json.loads((tmp_path / "r.json").read_text())
    assert saved["settings"]["peak_ceiling_dbtp"] == -1.0
    assert saved["preparation"]["gain_db"] == pytest.approx(prep["gain_db"])
    assert any("gain -2.2" in n and "ceiling -1 dBTP" in n for n in saved["notes"])


def test_a_fixed_gain_scales_the_input_and_the_error_power_is_still_tpdf(tmp_path):
    x = hot_master(tmp_path / "in.wav", peak_db=-1.0)
    rep = convert_file(tmp_path / "in.wav", tmp_path / "out.wav", Recipe(gain_db=-6.0, seed=5),
                       outputs=Outputs(error=tmp_path / "e.wav"))
    out = sf.read(tmp_path / "out.wav", dtype="float64")[0]
    e = sf.read(tmp_path / "e.wav", dtype="float64")[0]
    np.testing.assert_allclose(e, out - x * 10 ** (-6.0 / 20), atol=1e-6)
    # TPDF: total error power Δ²/4 (Lipshitz, Wannamaker & Vanderkooy 1992)
    assert rep.measured.error_power_lsb2 == pytest.approx(0.25, rel=0.02)


def test_downmix_conversion_is_the_same_for_every_block_size(tmp_path):
    hot_master(tmp_path / "in.wav", seconds=1.0, peak_db=-3.0)
    digests = set()
    for bf in (1000, 4096, 65536):
        convert_file(tmp_path / "in.wav", tmp_path / f"o{bf}.wav",
                     Recipe(channels=1, gain_db=2.0, seed=9, shaping="first-order"),
                     block_frames=bf)
        y, r = sf.read(tmp_path / f"o{bf}.wav", dtype="int16")
        assert y.ndim == 1 and r == RATE
        digests.add(y.tobytes())
    assert len(digests) == 1


def test_cli_shows_the_gain_it_applied_and_refuses_a_layout_it_cannot_fold(tmp_path):
    hot_master(tmp_path / "hot.wav")
    code, out, err = run_cli("convert", tmp_path / "hot.wav", tmp_path / "o.wav",
                             "--peak-ceiling", "-1", "--seed", "1")
    assert code == 0, err
    assert "before requantizing: gain -2.2" in out and "ceiling -1 dBTP" in out
    sf.write(tmp_path / "six.wav", np.zeros((4800, 6), np.float32), RATE, subtype="FLOAT")
    code, out, err = run_cli("convert", tmp_path / "six.wav", tmp_path / "two.wav",
                             "--channels", "2")
    assert code != 0 and "Traceback" not in err
    assert err.count("\n") == 1 and "speaker layout" in err
    assert not (tmp_path / "two.wav").exists()
    code, out, err = run_cli("convert", tmp_path / "hot.wav", tmp_path / "m.wav",
                             "--channels", "1", "--downmix", "-3db", "--seed", "1")
    assert code == 0, err
    assert "folded to mono (-3db)" in out
    assert sf.info(tmp_path / "m.wav").channels == 1


def test_progress_names_each_stage_so_it_never_sits_silent_at_the_end(tmp_path):
    import io

    from requant.cli.convert import _ProgressPrinter

    hot_master(tmp_path / "hot.wav", seconds=31.0)
    stream = io.StringIO()
    progress = _ProgressPrinter(False, stream=stream, tty=True)
    try:
        convert_file(tmp_path / "hot.wav", tmp_path / "o.wav",
                     Recipe(peak_ceiling_dbtp=-1.0, seed=1),
                     outputs=Outputs(report=tmp_path / "r.json"), progress=progress)
    finally:
        progress.close()
    assert progress.stages == ["measuring the true peak for the ceiling", "requantizing",
                               "measuring and writing the report"]


@pytest.mark.slow  # compiles kernels into an empty cache
def test_a_first_compile_is_announced_in_one_line(tmp_path):
    import os

    env = dict(os.environ, REQUANT_CACHE_DIR=str(tmp_path / "empty-cache"))
    sf.write(tmp_path / "a.wav", np.zeros((480, 1), np.float32) + 0.1, RATE, subtype="FLOAT")
    code, out, err = run_cli("convert", tmp_path / "a.wav", tmp_path / "b.wav", "--seed", "1",
                             env=env, timeout=300)
    assert code == 0, err
    lines = [ln for ln in err.splitlines() if "preparing the fast path" in ln]
    assert len(lines) == 1 and "once per machine" in lines[0]
    code, out, err = run_cli("convert", tmp_path / "a.wav", tmp_path / "c.wav", "--seed", "1",
                             env=env)
    assert code == 0 and "preparing the fast path" not in err  # cached now
