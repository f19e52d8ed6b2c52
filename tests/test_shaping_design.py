"""Tests for requant.dsp.shaping: NTF design, figures of merit, coefficient I/O.

Check values come from /work/shared/REFERENCES.md section 3 (noise shaping).
"""

import json
import math
import time

import numpy as np
import pytest
from scipy import linalg, signal

from requant.dsp import shaping
from requant.dsp.shaping import (
    DEFAULT_LIMIT_DB,
    MAX_TAPS,
    describe,
    design_from_weight,
    design_hearing,
    first_order,
    gerzon_craven_bound_db,
    gerzon_craven_mean_log_db,
    is_minimum_phase,
    noise_gain,
    noise_gain_db,
    ntf_response,
    ntf_taps,
    resolve_shaping,
    weighted_gain_db,
)
from requant.errors import InputError, OutputError, UsageError
from requant.recipe import load_coefficients, parse_coefficients
from requant.report.filters import export_json, plot_ntf

# Wannamaker, "Psychoacoustically optimal noise shaping", JAES 40(7/8), 1992:
# its 9-tap filter for 44.1 kHz. The coefficients are FROM MEMORY (unverified),
# REFERENCES.md §3. Used only as a yardstick, never as a preset.
WANNAMAKER_9 = np.array([2.412, -3.370, 3.937, -4.174, 3.353, -2.205, 1.281, -0.569, 0.0847])

DESIGN_RATES = [8000, 44100, 48000, 96000, 192000, 384000]


# --- Gerzon-Craven theory ---------------------------------------------------------


@pytest.mark.parametrize(
    ("weighting", "fs", "expected_db"),
    [
        ("a", 44100, 1.61),
        ("a", 48000, 1.88),
        ("a", 96000, 5.51),
        ("itu468", 44100, 9.17),
        ("itu468", 48000, 10.94),
        ("itu468", 96000, 29.58),
    ],
)
def test_gerzon_craven_bounds(weighting, fs, expected_db):
    # Gerzon & Craven, AES 87th Convention 1989, preprint 2822: bound =
    # 10·log10(arithmetic mean W² / geometric mean W²) over 0..fs/2. Values are
    # [C] in REFERENCES.md §3, rounded to 0.01 dB; they depend on integrating
    # the log singularity at 0 Hz (we use a 65536-point midpoint rule), so we
    # allow 0.01 dB: 0.005 for the rounding plus 0.005 for integration.
    assert abs(gerzon_craven_bound_db(weighting, fs) - expected_db) <= 0.01


def test_gerzon_craven_bound_of_flat_weighting_is_zero():
    # Arithmetic and geometric means of a constant are equal (AM-GM equality).
    assert gerzon_craven_bound_db("flat", 44100) == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize(
    ("zeros", "expected_db"),
    [
        ((0.5, -0.3), 0.0),
        ((2.0, 0.5), 20 * math.log10(2.0)),
        ((1.25j, -1.25j, 0.9), 2 * 20 * math.log10(1.25)),
        ((0.99 * np.exp(0.3j), 0.99 * np.exp(-0.3j)), 0.0),
    ],
)
def test_mean_log_follows_jensens_formula(zeros, expected_db):
    # Jensen's formula: the mean of ln|A(e^jω)| over the circle is
    # Σ ln max(1, |z_i|) for monic A. Minimum phase gives 0 dB
    # (Gerzon & Craven 1989); zeros outside add 20·log10|z_i|.
    n = np.real(np.poly(zeros))
    assert abs(gerzon_craven_mean_log_db(-n[1:], 44100) - expected_db) < 1e-6


# --- Wannamaker (1992) yardstick ---------------------------------------------------


def test_wannamaker_total_noise_gain():
    # REFERENCES.md §3 [C]: total noise gain of the 9-tap filter (coefficients
    # from memory) is +18.4 dB; Σ n_k² rounded to 0.1 dB, so ±0.05 dB.
    assert abs(noise_gain_db(WANNAMAKER_9) - 18.4) <= 0.05


def test_wannamaker_is_minimum_phase():
    # REFERENCES.md §3 [C]: the filter (from memory) is minimum phase; so its
    # mean log |NTF|² is 0 dB (Gerzon & Craven 1989).
    assert is_minimum_phase(WANNAMAKER_9)
    assert np.abs(np.roots(ntf_taps(WANNAMAKER_9))).max() < 1.0  # numpy.roots as reference
    assert abs(gerzon_craven_mean_log_db(WANNAMAKER_9, 44100)) < 0.01


@pytest.mark.parametrize("seed", range(8))
@pytest.mark.parametrize("order", [1, 2, 5, 12])
def test_is_minimum_phase_agrees_with_numpy_roots(seed, order):
    # numpy.roots (companion-matrix eigenvalues) as reference. Roots are drawn
    # with moduli in 0.3..1.7, kept away from 1 so the reference is unambiguous.
    rng = np.random.default_rng(seed * 100 + order)
    zeros = []
    while len(zeros) < order:
        radius = rng.choice([rng.uniform(0.3, 0.95), rng.uniform(1.05, 1.7)])
        if order - len(zeros) >= 2 and rng.random() < 0.5:
            z = radius * np.exp(1j * rng.uniform(0.1, 3.0))
            zeros += [z, np.conj(z)]
        else:
            zeros.append(radius * rng.choice([-1.0, 1.0]))
    h = -np.real(np.poly(zeros))[1:]
    expected = bool(np.all(np.abs(np.roots(ntf_taps(h))) < 1.0))
    assert is_minimum_phase(h) == expected


# --- the solver --------------------------------------------------------------------


@pytest.mark.parametrize(
    ("ar", "order"),
    [([0.8], 1), ([0.8], 4), ([1.2, -0.6], 2), ([1.2, -0.6], 6), ([0.5, 0.2, -0.3], 5)],
)
def test_design_recovers_autoregressive_whitening_filter(ar, order):
    # Yule-Walker (Makhoul, "Linear prediction: a tutorial review", Proc. IEEE
    # 63(4), 1975): for a weight W² = 1/|A(e^jω)|² with A = 1 - Σ a_k z^-k of
    # order p, the optimal prediction-error filter of any order >= p is A, so
    # h = [a_1..a_p, 0, ...].
    points = 8192
    a_poly = np.r_[1.0, -np.asarray(ar)]
    w2 = 1.0 / np.abs(np.fft.rfft(a_poly, 2 * points)) ** 2
    h = design_from_weight(w2, order=order)
    expected = np.r_[ar, np.zeros(order - len(ar))]
    np.testing.assert_allclose(h, expected, atol=1e-6)


def test_design_solves_normal_equations_like_scipy():
    # scipy.linalg.solve_toeplitz as reference solver of R h = r[1:].
    x = np.linspace(0.0, 1.0, 4097)
    w2 = np.exp(-(((x - 0.3) / 0.1) ** 2)) + 0.05  # a smooth positive weight
    r = np.fft.irfft(w2)[:13]
    ref = linalg.solve_toeplitz(r[:12], r[1:13])
    np.testing.assert_allclose(design_from_weight(w2, order=12), ref, rtol=1e-6, atol=1e-8)


def test_gain_limit_is_active_and_met():
    # The limit Σ n_k² <= 10^(limit/10) is met with equality when the
    # unconstrained design exceeds it (Lagrange condition, active constraint).
    w = shaping._design_weight(44100.0, "threshold")
    free = design_from_weight(w, order=9)
    assert noise_gain_db(free) > 13.0
    limited = design_from_weight(w, order=9, limit_db=13.0)
    assert 13.0 - 1e-6 <= noise_gain_db(limited) <= 13.0


# --- goals ------------------------------------------------------------------------


def test_goal_hearing_design_beats_wannamaker_at_44k1():
    # GOAL: at 44.1 kHz the default design beats the Wannamaker (1992) 9-tap
    # filter (coefficients from memory) on threshold-weighted noise (Terhardt
    # 1979), ITU-R BS.468-4-weighted noise and total noise power, each by at
    # least 1 dB.
    fs = 44100
    h = design_hearing(fs)
    for weighting in ("threshold", "itu468"):
        ours = weighted_gain_db(h, fs, weighting)
        theirs = weighted_gain_db(WANNAMAKER_9, fs, weighting)
        assert ours <= theirs - 1.0, (weighting, ours, theirs)
    assert noise_gain_db(h) <= noise_gain_db(WANNAMAKER_9) - 1.0


def test_goal_hearing_design_at_96k():
    # GOAL: at 96 kHz, threshold-weighted noise at least 18 dB and RMS
    # 468-weighted noise at least 11 dB below flat TPDF.
    h = design_hearing(96000)
    assert weighted_gain_db(h, 96000, "threshold") <= -18.0
    assert weighted_gain_db(h, 96000, "itu468") <= -11.0


@pytest.mark.parametrize(("order", "limit"), [(9, DEFAULT_LIMIT_DB), (3, 6.0), (24, 20.0)])
@pytest.mark.parametrize("fs", DESIGN_RATES)
def test_goal_designs_are_minimum_phase_within_limit(fs, order, limit):
    # GOAL: Gerzon & Craven (1989): a minimum-phase NTF with leading tap 1 has a
    # mean log |NTF|² of 0 dB; every design must meet it within 0.01 dB, be
    # minimum phase, and keep its total gain within the limit.
    h = design_hearing(fs, order=order, limit_db=limit)
    assert h.shape == (order,)
    assert abs(gerzon_craven_mean_log_db(h, fs)) < 0.01
    assert is_minimum_phase(h)
    assert noise_gain_db(h) <= limit + 1e-9


@pytest.mark.parametrize("fs", [44100, 96000])
def test_hearing_design_does_better_than_flat_on_its_own_weighting(fs):
    # Common practice: shaping for a weighting lowers the noise so weighted,
    # but never beyond the Gerzon-Craven bound for that weighting.
    h = design_hearing(fs)
    gain = weighted_gain_db(h, fs, "threshold")
    assert -gerzon_craven_bound_db("threshold", fs) <= gain < 0.0


# --- cache and speed -------------------------------------------------------------------


def test_cache_returns_identical_read_only_arrays():
    a = design_hearing(44100, order=7)
    hits = shaping._design_cached.cache_info().hits
    b = design_hearing(44100.0, order=7)
    assert shaping._design_cached.cache_info().hits == hits + 1
    np.testing.assert_array_equal(a, b)
    assert a.dtype == np.float64 and not a.flags.writeable
    with pytest.raises(ValueError):
        a[0] = 0.0


def test_design_is_fast():
    # Brief: a design takes well under 0.1 s; 50 kHz is not used elsewhere, so
    # this call is not cached.
    t0 = time.perf_counter()
    design_hearing(50000, order=12)
    assert time.perf_counter() - t0 < 0.1


# --- figures -----------------------------------------------------------------------


def test_ntf_response_matches_scipy_freqz():
    # scipy.signal.freqz as reference for NTF(e^jω) = Σ n_k e^{-jωk}.
    fs = 44100.0
    f = np.linspace(0, fs / 2, 257)
    _, ref = signal.freqz(ntf_taps(WANNAMAKER_9), 1, worN=f, fs=fs)
    np.testing.assert_allclose(ntf_response(WANNAMAKER_9, f, fs), ref, rtol=1e-12, atol=1e-12)


def test_first_order():
    # NTF = 1 - z^-1: |NTF| = 0 at DC and 2 at Nyquist; Σn² = 2 (+3.01 dB),
    # REFERENCES.md §3 (output noise power (Δ²/4)·Σ n_k²).
    h = first_order()
    np.testing.assert_allclose(np.abs(ntf_response(h, [0.0, 24000.0], 48000.0)), [0.0, 2.0],
                               atol=1e-12)
    assert noise_gain(h) == 2.0
    assert abs(noise_gain_db(h) - 3.0103) < 1e-4


def test_describe_reports_consistent_figures():
    fs = 48000
    d = describe(WANNAMAKER_9, fs)
    json.dumps(d)  # plain Python types
    assert d["order"] == 9 and d["ntf"][0] == 1.0 and d["ntf"][1] == -2.412
    assert abs(d["noise_gain_db"] - 18.4) <= 0.05  # REFERENCES.md §3 [C]
    assert d["minimum_phase"] is True
    assert set(d["weighted_gain_db"]) == {"a", "itu468", "threshold"}
    assert abs(d["gerzon_craven_bound_db"]["a"] - 1.88) <= 0.01  # REFERENCES.md §3 [C]
    # No shaper beats the Gerzon-Craven bound (Gerzon & Craven 1989).
    for w, g in d["weighted_gain_db"].items():
        assert g >= -d["gerzon_craven_bound_db"][w]


def test_describe_of_no_shaping_is_neutral():
    # NTF = 1: unshaped noise, 0 dB everywhere by definition.
    d = describe([], 44100)
    assert d["noise_gain_db"] == 0.0
    assert all(abs(v) < 1e-12 for v in d["weighted_gain_db"].values())


def test_plot_ntf_writes_png(tmp_path):
    out = tmp_path / "ntf.png"
    plot_ntf(design_hearing(44100), 44100, out)
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)


def test_plot_ntf_to_missing_folder_fails_cleanly(tmp_path):
    with pytest.raises(OutputError, match="cannot write"):
        plot_ntf(first_order(), 44100, tmp_path / "nope" / "ntf.png")
    assert not (tmp_path / "nope").exists()


# --- coefficient input and output ---------------------------------------------------------


def test_parse_coefficients():
    h = parse_coefficients(" 2.412, -3.37 ,1e-1")
    np.testing.assert_array_equal(h, [2.412, -3.37, 0.1])
    assert all(isinstance(v, float) for v in h)


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("", "is empty"),
        ("   ", "is empty"),
        ("1,,2", "empty entry at position 2"),
        ("1,2,", "empty entry at position 3"),
        ("1, x", r"entry 2 \('x'\) is not a number"),
        ("1, nan", "give finite numbers"),
        ("inf", "give finite numbers"),
        (",".join(["0.1"] * (MAX_TAPS + 1)), "65 coefficients; give between 1 and 64"),
    ],
)
def test_parse_coefficients_errors(text, match):
    with pytest.raises(UsageError, match=match):
        parse_coefficients(text)


def test_parse_coefficients_wants_a_string():
    with pytest.raises(TypeError, match="str"):
        parse_coefficients([1.0, 2.0])


@pytest.mark.parametrize(
    "content", ["[1.5, -0.5]", '{"coefficients": [1.5, -0.5], "comment": "x"}']
)
def test_load_coefficients_list_and_object(tmp_path, content):
    p = tmp_path / "h.json"
    p.write_text(content)
    np.testing.assert_array_equal(load_coefficients(p), [1.5, -0.5])


@pytest.mark.parametrize(
    ("content", "error", "match"),
    [
        ("[1.5, ", InputError, "not valid JSON"),
        ('{"taps": [1]}', InputError, 'no "coefficients" entry'),
        ('"1.5"', InputError, "holds str where a list"),
        ('{"coefficients": 3}', InputError, "holds int where a list"),
        ("[]", UsageError, "0 coefficients"),
        ('[1, "2"]', UsageError, "coefficient 2 is '2', not a number"),
        ("[1, true]", UsageError, "coefficient 2 is True"),
        ("[1, NaN]", UsageError, "finite"),
    ],
)
def test_load_coefficients_errors(tmp_path, content, error, match):
    p = tmp_path / "h.json"
    p.write_text(content)
    with pytest.raises(error, match=match):
        load_coefficients(p)


def test_load_coefficients_missing_file(tmp_path):
    with pytest.raises(InputError, match="cannot read shaping file .*check the path"):
        load_coefficients(tmp_path / "absent.json")


def test_export_then_load_round_trip(tmp_path):
    p = tmp_path / "hearing44.json"
    h = design_hearing(44100)
    export_json(h, 44100, p, name="hearing", design={"order": 9, "limit_db": 13.0})
    doc = json.loads(p.read_text())
    assert doc["ntf"] == [1.0] + [-x for x in h.tolist()]
    assert doc["sample_rate"] == 44100.0
    np.testing.assert_array_equal(load_coefficients(p, sample_rate=44100), h)
    with pytest.raises(UsageError, match="made for 44100 Hz but the audio is 96000 Hz"):
        load_coefficients(p, sample_rate=96000)


def test_resolve_shaping(tmp_path):
    p = tmp_path / "mine.json"
    p.write_text("[0.5]")
    assert resolve_shaping("none", 44100)[0] == "none"
    assert resolve_shaping("none", 44100)[1].size == 0
    name, h = resolve_shaping("first-order", 44100)
    assert name == "first-order" and h.tolist() == [1.0]
    name, h = resolve_shaping("hearing", 48000, order=5, limit_db=9.0)
    assert name == "hearing"
    np.testing.assert_array_equal(h, design_hearing(48000, order=5, limit_db=9.0))
    assert resolve_shaping(str(p), 44100) == (str(p), pytest.approx([0.5]))
    name, h = resolve_shaping("1.0, -0.25", 44100)
    assert name == "custom" and h.tolist() == [1.0, -0.25]


@pytest.mark.parametrize(
    ("spec", "match"),
    [
        ("hearng", "shaping='hearng' is not known; use one of none, first-order, hearing"),
        ("1.0, x", "entry 2"),
    ],
)
def test_resolve_shaping_errors(spec, match):
    with pytest.raises(UsageError, match=match):
        resolve_shaping(spec, 44100)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"sample_rate": 7999}, "outside 8000..384000 Hz"),
        ({"sample_rate": 400000}, "outside 8000..384000 Hz"),
        ({"sample_rate": 44100, "order": 0}, "between 1 and 64"),
        ({"sample_rate": 44100, "limit_db": 0.0}, "above 0 and at most 30"),
        ({"sample_rate": 44100, "weighting": "b"}, "unknown weighting 'b'"),
    ],
)
def test_design_hearing_refuses_bad_parameters(kwargs, match):
    rate = kwargs.pop("sample_rate")
    with pytest.raises(UsageError, match=match):
        design_hearing(rate, **kwargs)
