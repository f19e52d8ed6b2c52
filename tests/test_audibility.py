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
    advise,
    floor_rise_db,
    predicted_noise_dbfs,
    threshold_at_1khz_db_spl,
    tpdf_noise_dbfs,
)
from requant.dsp.shaping import design_hearing, gerzon_craven_bound_db
from requant.report.advice import advice_paragraph, threshold_comparison


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
