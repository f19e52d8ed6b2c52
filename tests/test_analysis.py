"""Report figures against theory: weighted noise, shaped spectra, signal-correlated error.

Sources:
[LWV92] Lipshitz, Wannamaker & Vanderkooy, "Quantization and Dither: A Theoretical Survey",
        JAES 40(5), 1992 -- TPDF error power Δ²/4 for every input.
[Z]     Zölzer, Digital Audio Signal Processing, ch. 2.3 -- error feedback: output noise
        PSD = dither-quantizer PSD × |NTF|², power (Δ²/4)·Σ n_k².
[IEC]   IEC 61672-1:2013 (A-weighting); [468] ITU-R BS.468-4 (weighting curve).
[W67]   Welch, "The use of FFT for the estimation of power spectra", IEEE Trans. Audio
        Electroacoust. 15(2), 1967 (from memory for the citation details).
[R9]    ../shared/REFERENCES.md §9 (and §2): high-passed TPDF r[n] − r[n−1] has the total error
        spectrum Δ²/12 + (Δ²/12)·|1 − e^−jω|², from the dither's definition.
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

    from requant.dsp.tones import _running_median

    v = np.random.default_rng(n).exponential(1.0, n)
    assert np.array_equal(_running_median(v, half),
                          median_filter(v, size=2 * half + 1, mode="nearest"))


# ------------------------------------------------------------------------------------------
# issue 20, item 2: high-passed TPDF is predicted from its own spectrum, not as flat noise


def _iec_a_power(f):
    # IEC 61672-1:2013 Annex E, equations (E.1)-(E.6): poles 20.598997, 107.65265, 737.86223
    # and 12194.217 Hz, A(1 kHz) normalised by +2.000 dB (REFERENCES §4); power weight W².
    f = np.asarray(f, dtype=np.float64)
    f1, f2, f3, f4 = 20.598997, 107.65265, 737.86223, 12194.217
    ra = (f4**2 * f**4) / ((f**2 + f1**2) * np.sqrt((f**2 + f2**2) * (f**2 + f3**2))
                           * (f**2 + f4**2))
    return (ra * 10 ** (2.0 / 20)) ** 2


def _power_weight(name):
    from requant.dsp.weighting import weighting_power

    if name == "a":
        return _iec_a_power
    # ITU-R BS.468-4 (the analytic fit, checked against Table 1 in test_weighting) and the
    # inverse of Terhardt's (1979) threshold, 1 at 1 kHz
    return lambda f: weighting_power(name, np.asarray(f, dtype=np.float64))


def _hp_tpdf_spectrum_lsb2(f, fs):
    # [R9], [LWV92]: the requantization error of the dithered signal is white, Δ²/12, and
    # uncorrelated with the dither ν[n] = r[n] − r[n−1] (r uniform over one LSB, variance
    # Δ²/12), whose spectrum is (Δ²/12)·|1 − e^−jω|² = (Δ²/12)·2(1 − cos ω). In LSB².
    w = 2 * np.pi * np.asarray(f, dtype=np.float64) / fs
    return 1 / 12 + (1 / 12) * 2 * (1 - np.cos(w))


def _closed_form_dbfs(spectrum_lsb2, weight, fs, bits):
    # mean over 0..fs/2 of S(f)·W²(f), in full scale², as AES17 dBFS (10·log10(2·P))
    from scipy.integrate import quad

    knots = [20.0, 100.0, 1000.0, 5000.0, 15000.0, min(17800.0, fs / 2 - 1)]
    val, _ = quad(lambda f: spectrum_lsb2(f) * float(weight(f)), 0.0, fs / 2, limit=400,
                  points=[k for k in knots if k < fs / 2])
    return 10 * np.log10(2 * val / (fs / 2) * 2.0 ** (-2 * (bits - 1)))


def _music_like(fs, seconds, seed):
    # invented material: noise under a soft spectral tilt and a slow envelope, with a few
    # partials, about -20 dBFS RMS: busy, and far above 1 LSB at 16 bits
    from scipy.signal import butter, lfilter

    rng = np.random.default_rng(seed)
    n = int(fs * seconds)
    t = np.arange(n) / fs
    b, a = butter(2, 2500.0, fs=fs)
    x = lfilter(b, a, rng.standard_normal(n))
    x = x / np.std(x) + 0.3 * np.sin(2 * np.pi * 220.0 * t) + 0.2 * np.sin(2 * np.pi * 1375.0 * t)
    env = 0.6 + 0.35 * np.sin(2 * np.pi * 0.11 * t + 0.4)
    return (0.07 * env * x).reshape(-1, 1)


def test_hp_tpdf_weighted_and_spectrum_match_their_closed_form(tmp_path):
    # Predicted A / 468 / threshold-weighted noise equal the closed form computed here from
    # the dither's definition [R9] (within 0.01 dB); measured within 0.1 dB of predicted on
    # 60 s of music-like material; the flat-TPDF model would miss by more than 1 dB.
    fs, bits = 48000, 16
    x = _music_like(fs, 60.0, seed=20)
    src = tmp_path / "music.wav"
    sf.write(src, x.astype(np.float32), fs, subtype="FLOAT")
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=bits, dither="tpdf-hp", seed=7),
                       outputs=Outputs(report=tmp_path / "r.json"))
    d = json.loads((tmp_path / "r.json").read_text())
    keys = {"a": "a_weighted_noise_dbfs", "itu468": "itu468_noise_dbfs",
            "threshold": "threshold_weighted_noise_dbfs"}
    for name, key in keys.items():
        closed = _closed_form_dbfs(lambda f: _hp_tpdf_spectrum_lsb2(f, fs), _power_weight(name),
                                   fs, bits)
        flat = _closed_form_dbfs(lambda f: 0.25, _power_weight(name), fs, bits)  # TPDF, LWV92
        pred, meas = d["predicted"][key], d["measured"][key]
        assert pred == pytest.approx(closed, abs=0.01), (name, pred, closed)
        assert abs(meas - pred) < 0.1, (name, meas, pred)
        assert abs(meas - flat) > 1.0, (name, meas, flat)  # the flat model was the bug
    # plain power: Δ²/4 in all [LWV92]
    assert rep.predicted.error_power_lsb2 == pytest.approx(0.25)
    assert rep.measured.error_power_lsb2 == pytest.approx(0.25, rel=0.01)
    # the spectrum: per-bin levels in four wide bands (hundreds of bins each, so the scatter
    # of the averaged estimate stays near 0.03 dB), measured against predicted (0.1 dB), and
    # predicted against the closed form at every 1/6-octave band's centre (0.05 dB)
    sp = d["analysis"]["spectrum"]
    fc = np.array(sp["band_centers_hz"])
    meas = 10 ** (np.array(sp["measured_dbfs_per_bin"])[:, 0] / 10)
    pred = 10 ** (np.array(sp["predicted_dbfs_per_bin"]) / 10)
    df = fs / d["analysis"]["method"]["segment_frames"]
    closed = 10 * np.log10(2 * _hp_tpdf_spectrum_lsb2(fc, fs) * 2.0 ** -30 * 2 * df / fs)
    assert np.max(np.abs(10 * np.log10(pred) - closed)) < 0.05
    for lo, hi in ((100.0, 1000.0), (1000.0, 4000.0), (4000.0, 12000.0), (12000.0, 24000.0)):
        sel = (fc >= lo) & (fc < hi)
        diff = 10 * np.log10(np.mean(meas[sel]) / np.mean(pred[sel]))
        assert abs(diff) < 0.1, (lo, diff)
    # and it is far from flat: Δ²/12 at DC against 5Δ²/12 at Nyquist, 7 dB [R9]
    assert 10 * np.log10(pred[-1] / pred[0]) > 6.0


def test_predicted_power_and_spectrum_of_every_dither_model():
    # The power is the mean of the spectrum over 0..fs/2 for every dither and shaper: the
    # white models' Δ²/12, Δ²/6, Δ²/4 times Σn² [LWV92], [Z]; high-passed TPDF Δ²/4 unshaped
    # [R9] and Σ c_j ρ_j shaped (the mean of cos(jω)|N|² is the taps' autocorrelation ρ_j).
    from requant.dsp.quantizer import error_spectrum_lsb2, predicted_error_power_lsb2

    fs = 48000
    f = np.linspace(0, fs / 2, 200001)
    for dither, white in (("none", 1 / 12), ("rpdf", 1 / 6), ("tpdf", 1 / 4), ("tpdf-hp", None)):
        for h in ((), (1.0,), (1.2, -0.5, 0.1)):
            s = error_spectrum_lsb2(dither, f, fs, h)
            mean = np.trapezoid(s, f) / (fs / 2)
            p = predicted_error_power_lsb2("round", dither, h)
            assert p == pytest.approx(mean, rel=1e-6)
            n = np.concatenate(([1.0], -np.asarray(h)))
            if white is not None:
                assert p == pytest.approx(white * np.sum(n * n))
    assert predicted_error_power_lsb2("round", "tpdf-hp") == pytest.approx(0.25)
    assert error_spectrum_lsb2("tpdf-hp", [0.0, fs / 2], fs) == pytest.approx([1 / 12, 5 / 12])


def test_shaped_hp_tpdf_is_refused():
    # The recipe refuses high-passed TPDF inside a shaping loop (LWV 2004: the loop's model
    # needs dither independent from sample to sample), so its shaped prediction is never used.
    from requant.errors import RequantError

    with pytest.raises(RequantError, match="noise-shaping loop"):
        Recipe(bits=16, dither="tpdf-hp", shaping="hearing")


# ------------------------------------------------------------------------------------------
# issue 20, item 10a: the weighted noise is a uniform average over every sample


def _fir_weighting(name, fs, taps=32769):
    # A linear-phase FIR with the weighting's magnitude (scipy.signal.firwin2, frequency
    # sampling with a Blackman window): A per IEC 61672-1 Annex E, 468 per ITU-R BS.468-4,
    # threshold the inverse of Terhardt (1979).
    from scipy.signal import firwin2

    f = np.linspace(0.0, fs / 2, 8193)
    g = np.sqrt(_power_weight(name)(f))
    return firwin2(taps, f, g, fs=fs, window="blackman")


@pytest.mark.parametrize("kind", ["quiet music", "one-shot"])
@pytest.mark.parametrize("fs, frames", [(44100, 12345), (48000, 48001), (48000, 100003),
                                        (44100, 300007)])
def test_undithered_weighted_noise_equals_a_whole_file_filter(tmp_path, fs, frames, kind):
    # Undithered error follows the signal, so any sample weighted unevenly or left out shows
    # (the Welch segments this replaced were 3 to 30 dB low on the one-shots, whose error sits
    # at the clip's two ends). The report's figures must equal the weighting filter run over
    # the whole error file in one go (scipy.signal.fftconvolve, the full convolution's
    # energy over the clip's length) within 0.02 dB.
    from scipy.signal import fftconvolve

    rng = np.random.default_rng(frames)
    t = np.arange(frames) / fs
    if kind == "quiet music":
        x = (2.5 * np.sin(2 * np.pi * 331 * t) * (1 + 0.5 * np.sin(2 * np.pi * 1.3 * t))
             + 1.5 * np.sin(2 * np.pi * 2791 * t)
             + np.convolve(rng.standard_normal(frames), np.ones(4) / 4, "same")) / 32768
    else:  # a busy attack, a body already on the 16-bit grid (no error), a busy last stretch
        x = np.round(rng.standard_normal(frames) * 40) / 32768
        x[:700] = rng.standard_normal(700) * 300 / 32768
        x[-300:] = rng.standard_normal(300) * 300 / 32768
    src = tmp_path / "clip.wav"
    sf.write(src, x.astype(np.float32), fs, subtype="FLOAT")
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=16, dither="none", seed=1),
                       outputs=Outputs(report=tmp_path / "r.json", error=tmp_path / "e.wav"))
    e, _ = sf.read(tmp_path / "e.wav", dtype="float64")
    assert e.shape[0] == frames
    for name, key in (("a", "a_weighted_noise_dbfs"), ("itu468", "itu468_noise_dbfs"),
                      ("threshold", "threshold_weighted_noise_dbfs")):
        y = fftconvolve(e, _fir_weighting(name, fs))
        ref = 10 * np.log10(2 * np.sum(y * y) / frames)
        assert getattr(rep.measured, key) == pytest.approx(ref, abs=0.02), name


@pytest.mark.parametrize("blocks", [[1, 7, 4096, 65536], [13, 8191, 8193], [100000]])
def test_noise_meter_blocks_equal_whole(blocks):
    # Like scipy.signal.max_len_seq's state test: feeding in blocks of any size gives the
    # figures of one call on the whole (the tiles do not depend on the blocks).
    from requant.dsp.noisemeter import WeightedNoiseMeter

    fs, n = 48000, 150001
    rng = np.random.default_rng(3)
    e = rng.standard_normal((n, 2)).astype(np.float32)
    sil = np.zeros((n, 2), bool)
    sil[20000:30000, 1] = True
    e[sil] = 0.0
    whole = WeightedNoiseMeter(2, fs, total_frames=n)
    whole.process(e, silent=sil)
    ref = whole.finish()
    m = WeightedNoiseMeter(2, fs, total_frames=n)
    i, k = 0, 0
    while i < n:
        step = blocks[k % len(blocks)]
        m.process(e[i:i + step], silent=sil[i:i + step])
        i += step
        k += 1
    got = m.finish()
    for name in ("flat", "a", "itu468", "threshold"):
        assert got["all"][name] == pytest.approx(ref["all"][name], rel=1e-9)
        assert got["covered"][name] == pytest.approx(ref["covered"][name], rel=1e-9)
    assert list(got["covered_samples"]) == [n, n - 10000]
    # Parseval: the unweighted figure is the plain mean square
    assert got["all"]["flat"] == pytest.approx(np.mean(e.astype(np.float64) ** 2, axis=0),
                                               rel=1e-9)


def test_noise_meter_sampled_tiles_of_a_stationary_error():
    # A stationary error (white TPDF-like noise through 1 − 0.5 z^−1) measured on evenly
    # spread tiles agrees with every tile within 0.03 dB; silent and excluded samples are
    # counted exactly either way, and a clipped sample's tile is always measured.
    from requant.dsp.noisemeter import MAX_SAMPLED_TILES, WeightedNoiseMeter

    fs = 48000
    rng = np.random.default_rng(5)
    n = fs * 200
    w = rng.random(n) - rng.random(n)
    e = np.stack([w - 0.5 * np.concatenate(([0.0], w[:-1]))] * 2, axis=1)
    sil = np.zeros((n, 2), bool)
    for _ in range(40):
        a = int(rng.integers(0, n - 50000))
        sil[a:a + int(rng.integers(1000, 50000))] = True
    e[sil] = 0.0
    exc = np.zeros((n, 2), bool)
    idx = rng.integers(0, n, 30)
    exc[idx, 0] = True
    e[idx, 0] = 300.0
    out = {}
    for sample in (False, True):
        m = WeightedNoiseMeter(2, fs, total_frames=n, sample=sample)
        for i in range(0, n, 65536):
            m.process(e[i:i + 65536].astype(np.float32), silent=sil[i:i + 65536],
                      exclude=exc[i:i + 65536])
        out[sample] = m.finish()
        assert m.sampled is sample
        # sampled: about MAX_SAMPLED_TILES, plus the tiles with an excluded sample and the
        # tiles after mostly silent ones; every tile otherwise
        assert (MAX_SAMPLED_TILES // 2 <= m.tiles_measured < m.tiles_total / 3 if sample
                else m.tiles_measured == m.tiles_total)
    expect = 2 * n - np.sum(sil) - np.sum(exc)
    for r in out.values():
        assert int(np.sum(r["covered_samples"])) == expect
    for name in ("flat", "a", "itu468", "threshold"):
        for kind in ("all", "covered"):
            diff = 10 * np.log10(out[True][kind][name] / out[False][kind][name])
            assert np.max(np.abs(diff)) < 0.03, (name, kind, diff)


# ------------------------------------------------------------------------------------------
# issue 20, item 3: the report says which samples the prediction covers and why the whole
# file differs from it


def _noise_with_silence(tmp_path, fs=48000):
    # invented: 2 s of busy noise, 1.5 s of digital silence, 2 s of noise (stereo)
    rng = np.random.default_rng(30)
    a = rng.uniform(-0.4, 0.4, (2 * fs, 2))
    b = rng.uniform(-0.4, 0.4, (2 * fs, 2))
    x = np.concatenate([a, np.zeros((int(1.5 * fs), 2)), b]).astype(np.float32)
    p = tmp_path / "gap.wav"
    sf.write(p, x, fs, subtype="FLOAT")
    return p, x


def test_coverage_of_digital_silence_in_json_markdown_and_notes(tmp_path):
    # Kept silence has no error, so the whole file's error power sits 10·log10(covered/all)
    # below the model's Δ²/4 [LWV92], while over the covered samples it is the model's.
    src, x = _noise_with_silence(tmp_path)
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=16, seed=4),
                       outputs=Outputs(report=[tmp_path / "r.json", tmp_path / "r.md"]))
    d = json.loads((tmp_path / "r.json").read_text())
    cov = d["prediction_coverage"]
    silent = int(np.sum(x == 0))
    assert cov["samples"] == x.size and cov["silent_samples"] == silent
    assert cov["covered_samples"] == x.size - silent
    assert cov["clipped_samples"] == 0 and cov["unchanged_samples"] is None
    assert cov["predicted"]["error_power_lsb2"] == pytest.approx(0.25)
    m = cov["measured"]
    assert 10 * np.log10(m["error_power_lsb2"] / 0.25) == pytest.approx(0.0, abs=0.05)
    for key in ("a_weighted_noise_dbfs", "itu468_noise_dbfs", "threshold_weighted_noise_dbfs"):
        assert m[key] == pytest.approx(cov["predicted"][key], abs=0.1), key
    whole = 10 * np.log10(rep.measured.error_power_lsb2 / 0.25)
    assert whole == pytest.approx(10 * np.log10((x.size - silent) / x.size), abs=0.05)
    note = next(n for n in rep.notes if n.startswith("The prediction covers"))
    assert f"{x.size - silent:,} of {x.size:,} samples" in note
    assert f"{silent:,} kept digitally silent" in note
    assert f"{abs(whole):.2f} dB below the model's" in note
    md = (tmp_path / "r.md").read_text()
    assert "What the prediction covers" in md and "The prediction covers" in md


def test_coverage_leaves_clipping_out(tmp_path):
    # A float master over full scale is clipped: the whole file's error is far above the
    # model, the covered samples' error is TPDF's Δ²/4 [LWV92].
    fs = 48000
    rng = np.random.default_rng(31)
    x = rng.uniform(-0.5, 0.5, (3 * fs, 1))
    x[fs:fs + 2000, 0] = 1.4  # over full scale: every one of these samples is clipped
    src = tmp_path / "hot.wav"
    sf.write(src, x.astype(np.float32), fs, subtype="FLOAT")
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=16, seed=5),
                       outputs=Outputs(report=tmp_path / "r.json"))
    cov = rep.coverage
    assert cov.clipped_samples == rep.measured.clipped_samples >= 2000
    assert cov.clipped_beyond_model_samples >= 2000
    assert cov.covered_samples == x.size - cov.clipped_samples
    assert 10 * np.log10(cov.measured["error_power_lsb2"] / 0.25) == pytest.approx(0.0, abs=0.1)
    assert cov.measured["a_weighted_noise_dbfs"] == pytest.approx(
        cov.predicted["a_weighted_noise_dbfs"], abs=0.15)
    assert 10 * np.log10(rep.measured.error_power_lsb2 / rep.predicted.error_power_lsb2) > 10
    note = next(n for n in rep.notes if n.startswith("The prediction covers"))
    assert "clipped at the ends of the 16-bit range" in note and "raise it" in note


def test_coverage_of_undithered_samples_already_on_the_grid(tmp_path):
    # Rounding without dither leaves a sample on the output grid exactly; the rest of a busy
    # 24-bit signal rounds with Δ²/12 (Bennett 1948; REFERENCES §1).
    fs = 48000
    rng = np.random.default_rng(32)
    codes = rng.integers(-2**22, 2**22, (2 * fs, 1))
    codes[fs // 2:fs] = codes[fs // 2:fs] // 256 * 256  # a stretch of 16-bit audio
    codes[codes == 0] = 1
    src = tmp_path / "mixed.wav"
    sf.write(src, (codes * 256).astype(np.int32), fs, subtype="PCM_24")
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=16, dither="none"),
                       outputs=Outputs(report=tmp_path / "r.json"))
    on_grid = int(np.sum(codes % 256 == 0))
    cov = rep.coverage
    assert cov.unchanged_samples == on_grid
    assert cov.covered_samples == codes.size - on_grid
    assert 10 * np.log10(cov.measured["error_power_lsb2"] / (1 / 12)) == pytest.approx(
        0.0, abs=0.05)
    assert any(f"{on_grid:,} already on the 16-bit grid" in n for n in rep.notes)


def test_coverage_in_the_command_line_output(tmp_path):
    # What the user sees: the note on stdout, the table in the Markdown report.
    from helpers import run_cli

    src, x = _noise_with_silence(tmp_path)
    code, out, err = run_cli("convert", src, tmp_path / "o.wav", "--seed", 2, "--report",
                             tmp_path / "r.md")
    assert code == 0, err
    silent = int(np.sum(x == 0))
    assert f"note: The prediction covers {x.size - silent:,} of {x.size:,} samples" in out
    assert "What the prediction covers" in (tmp_path / "r.md").read_text()


# ------------------------------------------------------------------------------------------
# issue 20, item 10b: undithered requantization of a passage near 1 LSB RMS is flagged


def _quiet_noise(tmp_path, fs=48000):
    # invented: 3 s of noise at 30 LSB RMS (16-bit LSB), then 3 s at 1.2 LSB RMS
    rng = np.random.default_rng(33)
    lsb = 2.0**-15
    x = np.concatenate([30 * lsb * rng.standard_normal(3 * fs),
                        1.2 * lsb * rng.standard_normal(3 * fs)]).reshape(-1, 1)
    p = tmp_path / "quiet.wav"
    sf.write(p, x.astype(np.float32), fs, subtype="FLOAT")
    return p


@pytest.mark.parametrize("dither, flagged", [("none", True), ("tpdf", False)])
def test_undithered_quiet_passage_is_signal_dependent(tmp_path, dither, flagged):
    # Noise-like material near 1 LSB RMS: rounding error barely correlates with it and has no
    # lines (Widrow & Kollár 2008: the quantization theorem nearly holds for Gaussian input
    # with σ ≥ Δ), so both measured shares stay under 2 %; yet without dither the error is a
    # function of the signal, and the report says so. With TPDF it is not [LWV92].
    src = _quiet_noise(tmp_path)
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=16, dither=dither, seed=6),
                       outputs=Outputs(report=tmp_path / "r.json"))
    d = json.loads((tmp_path / "r.json").read_text())
    assert d["measured"]["correlated_error_fraction"] < 0.02  # the shares alone miss it
    assert d["measured"]["signal_correlated"] is flagged
    assert d["measured"]["signal_correlated_reason"] == ("quiet-undithered" if flagged else None)
    warned = [w for w in rep.warnings if "without dither" in w and "LSB RMS" in w]
    assert bool(warned) is flagged


def test_undithered_quiet_passage_in_the_command_line_output(tmp_path):
    from helpers import run_cli

    src = _quiet_noise(tmp_path)
    code, out, err = run_cli("convert", src, tmp_path / "o.wav", "--dither", "none",
                             "--report", tmp_path / "r.md")
    assert code == 0, err
    assert "warning: signal-correlated error: without dither" in err
    md = (tmp_path / "r.md").read_text()
    assert "within about 6 dB of 1 LSB RMS" in md


# ------------------------------------------------------------------------------------------
# issue 20, item 10c (report side): the true peak shown is never below the sample peak

# ITU-R BS.1770-4 Annex 2 (REFERENCES §5): the interpolator's largest coefficient, phase 0
BS1770_LARGEST_TAP = 0.9721679687500


def test_true_peak_shown_is_at_least_the_sample_peak(tmp_path):
    # A lone code of 0.75 at 3 bits among zeros: every interpolated sample near it is 0.75
    # times one coefficient, so the Annex 2 meter reads 0.75 × 0.97217 (0.245 dB below the
    # sample peak); the report shows the sample peak and says why.
    fs = 48000
    x = np.full((fs, 1), 0.01)  # rounds to code 0 at 3 bits (LSB 0.25)
    x[fs // 2, 0] = 0.74  # rounds to 0.75
    src = tmp_path / "spike.wav"
    sf.write(src, x.astype(np.float32), fs, subtype="FLOAT")
    rep = convert_file(src, tmp_path / "o.wav", Recipe(bits=3, dither="none"),
                       outputs=Outputs(report=[tmp_path / "r.json", tmp_path / "r.md"]))
    tp = rep.analysis.true_peak
    sample_db = 20 * np.log10(0.75)
    assert tp["output_meter_dbtp"] == pytest.approx(20 * np.log10(0.75 * BS1770_LARGEST_TAP),
                                                    abs=1e-6)
    assert rep.measured.output_true_peak_dbtp == pytest.approx(sample_db, abs=1e-6)
    assert rep.channels[0].measured.output_true_peak_dbtp == pytest.approx(sample_db, abs=1e-6)
    assert any(n.startswith("The output's true peak shown is its sample peak") for n in rep.notes)
    assert "the sample peak where that is higher" in (tmp_path / "r.md").read_text()


def test_long_tpdf_error_sampled_from_the_welch_segments_agrees_with_every_sample():
    # A long file with TPDF dither (stationary error [LWV92]) has its weighted noise from the
    # Welch segments spread over it; the same error measured over every sample (as for an
    # undithered file) agrees within 0.03 dB, with digital silence and clipping in it.
    from requant.dsp.analysis import ErrorAnalyzer
    from requant.dsp.shaping import first_order

    fs, n = 48000, 48000 * 150
    rng = np.random.default_rng(40)
    x = rng.uniform(-0.6, 0.6, (n, 1)).astype(np.float32)
    x[10 * fs:14 * fs] = 0.0
    x[30 * fs:30 * fs + 500] = 1.3  # clipped
    y = requantize(x, bits=16, dither="tpdf", coeffs=first_order(), seed=9)
    e = (y - x).astype(np.float32)
    silent = (x == 0)
    e[silent] = 0.0
    got = {}
    for label in ("tpdf", "rpdf"):  # rpdf: not stationary, so every sample is measured
        an = ErrorAnalyzer(1, fs, bits=16, quantizer="round", dither=label,
                           coeffs=first_order(), total_frames=n, true_peak=False, loudness=False)
        for i in range(0, n, 65536):
            an.feed(x[i:i + 65536], e[i:i + 65536], silent=silent[i:i + 65536])
        got[label] = an.finish()
        assert ("Welch" in got[label]["method"]["weighted"]) is (label == "tpdf")
    for key in ("a_weighted_noise_dbfs", "itu468_noise_dbfs", "threshold_weighted_noise_dbfs"):
        assert got["tpdf"]["measured"][key] == pytest.approx(got["rpdf"]["measured"][key],
                                                             abs=0.03), key
    cov = {k: got[k]["coverage"] for k in got}
    assert cov["tpdf"]["covered_samples"] == cov["rpdf"]["covered_samples"]
    for name in ("a", "itu468", "threshold"):
        a = cov["tpdf"]["covered_mean_square"][name][0]
        b = cov["rpdf"]["covered_mean_square"][name][0]
        assert 10 * np.log10(a / b) == pytest.approx(0.0, abs=0.03), name
