"""Tests for requant.dsp.audibility and requant.report.advice: how audible the noise is and
which method suits a file (issue 20, item 4)."""

import math

import numpy as np
import pytest
from scipy import integrate, signal

from requant.dsp.audibility import (
    MAX_FLOOR_RISE_DB,
    REFERENCE_PLAYBACK_DB_SPL,
    above_threshold_db,
    advice_paragraph,
    advise,
    floor_rise_db,
    predicted_noise_dbfs,
    threshold_at_1khz_db_spl,
    threshold_comparison,
    tpdf_noise_dbfs,
)
from requant.dsp.shaping import design_hearing, gerzon_craven_bound_db


def terhardt(f_hz):
    """Terhardt (1979) threshold in quiet, dB SPL (REFERENCES.md section 4, the formula)."""
    k = f_hz / 1000.0
    return 3.64 * k**-0.8 - 6.5 * math.exp(-0.6 * (k - 3.3) ** 2) + 1e-3 * k**4


@pytest.mark.parametrize("bits, snr", [(8, 45.15), (12, 69.24), (16, 93.32), (24, 141.48)])
def test_flat_tpdf_noise_is_the_tables(bits, snr):
    # REFERENCES.md section 1 [C]: a full-scale sine over TPDF noise (Δ²/4) has SNR 93.32 dB
    # at 16 bits, so the noise reads -93.32 dBFS (AES17)
    assert tpdf_noise_dbfs(bits) == pytest.approx(-snr, abs=0.005)


@pytest.mark.parametrize("rate", [44100, 48000, 96000])
def test_threshold_weighted_white_noise_against_quadrature(rate):
    # The weight is the inverse of Terhardt's threshold (held at 100 dB SPL), 1 at 1 kHz; white
    # noise's weighted level is its level plus 10 log10 of the weight's mean over 0..fs/2.
    # Reference: scipy.integrate.quad over the formula written out above.
    t1k = terhardt(1000.0)

    def w(f):
        return 10 ** (-(min(terhardt(f), 100.0) - t1k) / 10) if f > 0 else 0.0

    nyq = rate / 2
    breaks = [20.0, 100.0, 1000.0, 3300.0, 10000.0, 15000.0, 17000.0, 17800.0]
    mean = integrate.quad(w, 0.0, nyq, points=[b for b in breaks if b < nyq], limit=400)[0] / nyq
    expected = tpdf_noise_dbfs(16) + 10 * math.log10(mean)
    assert predicted_noise_dbfs(16, rate) == pytest.approx(expected, abs=0.01)


@pytest.mark.parametrize("rate", [44100, 48000])
def test_shaped_threshold_noise_against_freqz_and_the_gerzon_craven_bound(rate):
    # |NTF|² from scipy.signal.freqz (reference library) on the weight, mean over 0..fs/2; the
    # reduction cannot beat the Gerzon-Craven bound (REFERENCES.md section 3).
    h = design_hearing(rate)
    f, resp = signal.freqz(np.concatenate([[1.0], -h]), worN=16385, fs=rate, include_nyquist=True)
    t1k = terhardt(1000.0)
    wt = np.array([10 ** (-(min(terhardt(x), 100.0) - t1k) / 10) if x > 0 else 0.0 for x in f])
    gain = 10 * math.log10(np.trapezoid(wt * np.abs(resp) ** 2, f) / np.trapezoid(wt, f))
    flat = predicted_noise_dbfs(16, rate)
    shaped = predicted_noise_dbfs(16, rate, coeffs=h)
    assert shaped - flat == pytest.approx(gain, abs=0.02)
    assert flat - shaped <= gerzon_craven_bound_db("threshold", rate) + 1e-9


def test_high_passed_tpdf_keeps_the_total_power():
    # REFERENCES.md section 2 [C]: high-passed TPDF's total error power is still Δ²/4 (Δ²/12 at
    # DC, 5Δ²/12 at Nyquist); its threshold-weighted noise is lower than flat TPDF's (the weight
    # falls at the top of the band, where the high-passed part lies).
    assert predicted_noise_dbfs(16, 48000, weighting="flat", dither="tpdf-hp") == \
        pytest.approx(tpdf_noise_dbfs(16), abs=1e-6)
    assert predicted_noise_dbfs(16, 48000, dither="tpdf-hp") < predicted_noise_dbfs(16, 48000)
    # rounding without dither: Δ²/12, 4.77 dB under TPDF (REFERENCES.md section 2)
    assert predicted_noise_dbfs(16, 48000, weighting="flat", dither="none") == \
        pytest.approx(tpdf_noise_dbfs(16) - 4.771, abs=0.001)


def test_threshold_and_floor_arithmetic():
    # REFERENCES.md section 4 [C]: Terhardt's threshold is 3.37 dB SPL at 1 kHz
    assert threshold_at_1khz_db_spl() == pytest.approx(3.37, abs=0.005)
    assert above_threshold_db(-100.0) == pytest.approx(-100 + REFERENCE_PLAYBACK_DB_SPL - 3.37,
                                                       abs=0.005)
    # powers add: equal noise doubles the power (+3.01 dB); 9.14 dB under raises it 0.5 dB
    assert floor_rise_db(-70.0, -70.0) == pytest.approx(10 * math.log10(2))
    assert floor_rise_db(-70.0, -79.14) == pytest.approx(MAX_FLOOR_RISE_DB, abs=0.001)


@pytest.mark.parametrize("kwargs, choice, reason", [
    ({"bits": 16, "sample_rate": 48000, "bits_in_use": 16}, "none-needed", "lossless"),
    ({"bits": 16, "sample_rate": 48000, "bits_in_use": 12}, "none-needed", "lossless"),
    ({"bits": 16, "sample_rate": 44100, "quiet_dbfs": -70.0, "quiet_is_noise": True},
     "tpdf", "own-noise"),
    ({"bits": 24, "sample_rate": 48000, "quiet_dbfs": -80.0, "quiet_is_noise": False},
     "tpdf", "below-threshold"),
    ({"bits": 16, "sample_rate": 48000, "quiet_dbfs": -64.0, "quiet_is_noise": False},
     "hearing", "audible"),
    # the same level, but music: the file's own noise does not cover flat TPDF
    ({"bits": 16, "sample_rate": 44100, "quiet_dbfs": -70.0, "quiet_is_noise": False},
     "hearing", "audible"),
    ({"bits": 8, "sample_rate": 48000, "quiet_dbfs": -60.0}, "hearing", "audible"),
    ({"bits": 16, "sample_rate": 6000, "quiet_dbfs": -60.0}, "tpdf", "no-design"),
])
def test_decisions(kwargs, choice, reason):
    a = advise(**kwargs)
    assert (a.choice, a.reason) == (choice, reason)
    text = advice_paragraph(a)
    assert text.startswith(f"At {a.bits} bits and {a.sample_rate:g} Hz: ")
    assert text.endswith(".") and "  " not in text
    if reason in ("audible", "below-threshold"):
        assert f"{a.tpdf_threshold_dbfs:.1f} dBFS" in text
        assert f"{abs(a.tpdf_above_threshold_db):.1f} dB" in text
    if choice == "hearing":
        assert f"lowers it by {a.hearing_benefit_db:.1f} dB" in text
        assert "--shaping hearing" in text


def test_own_noise_needs_the_floor_to_rise_by_half_a_db_or_less():
    flat = tpdf_noise_dbfs(16)
    margin = -10 * math.log10(10 ** (MAX_FLOOR_RISE_DB / 10) - 1)  # 9.14 dB
    assert advise(16, 48000, quiet_dbfs=flat + margin + 0.01, quiet_is_noise=True).reason == \
        "own-noise"
    assert advise(16, 48000, quiet_dbfs=flat + margin - 0.01, quiet_is_noise=True).reason == \
        "audible"


def test_shaping_benefit_grows_with_the_rate():
    # the hearing design has more room above the top of hearing at higher rates
    gains = [advise(16, r).hearing_benefit_db for r in (44100, 48000, 96000)]
    assert gains == sorted(gains) and gains[0] > 10.0
    # at 24 bits flat TPDF is far below the threshold: plain TPDF
    a = advise(24, 48000)
    assert a.tpdf_above_threshold_db < -30 and a.choice == "tpdf"


def test_threshold_comparison_wording():
    assert threshold_comparison(-109.44, -94.1, bits=16) == \
        "-109.4 dBFS measured, 15.3 dB below flat TPDF at 16 bits (-94.1 dBFS predicted)"
    assert threshold_comparison(-94.12, -94.1, bits=16, predicted=True).startswith(
        "-94.1 dBFS predicted, the same as flat TPDF")


# --------------------------------------------------------------------------
# The convert side: the console summary and the report's first table and paragraph


def _noise_master(tmp_path, *, rate=48000, seconds=6.0, floor_dbfs=-70.0):
    """A float master: a loud harmonic tone, then its own hiss (Gaussian, known level)."""
    import soundfile as sf

    rng = np.random.default_rng(30)
    n = int(rate * seconds)
    t = np.arange(n) / rate
    tone = sum(0.5**k * np.sin(2 * np.pi * 220 * (k + 1) * t) for k in range(5)) * 0.2
    tone[n // 2:] = 0.0
    sigma = math.sqrt(10 ** (floor_dbfs / 10) / 2)
    x = tone + rng.normal(0.0, sigma, n)
    path = tmp_path / "master.wav"
    sf.write(path, x.astype(np.float32), rate, subtype="FLOAT")
    return path


def test_threshold_weighted_noise_measured_as_predicted(tmp_path):
    # Convert with flat TPDF and with the hearing shaper: each measured threshold-weighted
    # figure lies within 0.2 dB of its prediction, and the measured difference is the
    # predicted benefit (the weighting per requant.dsp.weighting, Terhardt 1979).
    from requant.convert import Outputs, convert_file
    from requant.recipe import Recipe

    src = _noise_master(tmp_path)
    got = {}
    for shaping in ("none", "hearing"):
        rep = convert_file(src, tmp_path / f"{shaping}.wav",
                           Recipe.from_dict({"bits": 16, "shaping": shaping, "seed": 2}),
                           outputs=Outputs(), analyze=True)
        m, p = rep.measured, rep.predicted
        assert m.threshold_weighted_noise_dbfs == pytest.approx(
            p.threshold_weighted_noise_dbfs, abs=0.2)
        assert [c.measured.threshold_weighted_noise_dbfs is not None for c in rep.channels] == \
            [True]
        got[shaping] = m.threshold_weighted_noise_dbfs
    assert got["none"] == pytest.approx(predicted_noise_dbfs(16, 48000), abs=0.2)
    benefit = advise(16, 48000).hearing_benefit_db
    assert got["none"] - got["hearing"] == pytest.approx(benefit, abs=0.3)


def test_report_first_table_and_advice(tmp_path):
    # The report's first table leads with the threshold-weighted noise and sets flat TPDF at
    # the same word length beside every noise figure; the paragraph judges the master's own
    # hiss (-70 dBFS) as noise that buries flat TPDF at 16 bits.
    from requant.convert import Outputs, convert_file
    from requant.recipe import Recipe
    from requant.report.tables import page_context

    src = _noise_master(tmp_path)
    md, html = tmp_path / "r.md", tmp_path / "r.html"
    rep = convert_file(src, tmp_path / "o.wav",
                       Recipe.from_dict({"bits": 16, "shaping": "hearing", "seed": 2}),
                       outputs=Outputs(report=(md, html)))
    ctx = page_context(rep, None, bands_per_octave=48)
    t = ctx["tables"][0]
    assert t["head"][-1] == "flat TPDF at 16 bits, predicted"
    first = t["rows"][0]
    assert first[0].startswith("hearing-threshold-weighted noise")
    assert first[1] == f"{rep.measured.threshold_weighted_noise_dbfs:.2f}"
    assert float(first[-1]) == pytest.approx(predicted_noise_dbfs(16, 48000), abs=0.01)
    snr = next(r for r in t["rows"] if r[0].startswith("SNR"))
    assert float(snr[-1]) > float(snr[1])  # flat TPDF's SNR is better; shaping's is worse
    assert "dB below flat TPDF at 16 bits" in ctx["headline"]
    q = rep.analysis.quietest_passage
    assert q["signal_tonal_fraction"] < 0.01  # the hiss is noise
    assert "own noise floor" in ctx["advice"] and "Use plain TPDF" in ctx["advice"]
    assert "This conversion is shaped" in ctx["advice"]
    text = md.read_text()
    assert "## Which method for this file" in text and "own noise floor" in text
    page = html.read_text()
    assert 'id="advice"' in page and "flat TPDF at 16 bits, predicted" in page


def test_passage_tonal_fraction_tells_tones_from_noise():
    # white noise has no lines (its averaged periodogram stays within 6 dB of its median);
    # a sum of three sines is all lines
    from requant.dsp.analysis import passage_tonal_fraction

    rng = np.random.default_rng(31)
    assert passage_tonal_fraction(rng.normal(size=(32768, 2))) < 0.01
    t = np.arange(32768) / 48000
    tones = sum(np.sin(2 * np.pi * f * t) for f in (220, 330, 440))[:, None]
    assert passage_tonal_fraction(tones + 1e-4 * rng.normal(size=tones.shape)) > 0.9


def test_cli_convert_summary_shows_what_is_heard(tmp_path):
    # What the user sees: the third line sets the hearing-threshold-weighted noise beside flat
    # TPDF's; predicted without a report, measured with one.
    from helpers import run_cli

    src = _noise_master(tmp_path, seconds=3.0)
    code, out, err = run_cli("convert", src, tmp_path / "o.wav", "--bits", "16",
                             "--shaping", "hearing", "--seed", "2")
    assert code == 0, err
    lines = out.splitlines()
    heard = next(line for line in lines if "hearing-threshold-weighted noise" in line)
    flat = predicted_noise_dbfs(16, 48000)
    shaped = flat - advise(16, 48000).hearing_benefit_db
    assert heard.strip() == (f"hearing-threshold-weighted noise {shaped:.1f} dBFS predicted, "
                             f"{flat - shaped:.1f} dB below flat TPDF at 16 bits "
                             f"({flat:.1f} dBFS predicted)")
    assert lines.index(heard) == 2 and lines[1].lstrip().startswith("SNR")
    code, out, err = run_cli("convert", src, tmp_path / "o2.wav", "--bits", "16",
                             "--shaping", "hearing", "--seed", "2", "--report",
                             tmp_path / "r.json")
    assert code == 0, err
    assert "dBFS measured, " in out and "dB below flat TPDF at 16 bits" in out
