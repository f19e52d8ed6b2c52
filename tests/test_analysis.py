"""Report figures against theory: weighted noise, shaped spectra, signal-correlated error.

Sources:
[LWV92] Lipshitz, Wannamaker & Vanderkooy, "Quantization and Dither: A Theoretical Survey",
        JAES 40(5), 1992 -- TPDF error power Δ²/4 for every input.
[Z]     Zölzer, Digital Audio Signal Processing, ch. 2.3 -- error feedback: output noise
        PSD = dither-quantizer PSD × |NTF|², power (Δ²/4)·Σ n_k².
[IEC]   IEC 61672-1:2013 (A-weighting); [468] ITU-R BS.468-4 (weighting curve).
[W67]   Welch, "The use of FFT for the estimation of power spectra", IEEE Trans. Audio
        Electroacoust. 15(2), 1967 (from memory for the citation details).
"""

import json

import numpy as np
import pytest
import soundfile as sf

from requant.convert import Outputs, convert_file
from requant.dsp.analysis import analyze_arrays, error_pdf
from requant.dsp.quantizer import requantize
from requant.dsp.shaping import design_hearing, ntf_response
from requant.recipe import Recipe


def busy(tmp_path, fs=48000, seconds=6.0, channels=2, seed=0, name="busy.wav"):
    rng = np.random.default_rng(seed)
    x = rng.uniform(-0.5, 0.5, (int(fs * seconds), channels)).astype(np.float32)
    p = tmp_path / name
    sf.write(p, x, fs, subtype="FLOAT")
    return p


@pytest.mark.parametrize("shaping", ["none", "hearing", "first-order"])
def test_weighted_noise_measured_matches_predicted(tmp_path, shaping):
    # Measured (Welch PSD of the error × weighting) within 0.3 dB of predicted
    # (σ²·mean(W²|NTF|²), [LWV92], [Z], [IEC], [468]) on a busy signal.
    src = busy(tmp_path)
    recipe = Recipe(bits=16, dither="tpdf", shaping=shaping, seed=3)
    rep = convert_file(src, tmp_path / "o.wav", recipe, outputs=Outputs(report=tmp_path / "r.json"))
    m, p = rep.measured, rep.predicted
    for key in ("a_weighted_noise_dbfs", "itu468_noise_dbfs"):
        assert abs(getattr(m, key) - getattr(p, key)) < 0.3, (key, getattr(m, key), getattr(p, key))
    on_disk = json.loads((tmp_path / "r.json").read_text())
    assert on_disk["measured"]["a_weighted_noise_dbfs"] == pytest.approx(m.a_weighted_noise_dbfs)
    assert "Welch" in on_disk["analysis"]["method"]["psd"]
    assert on_disk["analysis"]["method"]["segment_frames"] == 8192


def test_unweighted_noise_from_psd_equals_error_power(tmp_path):
    # Parseval: the Welch PSD integrates to the error's mean square [W67]; check the flat
    # (unweighted) integral against the time-domain error power.
    fs = 48000
    rng = np.random.default_rng(1)
    x = rng.uniform(-0.5, 0.5, (fs * 4, 1))
    y = requantize(x, bits=12, dither="tpdf", seed=2)
    from requant.dsp.analysis import ErrorAnalyzer

    an = ErrorAnalyzer(1, fs, bits=12, quantizer="round", dither="tpdf", total_frames=x.shape[0],
                       true_peak=False)
    an.feed(x, y - x)
    an.finish()
    power_psd = float(np.sum(an.psd_error[0]) * fs / an.L)
    assert power_psd == pytest.approx(float(np.mean((y - x) ** 2)), rel=0.02)


@pytest.mark.parametrize("fs", [44100, 48000, 96000])
def test_shaped_spectrum_matches_ntf_in_octave_bands(fs):
    # Measured error PSD within 1 dB of (Δ²/4)·|NTF|² in every octave band from 100 Hz to
    # 0.9·fs/2 [Z], [LWV92].
    rng = np.random.default_rng(fs)
    x = rng.uniform(-0.5, 0.5, (fs * 8, 1))
    h = design_hearing(fs)
    y = requantize(x, bits=16, dither="tpdf", coeffs=h, seed=5)
    from requant.dsp.analysis import ErrorAnalyzer

    an = ErrorAnalyzer(1, fs, bits=16, quantizer="round", dither="tpdf", coeffs=h,
                       total_frames=x.shape[0], true_peak=False)
    an.feed(x, y - x)
    an.finish()
    f = an.freqs
    measured = an.psd_error[0]
    delta = 2.0**-15
    predicted = 2.0 * (delta**2 / 4) / fs * np.abs(ntf_response(h, f, fs)) ** 2
    lo = 100.0
    while lo < 0.9 * fs / 2:
        hi = min(2 * lo, 0.9 * fs / 2)
        sel = (f >= lo) & (f < hi)
        ratio_db = 10 * np.log10(measured[sel].mean() / predicted[sel].mean())
        assert abs(ratio_db) < 1.0, (lo, hi, ratio_db)
        lo = hi


@pytest.mark.parametrize("fs", [8000, 44100, 96000, 384000])
@pytest.mark.parametrize("shaping", ["first-order", "hearing"])
def test_shaped_error_power_matches_prediction(tmp_path, fs, shaping):
    # (Δ²/4)·Σ n_k² [Z], within 5 % on a short busy signal, at the edges of the rate range
    src = busy(tmp_path, fs=fs, seconds=max(1.0, 200000 / fs), channels=1)
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=16, shaping=shaping, seed=1))
    n = np.concatenate(([1.0], -np.asarray(rep.settings.shaping_coeffs)))
    assert rep.predicted.error_power_lsb2 == pytest.approx(0.25 * np.sum(n * n))
    assert rep.measured.error_power_lsb2 == pytest.approx(0.25 * np.sum(n * n), rel=0.05)
    assert rep.measured.shaping_overloads == 0


def test_report_carries_shaping_and_predicted_spectrum(tmp_path):
    src = busy(tmp_path, seconds=2.0)
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=16, shaping="hearing", seed=1),
                       outputs=Outputs(report=tmp_path / "r.json"))
    assert rep.settings.shaping == "hearing"
    assert len(rep.settings.shaping_coeffs) == 9
    spec = rep.analysis.spectrum
    assert len(spec["band_centers_hz"]) == len(spec["predicted_dbfs_per_bin"]) > 30
    # shaped: the predicted floor is far from flat (more than 20 dB of range)
    pred = np.array(spec["predicted_dbfs_per_bin"])
    assert pred.max() - pred.min() > 20


def test_per_bin_floor_of_16_bit_rounding():
    # REFERENCES §5 [C]: per-bin floor = total noise - 10·log10(M/2); 16-bit rounding noise
    # Δ²/12 with M = 65536 gives -143.25 dBFS per bin (AES17 dBFS). Our bins are fs/M wide.
    fs, M = 48000, 65536
    delta = 2.0**-15
    psd = 2 * (delta**2 / 12) / fs  # one-sided PSD of white rounding noise
    per_bin_dbfs = 10 * np.log10(2 * psd * fs / M)
    assert per_bin_dbfs == pytest.approx(-143.25, abs=0.01)


def tone(fs, seconds, level_dbfs, f=997.0):
    t = np.arange(int(fs * seconds)) / fs
    return (10 ** (level_dbfs / 20) * np.sin(2 * np.pi * f * t)).reshape(-1, 1)


@pytest.mark.parametrize("dither, fires", [("none", True), ("tpdf", False)])
def test_signal_correlated_warning(tmp_path, dither, fires):
    # An undithered -70 dBFS 997 Hz sine at 16 bits is distortion; with TPDF the error's first
    # two moments are independent of the signal [LWV92], so no warning.
    p = tmp_path / "quiet.wav"
    sf.write(p, tone(48000, 3.0, -70.0).astype(np.float32), 48000, subtype="FLOAT")
    rep = convert_file(p, tmp_path / "o.wav", Recipe(bits=16, dither=dither, seed=1),
                       outputs=Outputs(report=tmp_path / "r.json"))
    has = any("signal-correlated error" in w for w in rep.warnings)
    assert has is fires
    assert rep.measured.signal_correlated is fires


def test_quietest_passage_is_the_fade_tail():
    fs = 48000
    x = tone(fs, 8.0, -6.0)
    env = np.ones(x.shape[0])
    env[4 * fs:7 * fs] = 10 ** (np.linspace(0, -80, 3 * fs) / 20)
    env[7 * fs:] = 0.0  # digital silence after the fade: not a passage
    x = x * env[:, None]
    y = requantize(x, bits=16, dither="none")
    res = analyze_arrays(x, y - x, fs, bits=16, quantizer="round", dither="none")
    q = res["quietest_passage"]
    assert 6.0 < q["start_s"] < 7.0
    assert res["signal_correlated"] is True
    y2 = requantize(x, bits=16, dither="tpdf", seed=2)
    assert analyze_arrays(x, y2 - x, fs, bits=16, quantizer="round", dither="tpdf")[
        "signal_correlated"] is False


def test_rpdf_noise_modulation_is_reported():
    # RPDF leaves the error power signal-dependent, a(1-a)Δ² [LWV92]: near-silent input
    # gives far less than Δ²/6, which the report calls noise modulation.
    fs = 48000
    x = tone(fs, 3.0, -100.0)
    y = requantize(x, bits=8, dither="rpdf", seed=1)
    res = analyze_arrays(x, y - x, fs, bits=8, quantizer="round", dither="rpdf")
    assert any(w.startswith("noise modulation") for w in res["warnings"])


@pytest.mark.parametrize("quantizer, dither", [("round", "none"), ("round", "rpdf"),
                                               ("round", "tpdf"), ("truncate", "tpdf")])
def test_error_pdf_integrates_to_one_with_predicted_moments(quantizer, dither):
    # uniform ⊛ dither pdf [LWV92]: mean 0 (-1/2 truncated), mean square as predicted
    from requant.dsp.quantizer import predicted_error_power_lsb2

    x = np.linspace(-4, 4, 80001)
    p = error_pdf(x, quantizer=quantizer, dither=dither)
    dx = x[1] - x[0]
    assert np.sum(p) * dx == pytest.approx(1.0, abs=1e-3)
    assert np.sum(p * x * x) * dx == pytest.approx(predicted_error_power_lsb2(quantizer, dither),
                                                   abs=2e-3)


def test_true_peak_and_dc_in_report(tmp_path):
    # BS.1770-4 Annex 2 check value [C]: a sine at fs/4 sampled at 45° has sample peak
    # -3.01 dBFS and true peak 0 dBTP (±0.05); raised-cosine ends avoid the step overshoot.
    fs = 48000
    n = np.arange(fs)
    x = np.sin(np.pi / 2 * n + np.pi / 4)
    ramp = np.ones(fs)
    ramp[:1024] = 0.5 - 0.5 * np.cos(np.pi * np.arange(1024) / 1024)
    ramp[-1024:] = ramp[:1024][::-1]
    x = (x * ramp + 0.01).reshape(-1, 1)
    p = tmp_path / "tp.wav"
    sf.write(p, x, fs, subtype="DOUBLE")
    rep = convert_file(p, tmp_path / "o.wav", Recipe(bits=24, seed=1),
                       outputs=Outputs(report=tmp_path / "r.json"))
    assert rep.measured.input_true_peak_dbtp == pytest.approx(20 * np.log10(1.01), abs=0.06)
    assert rep.channels[0].measured.input_dc_offset == pytest.approx(np.mean(x), abs=1e-9)


def test_loudness_of_input_and_output_in_report(tmp_path):
    # EBU Tech 3341 test 1, from memory (REFERENCES.md §7): a stereo 1 kHz sine at -23 dBFS
    # reads -23.0 LUFS ±0.1 (ITU-R BS.1770-4). The 8-bit TPDF output adds error some 25 dB
    # below the tone's K-weighted level (about +0.014 LU): measured, not assumed equal.
    from requant.dsp.loudness import integrated_loudness

    fs = 48000
    n = np.arange(12 * fs)
    x = np.repeat((10 ** (-23 / 20) * np.sin(2 * np.pi * 1000 * n / fs))[:, None], 2, axis=1)
    p = tmp_path / "tone.wav"
    sf.write(p, x.astype(np.float32), fs, subtype="FLOAT")
    rep = convert_file(p, tmp_path / "o.wav", Recipe(bits=8, seed=1),
                       outputs=Outputs(report=tmp_path / "r.json", error=tmp_path / "e.wav"))
    loud = rep.analysis.loudness
    assert loud["input_integrated_lufs"] == pytest.approx(-23.0, abs=0.1)
    assert loud["input_range_lu"] == pytest.approx(0.0, abs=0.02)
    out, _ = sf.read(tmp_path / "o.wav")
    assert loud["output_integrated_lufs"] == pytest.approx(integrated_loudness(out, fs), abs=0.01)
    assert loud["output_integrated_lufs"] - loud["input_integrated_lufs"] == pytest.approx(
        integrated_loudness(out, fs) - integrated_loudness(x.astype(np.float32), fs), abs=0.01)
    assert json.loads((tmp_path / "r.json").read_text())["analysis"]["loudness"] == loud


@pytest.mark.parametrize("frames", [300, 5000, 15435, 40000])
@pytest.mark.parametrize("shaped", [False, True])
def test_no_false_alarm_for_tpdf_on_short_files(frames, shaped):
    # TPDF: error independent of the signal [LWV92]; short files must not look tonal
    fs = 44100
    rng = np.random.default_rng(frames)
    t = np.arange(frames) / fs
    x = (0.3 * np.sign(np.sin(2 * np.pi * 988 * t)) * np.exp(-t * 9)).reshape(-1, 1)
    x += 1e-3 * rng.standard_normal(x.shape)
    h = design_hearing(fs) if shaped else ()
    y = requantize(x, bits=8, dither="tpdf", coeffs=h, seed=frames)
    res = analyze_arrays(x, y - x, fs, bits=8, quantizer="round", dither="tpdf", coeffs=h)
    assert res["signal_correlated"] is False
    assert res["correlated_error_fraction"] < 0.01


def test_truncating_a_fade_is_flagged():
    # the truncation bias (-Δ/2) is not counted as a tone; the fade's distortion is
    fs = 48000
    x = tone(fs, 4.0, -20.0) * 10 ** (np.linspace(0, -70, 4 * fs) / 20)[:, None]
    y = requantize(x, bits=16, quantizer="truncate", dither="none")
    res = analyze_arrays(x, y - x, fs, bits=16, quantizer="truncate", dither="none")
    assert res["signal_correlated"] is True


@pytest.mark.parametrize("n, half", [(4097, 24), (30, 24), (9, 1), (1, 3)])
def test_running_median_equals_scipy_median_filter(n, half):
    # reference library: scipy.ndimage.median_filter with mode="nearest"
    from scipy.ndimage import median_filter

    from requant.dsp.analysis import _running_median

    v = np.random.default_rng(n).exponential(1.0, n)
    assert np.array_equal(_running_median(v, half),
                          median_filter(v, size=2 * half + 1, mode="nearest"))
