"""requant audit: deliveries made by our own independent quantizer, identified from the error.

Every delivery here is made by :mod:`audit_fixtures` (numpy and plain Python
from the textbook definitions, not requant's kernel), from masters of 10 to
30 s, and the audit must find each key the issue names: offset exact, gain
within 0.01 dB (0.05 with clipping or an error that follows the signal),
``error_rms_dbfs`` within 0.1 dB of the test's own figure, NTF bands within
1.5 dB from 63 Hz to 16 kHz. Outside values and their sources:

* error powers per method, round Δ²/12, RPDF Δ²/6, TPDF Δ²/4, truncation
  adding (Δ/2)²: Lipshitz, Wannamaker & Vanderkooy, JAES 40(5), 1992
  (REFERENCES.md §1-2); the excess kurtosis of a sum of k uniforms, -6/(5k),
  and the supports ±Δ/2, ±Δ, ±3Δ/2 of the total error follow from the same
  densities (REFERENCES.md §9 [C]);
* Kolmogorov–Szegő (innovation variance = geometric mean of the spectrum) and
  Gerzon & Craven (mean log |NTF|² = 0 for a minimum-phase NTF with leading 1):
  REFERENCES.md §3 and §9; Jensen's formula for the non-minimum-phase case [C];
* Wannamaker's 9-tap shaper (1992), from memory (REFERENCES.md §3 [M]), and
  its total noise gain +18.4 dB [C];
* AES17: a full-scale sine reads 0 dBFS, and its 997 Hz test frequency.
"""

import json
import math

import numpy as np
import pytest
import soundfile as sf
from audit_fixtures import (
    NOTCH_2,
    WANNAMAKER_9,
    band_means_db,
    codes_for,
    programme,
    quantize,
    write_delivery,
)

from requant.audit import audit_pair, audit_tree, run_audit
from requant.audit.align import StreamCorrelator, word_length_of
from requant.audit.identify import innovation_variance
from requant.errors import InputError, UsageError

from helpers import run_cli

#: Error power per method in LSB², Lipshitz, Wannamaker & Vanderkooy (1992).
LWV_POWER = {"none": 1 / 12, "rpdf": 1 / 6, "tpdf": 1 / 4}


def dbfs(power_lsb2, bits):
    """AES17: a full-scale sine reads 0 dBFS, so a mean square P reads 10·log10(2P)."""
    return 10 * math.log10(2 * power_lsb2 / 4.0 ** (bits - 1))


@pytest.fixture(scope="module")
def master48(tmp_path_factory):
    """A 12-second 48 kHz stereo float master and its samples as read back."""
    path = tmp_path_factory.mktemp("m48") / "master.wav"
    x = programme(12, 48000, np.random.default_rng(101))
    sf.write(path, x.astype(np.float32), 48000, subtype="FLOAT")
    return path, x.astype(np.float32).astype(np.float64)


def deliver(tmp_path, master, bits, *, seed, subtype="PCM_16", offset=0, gain=1.0, **kw):
    """Our own delivery of ``master``; returns (path, codes, clipped, own error RMS dBFS)."""
    path, x = master
    q, clipped = quantize(x, bits, np.random.default_rng(seed), gain=gain, **kw)
    out = write_delivery(tmp_path / "delivery.wav", q, bits, 48000, subtype, offset=offset)
    scale = 2.0 ** (bits - 1)
    xs = x * gain * scale
    beyond = ((q == scale - 1) & (xs > scale - 1)) | ((q == -scale) & (xs < -scale))
    e = (q - xs)[~beyond]
    return out, q, beyond, dbfs(float(np.mean(e * e)), bits)


def check_common(r, *, bits, offset, gain_db, polarity, own_rms, gain_tol=0.01):
    assert r["word_length"] == bits
    a = r["alignment"]
    assert a["offset_frames"] == offset
    assert abs(a["gain_db"] - gain_db) <= gain_tol
    assert a["polarity"] == polarity
    assert abs(r["error_rms_dbfs"] - own_rms) <= 0.1


# ------------------------------------------------------------------------------------------
# pieces


def test_word_length_from_the_or_of_left_justified_codes():
    # two's complement, left-justified in 32 bits: a w-bit word leaves 32 - w low zeros
    assert word_length_of(np.int32(-(1 << 31))) == 1
    assert word_length_of((0x7FF << 20) | (1 << 20)) == 12
    assert word_length_of(np.bitwise_or.reduce(np.array([3, -5], np.int64) << 16)) == 16
    assert word_length_of(1) == 32
    assert word_length_of(0) is None


@pytest.mark.parametrize("seed, lag", [(1, 0), (2, 37), (3, -120), (4, 250)])
def test_streamed_correlation_equals_numpy_correlate(seed, lag):
    # numpy.correlate (full) is the reference; feeding in uneven pieces changes nothing
    rng = np.random.default_rng(seed)
    m = rng.standard_normal(3000)
    d = np.roll(m, lag) + 0.1 * rng.standard_normal(3000)
    K = 300
    corr = StreamCorrelator(K, chunk=256)
    cuts = np.sort(rng.integers(0, 3000, 12))
    for a, b in zip(np.r_[0, cuts], np.r_[cuts, 3000]):
        corr.feed(dm=m[a:b], dd=d[a:b])
    corr.end("m")
    corr.end("d")
    plain, phat = corr.finish()
    ref = np.correlate(d, m, mode="full")  # ref[k + len(m) - 1] = Σ d[n+k] m[n]
    want = ref[len(m) - 1 - K: len(m) + K]
    assert np.allclose(plain, want, atol=1e-8 * np.abs(want).max())
    assert int(np.argmax(np.abs(plain))) - K == lag
    assert int(np.argmax(np.abs(phat))) - K == lag


def test_residual_kernel_equals_its_plain_twin():
    from requant.dsp import native
    from requant.dsp.residual import residual_block_plain

    rng = np.random.default_rng(9)
    n, nch, win = 700, 3, 256
    m = rng.uniform(-1.2, 1.2, n * nch).astype(np.float32)
    codes = (np.clip(np.floor(m * 128 + 0.5), -128, 127).astype(np.int32) << 24)

    def args():
        return [m, codes, n, nch, 24, 128.0, 1 / 128, -128, 127, win,
                np.zeros(n * nch, np.float32), np.zeros(6 * nch * 3),
                np.array([0.0, np.inf, -np.inf] * nch)]

    a, b = args(), args()
    native.kernel("residual", m=np.float32)(*a)
    residual_block_plain(*b)
    for u, v in zip(a, b):
        if isinstance(u, np.ndarray):
            assert np.array_equal(u, v)
    # clipped by definition: a code at a rail with the master beyond it
    x = 128.0 * m.astype(np.float64)
    k = codes >> 24
    assert a[-1][0::3].sum() == np.count_nonzero(((k == 127) & (x > 127)) | ((k == -128)
                                                                            & (x < -128)))


@pytest.mark.parametrize("a", [0.5, -0.9, 1.6])
def test_innovation_variance_is_the_geometric_mean(a):
    # Kolmogorov–Szegő: the innovation variance of a process with spectrum σ²|1 - a e^-jω|² is
    # σ² when |a| < 1 (minimum phase, Gerzon–Craven mean log 0), σ²a² otherwise (Jensen) [C]
    w = np.linspace(0, np.pi, 20001)
    spectrum = 0.25 * np.abs(1 - a * np.exp(-1j * w)) ** 2
    want = 0.25 * max(1.0, a * a)
    assert innovation_variance(spectrum) == pytest.approx(want, rel=1e-3)


# ------------------------------------------------------------------------------------------
# the goals: every key right, from our own quantizer


CASES = {
    # name: (bits, container, offset, gain dB, polarity, quantizer, dither)
    "round": (16, "PCM_16", 437, 0.0, 1, "round", "none"),
    "truncate": (16, "PCM_16", -2950, 0.0, 1, "truncate", "none"),
    "rpdf": (16, "PCM_24", 1234, -0.37, -1, "round", "rpdf"),
    "tpdf": (16, "PCM_16", 0, -0.37, -1, "round", "tpdf"),
    "tpdf-truncate": (16, "PCM_16", 800, -6.0, 1, "truncate", "tpdf"),
    "few-bit rpdf": (6, "PCM_16", 300, -1.5, 1, "round", "rpdf"),
    "few-bit tpdf": (4, "PCM_16", -640, -3.0, -1, "round", "tpdf"),
    "12 in 16": (12, "PCM_16", 2500, 0.0, 1, "round", "tpdf"),
    "12 in 24": (12, "PCM_24", 1999, -0.5, 1, "round", "tpdf"),
    "20 in 24": (20, "PCM_24", -333, 0.0, 1, "round", "tpdf"),
}


@pytest.mark.slow
@pytest.mark.parametrize("name", list(CASES))
def test_own_quantizer_every_key_right(master48, tmp_path, name):
    bits, container, offset, gain_db, pol, quantizer, dith = CASES[name]
    gain = pol * 10 ** (gain_db / 20)
    path, q, clipped, own = deliver(tmp_path, master48, bits, seed=list(CASES).index(name),
                                    subtype=container, offset=offset, gain=gain,
                                    quantizer=quantizer, dither_kind=dith)
    r = audit_pair(master48[0], path)
    check_common(r, bits=bits, offset=offset, gain_db=gain_db, polarity=pol, own_rms=own)
    assert r["container_bits"] == int(container[4:])
    assert r["dither"] == dith
    assert r["quantizer"] == quantizer
    assert r["shaped"] is False
    assert r["clipped_samples"] == 0 == int(clipped.sum())
    assert r["signal_correlated"] is False
    # bias: truncation toward minus infinity adds -1/2 LSB (REFERENCES.md §1)
    assert r["bias_lsb"] == pytest.approx(-0.5 if quantizer == "truncate" else 0.0, abs=0.02)
    # the prediction is LWV's power (plus the truncation bias squared), in AES17 dBFS
    power = LWV_POWER[dith] + (0.25 if quantizer == "truncate" else 0.0)
    assert r["predicted"]["error_rms_dbfs"] == pytest.approx(dbfs(power, bits), abs=1e-9)
    assert abs(r["error_rms_dbfs"] - r["predicted"]["error_rms_dbfs"]) < 0.2
    # the distribution agrees: excess kurtosis -6/(5k) for k uniform terms
    k = {"none": 1, "rpdf": 2, "tpdf": 3}[dith]
    assert r["identification"]["excess_kurtosis"] == pytest.approx(-1.2 / k, abs=0.05)
    for band in r["ntf_db"]:
        if band["hz"] >= 63:
            assert abs(band["db"]) < 0.5  # flat: white error
    assert r["passed"] is (quantizer == "round" and dith == "tpdf" and pol == 1)
    assert isinstance(r["verdict"], str) and r["verdict"].startswith(f"{bits}-bit")


@pytest.mark.slow
def test_clipped_by_a_few_db(master48, tmp_path):
    # the master peaks at -1 dBFS; +4 dB drives it 3 dB past full scale
    gain_db = 4.0
    path, q, beyond, own = deliver(tmp_path, master48, 16, seed=5, gain=10 ** (gain_db / 20))
    r = audit_pair(master48[0], path)
    check_common(r, bits=16, offset=0, gain_db=gain_db, polarity=1, own_rms=own, gain_tol=0.05)
    assert int(beyond.sum()) > 1000
    # the count by the definition, from our own knowledge of the gain; samples
    # whose scaled master lies within the gain's tolerance of a rail may go either way
    assert abs(r["clipped_samples"] - int(beyond.sum())) <= 2
    assert r["dither"] == "tpdf" and r["shaped"] is False and r["quantizer"] == "round"
    assert r["passed"] is False
    assert any("clipped" in f for f in r["findings"])


@pytest.mark.slow
@pytest.mark.parametrize("h, rate, dith, quantizer", [
    (WANNAMAKER_9, 44100, "tpdf", "round"),
    (NOTCH_2, 48000, "rpdf", "truncate"),
])
def test_shaped_with_a_known_ntf(tmp_path, h, rate, dith, quantizer):
    x = programme(10, rate, np.random.default_rng(rate), peak_db=-6.0)
    mpath = tmp_path / "master44.wav" if rate == 44100 else tmp_path / "master.wav"
    sf.write(mpath, x.astype(np.float32), rate, subtype="FLOAT")
    x = x.astype(np.float32).astype(np.float64)
    q, _ = quantize(x, 16, np.random.default_rng(3), dither_kind=dith, h=h,
                    quantizer=quantizer, gain=10 ** (-0.2 / 20))
    path = write_delivery(tmp_path / "d.wav", q, 16, rate, "PCM_16", offset=-321)
    e = q - x * 10 ** (-0.2 / 20) * 32768
    r = audit_pair(mpath, path)
    check_common(r, bits=16, offset=-321, gain_db=-0.2, polarity=1,
                 own_rms=dbfs(float(np.mean(e * e)), 16))
    assert r["shaped"] is True and r["dither"] == dith and r["quantizer"] == quantizer
    want = band_means_db(h, rate)
    for band in r["ntf_db"]:
        if band["hz"] >= 63:
            assert abs(band["db"] - want[band["hz"]]) <= 1.5, band
    # the white error before shaping is the dither's power (Kolmogorov–Szegő, Gerzon–Craven)
    assert r["identification"]["innovation_variance_lsb2"] == pytest.approx(
        LWV_POWER[dith], rel=0.05)
    n = np.concatenate(([1.0], -np.asarray(h)))
    assert r["ntf"]["noise_gain_db"] == pytest.approx(10 * math.log10(n @ n), abs=0.3)
    fitted = np.asarray(r["ntf"]["coefficients"])
    assert np.allclose(fitted[:len(h)], h, atol=0.05) and np.all(np.abs(fitted[len(h):]) < 0.05)
    assert r["ntf"]["gerzon_craven_mean_log_db"] == pytest.approx(0.0, abs=0.05)


@pytest.mark.slow
@pytest.mark.parametrize("dith", ["none", "tpdf"])
def test_quiet_tone_follows_the_signal_only_without_dither(tmp_path, dith):
    # AES17's 997 Hz at -60 dBFS, faded in over 0.5 s so that the alignment has one answer
    rate = 48000
    t = np.arange(10 * rate) / rate
    tone = 10 ** (-60 / 20) * np.sin(2 * np.pi * 997 * t) * np.minimum(1.0, t / 0.5)
    x = np.stack([tone, 0.9 * tone], axis=1).astype(np.float32)
    sf.write(tmp_path / "tone.wav", x, rate, subtype="FLOAT")
    q, _ = quantize(x.astype(np.float64), 16, np.random.default_rng(4), dither_kind=dith)
    path = write_delivery(tmp_path / "d.wav", q, 16, rate, "PCM_16")
    e = q - x * 32768.0
    r = audit_pair(tmp_path / "tone.wav", path)
    check_common(r, bits=16, offset=0, gain_db=0.0, polarity=1,
                 own_rms=dbfs(float(np.mean(e * e)), 16), gain_tol=0.05)
    assert r["dither"] == dith
    assert r["signal_correlated"] is (dith == "none")
    assert r["shaped"] is False  # a line spectrum is not a noise transfer function
    if dith == "none":
        assert "follows the signal" in r["verdict"] and not r["passed"]
    else:
        assert r["passed"]


@pytest.mark.slow
def test_where_the_error_follows_the_signal_is_the_fade(tmp_path):
    # 8 s of programme, then a fade of 100 dB over 4 s: rounded without dither, the error
    # follows the signal in the fade, and not before it
    rate = 48000
    x = programme(12, rate, np.random.default_rng(12))
    t = np.arange(x.shape[0]) / rate
    x *= np.where(t < 8.0, 1.0, 10 ** (-100 * (t - 8.0) / 4.0 / 20))[:, None]
    x = x.astype(np.float32)
    sf.write(tmp_path / "fade.wav", x, rate, subtype="FLOAT")
    q, _ = quantize(x.astype(np.float64), 16, np.random.default_rng(2), dither_kind="none")
    r = audit_pair(tmp_path / "fade.wav", write_delivery(tmp_path / "d.wav", q, 16, rate,
                                                          "PCM_16", offset=480))
    assert r["signal_correlated"] is True and r["dither"] == "none"
    passages = r["signal_correlated_at"]
    assert passages and all(p["start_s"] >= 8.0 for p in passages)
    assert "error follows the signal from" in r["verdict"]


REQUANT_METHODS = [
    ("round", "none", "none"), ("truncate", "none", "none"), ("round", "rpdf", "none"),
    ("round", "tpdf", "none"), ("truncate", "tpdf", "none"), ("round", "tpdf-hp", "none"),
    ("round", "tpdf", "hearing"), ("round", "tpdf", "first-order"),
    ("truncate", "tpdf", "hearing"),
]


@pytest.fixture(scope="module")
def master_pcm(tmp_path_factory):
    path = tmp_path_factory.mktemp("mpcm") / "master.wav"
    sf.write(path, programme(10, 48000, np.random.default_rng(77)), 48000, subtype="PCM_24")
    return path


@pytest.mark.slow
@pytest.mark.parametrize("quantizer, dith, shaping", REQUANT_METHODS)
def test_audit_identifies_requants_own_settings(master_pcm, tmp_path, quantizer, dith, shaping):
    from requant import Recipe, convert_file
    from requant.dsp.shaping import coefficients_for, describe

    recipe = Recipe(bits=16, quantizer=quantizer, dither=dith, shaping=shaping, seed=11)
    out = tmp_path / "d.flac"
    convert_file(master_pcm, out, recipe)
    r = audit_pair(master_pcm, out)
    assert r["word_length"] == 16 and r["alignment"]["offset_frames"] == 0
    assert abs(r["alignment"]["gain_db"]) < 0.01
    assert r["dither"] == dith
    assert r["shaped"] is (shaping != "none")
    # first-order shaping (NTF 1 - z^-1) removes DC: the bias cannot tell the quantizers
    assert r["quantizer"] == (None if shaping == "first-order" else quantizer)
    if shaping != "none":
        h = coefficients_for(recipe.shaping, 48000)
        want = band_means_db(h, 48000)
        for band in r["ntf_db"]:
            if band["hz"] >= 63:
                assert abs(band["db"] - want[band["hz"]]) <= 1.5, band
        # the estimated NTF's weighted gains, as `requant shaper show` computes them
        shown = describe(h, 48000)["weighted_gain_db"]
        for key, value in r["ntf"]["weighted_gain_db"].items():
            assert value == pytest.approx(shown[key], abs=0.5), key


# ------------------------------------------------------------------------------------------
# bad input, outputs, trees


@pytest.mark.parametrize("what", ["rate", "channels"])
def test_a_different_rate_or_channel_count_is_one_line(tmp_path, what):
    x = programme(1, 48000, np.random.default_rng(1))
    sf.write(tmp_path / "m.wav", x, 48000, subtype="PCM_24")
    other = (x[:, :1], 48000) if what == "channels" else (x, 44100)
    sf.write(tmp_path / "d.wav", other[0], other[1], subtype="PCM_16")
    code, out, err = run_cli("audit", tmp_path / "m.wav", tmp_path / "d.wav")
    assert code == 2 and out == ""
    assert err.count("\n") == 1 and "Traceback" not in err
    assert ("44100 Hz" in err) if what == "rate" else ("channel" in err)


def test_bad_calls_raise_one_sentence(tmp_path):
    x = programme(1, 48000, np.random.default_rng(2))
    sf.write(tmp_path / "m.wav", x, 48000, subtype="PCM_24")
    sf.write(tmp_path / "silent.wav", np.zeros((48000, 2)), 48000, subtype="PCM_16")
    with pytest.raises(InputError, match="digital silence"):
        run_audit(tmp_path / "m.wav", tmp_path / "silent.wav")
    with pytest.raises(UsageError, match=r"\.html or \.md"):
        audit_pair(tmp_path / "m.wav", tmp_path / "m.wav", report_paths=["x.pdf"])
    with pytest.raises(UsageError, match="max_shift_s"):
        run_audit(tmp_path / "m.wav", tmp_path / "silent.wav", max_shift_s=0)
    noise = np.random.default_rng(3).standard_normal((48000, 2)) * 0.1
    sf.write(tmp_path / "other.wav", noise, 48000, subtype="PCM_16")
    with pytest.raises(InputError, match="does not follow the master"):
        run_audit(tmp_path / "m.wav", tmp_path / "other.wav")


@pytest.mark.slow
def test_report_escapes_names_and_writes_json_html_markdown(master48, tmp_path):
    path, *_ = deliver(tmp_path, master48, 16, seed=8, offset=50)
    odd = tmp_path / "a<b>&'x'.wav"
    path.rename(odd)
    j, h, md = tmp_path / "r.json", tmp_path / "r.html", tmp_path / "r.md"
    r = audit_pair(master48[0], odd, json_path=j, report_paths=[h, md])
    data = json.loads(j.read_text())
    for key in ("word_length", "dither", "shaped", "bias_lsb", "ntf_db", "signal_correlated",
                "clipped_samples", "error_rms_dbfs", "predicted", "verdict", "findings"):
        assert key in data
    for key in ("offset_frames", "gain_db", "polarity"):
        assert key in data["alignment"]
    assert data["verdict"] == r["verdict"]
    page = h.read_text()
    assert "a&lt;b&gt;&amp;" in page and "a<b>" not in page
    assert page.count("data:image/png;base64,") == 3 and "<script" not in page
    text = md.read_text()
    assert "`a<b>&'x'.wav`" in text
    for suffix in ("_error_spectrum.png", "_error_histogram.png", "_alignment.png"):
        assert (tmp_path / f"r{suffix}").stat().st_size > 1000
    with pytest.raises(Exception, match="already exists"):
        audit_pair(master48[0], odd, json_path=j)


@pytest.fixture
def trees(tmp_path):
    rng = np.random.default_rng(21)
    mdir, ddir = tmp_path / "masters", tmp_path / "deliveries"
    for rel, seconds in (("a.wav", 3), ("bank/b.wav", 2), ("bank/c.wav", 2), ("lonely.wav", 1)):
        (mdir / rel).parent.mkdir(parents=True, exist_ok=True)
        sf.write(mdir / rel, programme(seconds, 48000, rng).astype(np.float32), 48000,
                 subtype="FLOAT")
    for rel, fmt in (("a.flac", "FLAC"), ("bank/b.wav", "WAV")):
        x = sf.read(mdir / (rel.rsplit(".", 1)[0] + ".wav"), dtype="float64")[0]
        q, _ = quantize(x, 16, rng)
        (ddir / rel).parent.mkdir(parents=True, exist_ok=True)
        sf.write(ddir / rel, codes_for(q, 16), 48000, subtype="PCM_16", format=fmt)
    (ddir / "bank/c.wav").write_bytes(b"RIFF\x10\x00\x00\x00WAVEjunk")  # broken
    sf.write(ddir / "extra.wav", np.zeros((100, 2), np.int16), 48000, subtype="PCM_16")
    return mdir, ddir


@pytest.mark.slow
def test_tree_pairs_by_relative_path_with_broken_and_unmatched_rows(trees, tmp_path):
    mdir, ddir = trees
    out = audit_tree(mdir, ddir, json_path=tmp_path / "rows.json", jobs=2)
    rows = {(r["master"], r["delivered"]): r for r in json.loads((tmp_path / "rows.json")
                                                                 .read_text())}
    assert out["counts"] == {"passed": 2, "findings": 0, "failed": 1, "unmatched": 2,
                             "pairs": 3}
    assert rows[("a.wav", "a.flac")]["status"] == "passed"
    assert rows[("a.wav", "a.flac")]["dither"] == "tpdf"
    assert rows[("bank/b.wav", "bank/b.wav")]["word_length"] == 16
    broken = rows[("bank/c.wav", "bank/c.wav")]
    assert broken["status"] == "failed" and "not an audio file" in broken["error"]
    assert rows[("lonely.wav", None)]["status"] == "unmatched"
    assert rows[(None, "extra.wav")]["status"] == "unmatched"
    code, stdout, err = run_cli("audit", mdir, ddir, "--jobs", 1, "--json",
                                tmp_path / "cli.json")
    assert code == 1  # a pair failed, the rest went on
    assert "pairs 3: passed 2, with findings 0, failed 1; unmatched files 2" in stdout
    assert "failed: bank/c.wav" in err
    cli_rows = json.loads((tmp_path / "cli.json").read_text())
    assert [(r["master"], r["delivered"], r["status"]) for r in cli_rows] == [
        (r["master"], r["delivered"], r["status"]) for r in json.loads(
            (tmp_path / "rows.json").read_text())]
    code, _, err = run_cli("audit", mdir, ddir, "--report", tmp_path / "x.html")
    assert code == 2 and "--report" in err


@pytest.mark.slow
def test_a_dither_of_no_model_is_unknown(master48, tmp_path):
    # Gaussian dither of σ = 1/2 LSB: total power 1/12 + 1/4 = 1/3 LSB², 1.25 dB from TPDF's
    # 1/4 and further from the others (LWV 1992), with a Gaussian's excess kurtosis near 0
    path, x = master48
    v = x * 32768.0
    q = np.floor(v + 0.5 + 0.5 * np.random.default_rng(6).standard_normal(v.shape))
    out = write_delivery(tmp_path / "g.wav", q, 16, 48000, "PCM_16")
    r = audit_pair(path, out)
    assert r["dither"] == "unknown" and r["predicted"]["error_rms_dbfs"] is None
    assert r["identification"]["innovation_variance_lsb2"] == pytest.approx(1 / 3, rel=0.03)
    assert not r["passed"] and any("no requantization model" in f for f in r["findings"])


def test_loudness_of_master_and_delivery(master48, tmp_path):
    # ITU-R BS.1770-4 (REFERENCES.md §7): the delivery is gain x master + error, so a -6.02 dB
    # delivery reads 6.02 LU below its master (the error, 16-bit TPDF, moves it by far less
    # than 0.01 LU), and each reads as the array function (dsp/loudness.py, checked against
    # pyloudnorm in test_loudness.py) reads the samples, within the meter's 0.01 LU bins.
    from requant.dsp.loudness import integrated_loudness

    path, q, _, _ = deliver(tmp_path, master48, 16, seed=5, gain=0.5)
    r = audit_pair(master48[0], path)
    loud = r["loudness"]
    assert list(loud) == ["master_integrated_lufs", "delivered_integrated_lufs",
                          "master_range_lu", "delivered_range_lu", "channel_layout"]
    assert loud["master_integrated_lufs"] == pytest.approx(
        integrated_loudness(master48[1], 48000), abs=0.01)
    assert loud["delivered_integrated_lufs"] == pytest.approx(
        integrated_loudness(q / 2.0**15, 48000), abs=0.01)
    assert loud["master_integrated_lufs"] - loud["delivered_integrated_lufs"] == pytest.approx(
        20 * math.log10(2), abs=0.01)
    assert loud["master_range_lu"] == pytest.approx(loud["delivered_range_lu"], abs=0.02)
