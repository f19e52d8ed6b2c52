"""Listening kit and scoring: renders, level matching, the -6 dBFS cap, fades,
the quiet-passage finder, method parsing, the page's escaping, and the
binomial p-value against scipy.stats.binomtest."""

import html
import html.parser
import json
import math
import os
import re

import numpy as np
import pytest
import soundfile as sf

from requant.errors import InputError, OutputError, UsageError
from requant.listening import (
    CAP_DBFS,
    ERROR_TARGET_DBFS,
    Excerpt,
    find_quiet_passage,
    level_match,
    make_listening_kit,
    parse_method,
    parse_methods,
)
from requant.listening.levels import plan_levels
from requant.listening.methods import plan_methods
from requant.listening.score import guessing_p_value, read_seed, score_results
from requant.recipe import Recipe

from helpers import played_level, run_cli

FS = 48000
ALL_METHODS = ["truncate", "round", "rpdf", "tpdf", "tpdf-hp", "tpdf+hearing", "tpdf+first-order"]

# Textbook error power per sample, LSB² (REFERENCES.md §1-§3: Bennett 1948, Widrow & Kollár
# 2008, Lipshitz, Wannamaker & Vanderkooy 1992): round Δ²/12, truncate Δ²/3, RPDF Δ²/6,
# TPDF Δ²/4, times Σ n_k² when shaped (Zölzer ch. 2.3).
TEXTBOOK_POWER = {("round", "none"): 1 / 12, ("truncate", "none"): 1 / 3,
                  ("round", "rpdf"): 1 / 6, ("round", "tpdf"): 1 / 4, ("round", "tpdf-hp"): 1 / 4}




def tones(seconds, *, level_db=-12.0, channels=2, seed=1):
    """A few seeded sines at ``level_db`` dBFS peak-ish, stereo."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(round(seconds * FS))) / FS
    x = np.zeros((t.size, channels))
    for c in range(channels):
        for f in (221.0, 997.0, 3150.0):
            x[:, c] += np.sin(2 * np.pi * f * t + rng.uniform(0, 2 * np.pi))
    return x / np.max(np.abs(x)) * 10 ** (level_db / 20)


def fade_source(*, steady=1.0, fade=1.0, silence=0.3, top_db=-12.0, bottom_db=-150.0,
                freq=997.0):
    """A sine held at ``top_db`` dBFS, faded linearly in dB to ``bottom_db``, then digital
    silence. Returns (signal (frames, 1), function level_db(t))."""
    n = int(round((steady + fade + silence) * FS))
    t = np.arange(n) / FS
    level = np.where(t < steady, top_db,
                     top_db + (bottom_db - top_db) * (t - steady) / fade)
    amp = 10 ** (level / 20)
    x = amp * np.sin(2 * np.pi * freq * t)
    x[t >= steady + fade] = 0.0

    def level_at(tt):
        return top_db + (bottom_db - top_db) * (tt - steady) / fade

    return x[:, None], level_at


def sin2_fade(frames, fade_frames):
    """Raised-cosine fade written out independently: sin²(π(n+½)/(2L)) in, mirrored out."""
    w = np.ones(frames)
    n = np.arange(fade_frames)
    ramp = np.sin(np.pi * (n + 0.5) / (2 * fade_frames)) ** 2
    w[:fade_frames] = ramp
    w[frames - fade_frames:] = ramp[::-1]
    return w


def read(path):
    return sf.read(path, dtype="float64", always_2d=True)[0]


def peak_dbfs(x):
    p = float(np.max(np.abs(x)))
    return -math.inf if p == 0 else 20 * math.log10(p)


@pytest.fixture(scope="module")
def kit16(tmp_path_factory):
    """Every listed method at 16 bits, with a quiet passage, on tones that fade out."""
    d = tmp_path_factory.mktemp("kit16")
    steady = tones(1.0)
    fade, _ = fade_source(steady=0.0, fade=1.2, silence=0.3, top_db=-12.0)
    src = d / "source.wav"
    sf.write(src, np.concatenate([steady, np.repeat(fade, 2, axis=1)]), FS, subtype="FLOAT")
    out = d / "kit"
    kit = make_listening_kit(src, out, recipe=Recipe(bits=16, seed=11), quiet=0.5,
                             methods=ALL_METHODS)
    return src, out, kit


# ---------------------------------------------------------------------------
# renders


def test_renders_exist_for_every_method(kit16):
    src, out, kit = kit16
    assert [m["method"] for m in kit["methods"]] == ALL_METHODS
    assert json.loads((out / "figures.json").read_text()) == kit
    frames = kit["excerpt"]["frames"]
    assert frames == sf.info(src).frames  # shorter than the default excerpt: all of it
    for m in kit["methods"]:
        prog, err, quiet = (sf.info(out / m["file"]), sf.info(out / m["error_file"]),
                            sf.info(out / m["quiet"]["file"]))
        assert prog.subtype == "PCM_16" and err.subtype == "FLOAT" and quiet.subtype == "FLOAT"
        assert prog.samplerate == err.samplerate == FS
        assert prog.frames == err.frames == frames and prog.channels == 2
        for key in ("snr_db", "a_weighted_noise_dbfs", "itu468_noise_dbfs",
                    "correlated_error_fraction", "signal_correlated", "warnings"):
            assert key in m["figures"]
    assert (out / "index.html").is_file() and (out / "original.wav").is_file()
    assert not [p for p in os.listdir(out) if p.endswith(".requant-part")]


def test_program_renders_hold_exactly_the_requantized_codes(kit16):
    from requant.dsp.quantizer import requantize

    _, out, kit = kit16
    x = read(out / "original.wav")
    for m in kit["methods"]:
        y = read(out / m["file"])
        k = y * 2.0**15
        assert np.array_equal(k, np.round(k))  # on the 16-bit grid
        again = requantize(x, bits=16, quantizer=m["quantizer"], dither=m["dither"],
                           coeffs=m["coefficients"], seed=kit["seed"],
                           silence_frames=kit["silence"]["min_frames"])
        assert np.array_equal(y, again)
    # the source ends in 0.3 s of digital silence: kept silent in every render (20 ms)
    assert kit["silence"] == {"mode": "keep", "min_ms": 20.0, "min_frames": FS // 50}
    tail = int(0.25 * FS)
    assert not any(read(out / m["file"])[-tail:].any() for m in kit["methods"])


def test_renders_differ_only_by_their_error(kit16):
    _, out, kit = kit16
    x = read(out / "original.wav")
    delta = 2.0**-15
    assert kit["consistency"]["held"] is True
    for m in kit["methods"]:
        y = read(out / m["file"])
        n = np.concatenate(([1.0], -np.asarray(m["coefficients"])))
        power = TEXTBOOK_POWER[(m["quantizer"], m["dither"])]
        if n.size > 1:  # shaped: TPDF power times the NTF's sum of squares (Zölzer ch. 2.3)
            power *= float(np.sum(n * n))
        # y = x + ε with no gain: by Minkowski |RMS(y) - RMS(x)| <= RMS(ε) ≈ √power·Δ
        diff = abs(math.sqrt(np.mean(y**2)) - math.sqrt(np.mean(x**2)))
        assert diff <= 2 * math.sqrt(power) * delta, m["method"]
        assert m["level"]["consistent"] is True
        assert abs(m["level"]["difference_db"]) <= m["level"]["tolerance_db"]


@pytest.mark.parametrize("gain_db", [0.1, -0.1, 0.01])
def test_level_match_catches_a_gain_change(gain_db):
    x = tones(0.5)
    y = np.round(x * 10 ** (gain_db / 20) * 2**15) / 2**15
    res = level_match(x, y, bits=16, predicted_power_lsb2=0.25)
    assert res["consistent"] is False
    assert res["difference_db"] == pytest.approx(gain_db, abs=1e-3)


def test_error_renders_raised_by_stated_gain_and_faded(kit16):
    _, out, kit = kit16
    # Plain rounding noise at N bits: 6.0206·N + 1.7609 dB below a full-scale sine
    # (REFERENCES.md §1, 98.09 dB at 16 bits); the gain puts it at ERROR_TARGET_DBFS.
    expected_gain_db = ERROR_TARGET_DBFS + (6.0206 * 16 + 1.7609)
    assert kit["error_gain"]["gain_db"] == pytest.approx(expected_gain_db, abs=0.01)
    g = 10 ** (kit["error_gain"]["gain_db"] / 20)
    x = read(out / "original.wav")
    L = kit["excerpt"]["fade_frames"]
    w = sin2_fade(x.shape[0], L)[:, None]
    for m in kit["methods"]:
        e = read(out / m["error_file"])
        want = (read(out / m["file"]) - x) * w * g
        free = np.abs(want) < 10 ** (CAP_DBFS / 20)
        np.testing.assert_allclose(e[free], want[free], rtol=2e-7, atol=1e-12)
        assert peak_dbfs(e) <= CAP_DBFS


@pytest.mark.parametrize("bits", [1, 2])
@pytest.mark.parametrize("method", ["truncate", "round", "tpdf", "tpdf+hearing"])
def test_no_error_render_exceeds_cap_at_few_bits(tmp_path, bits, method):
    t = np.arange(int(0.6 * FS)) / FS
    loud = 0.999 * np.sign(np.sin(2 * np.pi * 110 * t)) * np.abs(np.sin(2 * np.pi * 55 * t)) ** 0.1
    src = tmp_path / "loud.wav"
    sf.write(src, loud, FS, subtype="FLOAT")
    kit = make_listening_kit(src, tmp_path / "k", recipe=Recipe(bits=bits, seed=3), quiet=0.5,
                             methods=[method])
    m = kit["methods"][0]
    for name in (m["error_file"], m["quiet"]["file"], "original_quiet.wav"):
        e = read(tmp_path / "k" / name)
        # the numbers on disk, not the figures: peak <= -6 dBFS
        assert peak_dbfs(e) <= CAP_DBFS, name
    assert m["error_render"]["peak_dbfs"] <= CAP_DBFS


@pytest.mark.parametrize("bits", [1, 8, 16])
def test_cap_engages_on_clipped_source(tmp_path, bits):
    # A float source 3.5 dB over full scale: the requantizer clips, the error holds the
    # clipped-off peaks, and raised by the stated gain they would exceed the cap at 8 and
    # 16 bits. The limiter must act, and say so; at 1 bit the gain is negative (-32 dB).
    t = np.arange(int(0.6 * FS)) / FS
    src = tmp_path / "loud.wav"
    sf.write(src, 1.5 * np.sin(2 * np.pi * 440 * t), FS, subtype="FLOAT")
    kit = make_listening_kit(src, tmp_path / "k", recipe=Recipe(bits=bits, seed=4),
                             methods=["tpdf"])
    m = kit["methods"][0]
    e = read(tmp_path / "k" / m["error_file"])
    assert peak_dbfs(e) <= CAP_DBFS
    if bits == 1:
        assert m["error_render"]["limited_samples"] == 0 and kit["error_gain"]["gain_db"] < 0
        return
    assert m["level"]["consistent"] is False  # clipping: the error is far above its prediction
    assert m["error_render"]["limited_samples"] > 0
    assert peak_dbfs(e) == pytest.approx(CAP_DBFS, abs=1e-6) and peak_dbfs(e) <= CAP_DBFS


def test_fades_identical_across_renders(kit16):
    src, out, kit = kit16
    raw = read(src)[: kit["excerpt"]["frames"]]
    L = kit["excerpt"]["fade_frames"]
    assert L == round(0.05 * FS)
    w = sin2_fade(raw.shape[0], L)[:, None]
    x = read(out / "original.wav")
    assert np.array_equal(x, (raw * w).astype(np.float32).astype(np.float64))
    delta = 2.0**-15
    for m in kit["methods"]:
        y = read(out / m["file"])
        n = np.concatenate(([1.0], -np.asarray(m["coefficients"])))
        # |ε| <= Σ|n_k| · 2 LSB (error feedback of errors bounded by 2 LSB, truncate+TPDF)
        bound = float(np.sum(np.abs(n))) * 2 * delta
        for part in (slice(0, L), slice(-L, None), slice(None)):
            assert np.max(np.abs(y[part] - x[part])) <= bound, (m["method"], part)


# ---------------------------------------------------------------------------
# quiet passage


@pytest.mark.parametrize("floor_dbfs", [-118.09, -70.0, -40.0])
def test_quiet_passage_finder_finds_the_fade_tail(floor_dbfs):
    x, level_at = fade_source(steady=1.0, fade=6.0, silence=1.0)
    found = find_quiet_passage(x, FS, seconds=1.0, floor_dbfs=floor_dbfs)
    assert found is not None
    start, frames = found
    # the fade crosses the floor where top + (bottom - top)(t - 1)/6 = floor
    t_cross = 1.0 + 6.0 * (-12.0 - floor_dbfs) / (150.0 - 12.0)
    end = (start + frames) / FS
    assert abs(end - t_cross) <= 0.15
    assert frames == FS  # one second
    assert level_at(start / FS) < -12.0  # inside the fade, not the steady part


def test_quiet_passage_prefers_a_quiet_interlude():
    loud = tones(1.0, level_db=-6.0, channels=1)
    quiet = tones(1.0, level_db=-60.0, channels=1, seed=2)
    x = np.concatenate([loud, quiet, loud])
    start, frames = find_quiet_passage(x, FS, seconds=0.8, floor_dbfs=-100.0)
    assert FS <= start and start + frames <= 2 * FS


def test_quiet_passage_none_for_silence():
    assert find_quiet_passage(np.zeros((FS, 2)), FS, seconds=0.5, floor_dbfs=-100.0) is None


def test_quiet_passage_in_kit_is_raised_after_requantization(tmp_path):
    x, level_at = fade_source(steady=1.0, fade=2.0, silence=0.5, top_db=-20.0)
    src = tmp_path / "fade.wav"
    sf.write(src, x, FS, subtype="FLOAT")
    kit = make_listening_kit(src, tmp_path / "k", recipe=Recipe(bits=12, seed=8), quiet=0.5,
                             methods=["truncate", "tpdf"])
    q = kit["quiet_passage"]
    assert q["found"]
    # the silence floor sits 20 dB below 12-bit rounding noise: 6.0206·12 + 1.7609 dB below
    # full scale (REFERENCES.md §1), and the stretch ends where the fade reaches it
    floor = -(6.0206 * 12 + 1.7609) - 20
    assert q["silence_floor_dbfs"] == pytest.approx(floor, abs=0.01)
    t_cross = 1.0 + 2.0 * (-20.0 - floor) / (150.0 - 20.0)
    assert abs(q["start_s"] + q["duration_s"] - t_cross) <= 0.15
    # the original's loudest 0.1 s is raised to -24 dBFS RMS (QUIET_TARGET_DBFS)
    assert q["gain_db"] == pytest.approx(-24.0 - q["loudest_chunk_dbfs"], abs=1e-9)
    g = 10 ** (q["gain_db"] / 20)
    s0, n = q["start_frame"], q["frames"]
    L = kit["excerpt"]["fade_frames"]
    w = sin2_fade(n, L)[:, None]
    faded = (x[s0:s0 + n] * w).astype(np.float32).astype(np.float64)
    orig_q = read(tmp_path / "k" / "original_quiet.wav")
    np.testing.assert_allclose(orig_q, np.clip(faded * g, -0.5, 0.5), rtol=2e-7, atol=1e-12)
    for m in kit["methods"]:
        qr = read(tmp_path / "k" / m["quiet"]["file"])
        gk = 10 ** (m["quiet"]["gain_db"] / 20)
        k = qr / gk * 2.0**11  # raised after requantizing: the 12-bit grid times its gain
        assert np.max(np.abs(k - np.round(k))) < 1e-3
        assert peak_dbfs(qr) <= CAP_DBFS


# ---------------------------------------------------------------------------
# methods


@pytest.mark.parametrize("text, expected", [
    ("truncate", ("truncate", "none", "none")),
    ("round", ("round", "none", "none")),
    ("rpdf", ("round", "rpdf", "none")),
    ("tpdf", ("round", "tpdf", "none")),
    ("tpdf-hp", ("round", "tpdf-hp", "none")),
    ("tpdf+hearing", ("round", "tpdf", "hearing")),
    ("tpdf+first-order", ("round", "tpdf", "first-order")),
    ("round+first-order", ("round", "none", "first-order")),
    (" TPDF+Hearing ", ("round", "tpdf", "hearing")),
])
def test_method_parsing(text, expected):
    m = parse_method(text)
    assert (m.quantizer, m.dither, m.shaping) == expected
    assert "+" not in m.slug and "/" not in m.slug


@pytest.mark.parametrize("text", ["", "gauss", "tpdf+", "+hearing", "round+tpdf",
                                  "tpdf+wannamaker", "tpdf++hearing", "tpdf hearing",
                                  "none", "tpdf+hearing+first-order"])
def test_method_parsing_errors_list_allowed_forms(text):
    with pytest.raises(UsageError, match=r"unknown method .*truncate, round, rpdf, tpdf or "
                                         r"tpdf-hp, optionally followed by \+first-order or "
                                         r"\+hearing"):
        parse_method(text)


def test_methods_repeated_or_empty():
    with pytest.raises(UsageError, match="given twice"):
        parse_methods(["tpdf", "TPDF"])
    with pytest.raises(UsageError, match="no method given"):
        parse_methods([])
    with pytest.raises(TypeError, match="must be a str"):
        parse_method(3)


def test_cli_bad_method_is_one_line(tmp_path):
    src = tmp_path / "in.wav"
    sf.write(src, tones(0.6), FS, subtype="FLOAT")
    code, out, err = run_cli("listen", src, tmp_path / "kit", "--method", "gauss")
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and "unknown method 'gauss'" in lines[0]
    assert "Traceback" not in err and not (tmp_path / "kit").exists()


# ---------------------------------------------------------------------------
# excerpt, outputs, CLI


def test_excerpt_start_and_duration(tmp_path):
    x = tones(2.0)
    src = tmp_path / "in.wav"
    sf.write(src, x, FS, subtype="FLOAT")
    kit = make_listening_kit(src, tmp_path / "k", recipe=Recipe(bits=8, seed=1),
                             excerpt=Excerpt(start_s=0.5, duration_s=0.75), methods=["tpdf"])
    assert kit["excerpt"]["start_frame"] == 24000 and kit["excerpt"]["frames"] == 36000
    got = read(tmp_path / "k" / "original.wav")
    w = sin2_fade(36000, kit["excerpt"]["fade_frames"])[:, None]
    x = read(src)  # as stored (float32)
    assert np.array_equal(got, (x[24000:60000] * w).astype(np.float32).astype(np.float64))
    with pytest.raises(UsageError, match="past the end"):
        make_listening_kit(src, tmp_path / "k2", excerpt=Excerpt(start_s=5.0), methods=["tpdf"])
    with pytest.raises(UsageError, match="at least 0.5 s"):
        make_listening_kit(src, tmp_path / "k3", excerpt=Excerpt(start_s=1.8), methods=["tpdf"])
    with pytest.raises(UsageError, match="duration=0.1"):
        make_listening_kit(src, tmp_path / "k4", excerpt=Excerpt(duration_s=0.1), methods=["tpdf"])


def test_existing_kit_needs_overwrite_and_input_is_never_replaced(tmp_path):
    src = tmp_path / "in.wav"
    sf.write(src, tones(0.6), FS, subtype="FLOAT")
    make_listening_kit(src, tmp_path / "k", recipe=Recipe(seed=1), methods=["tpdf"])
    with pytest.raises(OutputError, match="--overwrite"):
        make_listening_kit(src, tmp_path / "k", recipe=Recipe(seed=1), methods=["tpdf"])
    make_listening_kit(src, tmp_path / "k", recipe=Recipe(seed=1), methods=["tpdf"], overwrite=True)
    own = tmp_path / "k" / "original.wav"  # a source that sits where the kit writes
    with pytest.raises(OutputError, match="is the input"):
        make_listening_kit(own, tmp_path / "k", methods=["tpdf"], overwrite=True)
    with pytest.raises(InputError, match="no such file"):
        make_listening_kit(tmp_path / "missing.wav", tmp_path / "k5", methods=["tpdf"])
    assert not (tmp_path / "k5").exists()


@pytest.mark.slow
def test_cli_listen_writes_kit_and_prints_caution(tmp_path):
    x, _ = fade_source(steady=0.6, fade=1.0, silence=0.2)
    src = tmp_path / "in.wav"
    sf.write(src, x, FS, subtype="FLOAT")
    code, out, err = run_cli("listen", src, tmp_path / "kit", "--bits", 12, "-m", "truncate",
                             "-m", "tpdf+hearing", "--quiet-passage", "--quiet-seconds", 0.5,
                             "--seed", 5)
    assert code == 0, err
    kit = json.loads((tmp_path / "kit" / "figures.json").read_text())
    assert kit["seed"] == 5 and kit["bits"] == 12 and len(kit["methods"]) == 2
    assert "hard-limited at -6 dBFS" in out and "index.html" in out
    assert "Start playback at a low level" in err


def test_cli_defaults_match_library():
    # the CLI must not drift from the library's defaults (python-soundfile's meta-test idea)
    import inspect

    import typer.main

    from requant.cli import app
    from requant.listening import DEFAULT_METHODS, Excerpt
    from requant.listening.excerpt import QUIET_SECONDS
    from requant.recipe import Recipe

    cmd = typer.main.get_command(app).commands["listen"]
    cli = {p.name: p.default for p in cmd.params}
    lib = inspect.signature(make_listening_kit).parameters
    assert cli["bits"] == Recipe().bits
    assert cli["quiet_seconds"] == QUIET_SECONDS
    assert cli["start"] == Excerpt().start_s
    assert cli["hide_answers"] is lib["hide_answers"].default is False
    # no --method: the library's DEFAULT_METHODS (or only the methods of the pairs)
    assert cli["method"] is None and lib["methods"].default is None
    assert ", ".join(DEFAULT_METHODS) in next(p.help for p in cmd.params if p.name == "method")


# ---------------------------------------------------------------------------
# the page


class _Page(html.parser.HTMLParser):
    """Collects tags, attributes and the text of elements by id (stdlib parser)."""

    def __init__(self):
        super().__init__()
        self.tags, self.attrs, self.text, self._open = [], [], {}, []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.append((tag, dict(attrs)))
        self._open.append(dict(attrs).get("id"))

    def handle_endtag(self, tag):
        if self._open:
            self._open.pop()

    def handle_data(self, data):
        for i in self._open:
            if i:
                self.text[i] = self.text.get(i, "") + data


HOSTILE = "<b>take&1 \"quoted\" 'single'.wav"


def test_hostile_file_name_is_escaped(tmp_path):
    src = tmp_path / HOSTILE
    sf.write(src, tones(0.6), FS, subtype="FLOAT")
    kit = make_listening_kit(src, tmp_path / "k", recipe=Recipe(seed=1), methods=["tpdf"])
    page = (tmp_path / "k" / "index.html").read_text(encoding="utf-8")
    assert "<b>" not in page and "\"quoted\"" not in page
    assert "&lt;b&gt;take&amp;1" in page
    p = _Page()
    p.feed(page)
    assert "b" not in p.tags
    assert p.text["source-name"].strip() == HOSTILE
    data = next(a["data-kit"] for t, a in p.attrs if "data-kit" in a)
    assert json.loads(data)["source"]["name"] == HOSTILE == kit["source"]["name"]


def test_page_is_self_contained(kit16):
    _, out, kit = kit16
    page = (out / "index.html").read_text(encoding="utf-8")
    p = _Page()
    p.feed(page)
    assert "http://" not in page and "https://" not in page
    for tag, a in p.attrs:
        assert not (tag == "script" and "src" in a)
        assert not (tag == "link" and a.get("rel") == "stylesheet")
        for key in ("src", "href"):
            if key in a and a[key] not in ("#", "data:,"):
                assert not a[key].startswith("//") and ":" not in a[key]
                assert (out / a[key]).is_file(), a[key]
    assert "Start playback at a low volume" in p.text["caution"]
    n_audio = sum(1 for t, a in p.attrs if t == "audio" and "src" in a)
    assert n_audio == 1 + 3 * len(ALL_METHODS) + 1  # original, 3 per method, quiet original


# ---------------------------------------------------------------------------
# scoring


@pytest.mark.parametrize("n", list(range(1, 41)) + [57, 100, 250, 1000])
def test_p_value_against_scipy(n):
    from scipy.stats import binomtest

    ks = range(0, n + 1) if n <= 100 else sorted({0, 1, n // 3, n // 2, n // 2 + 1,
                                                  (2 * n) // 3, n - 1, n})
    for k in ks:
        # scipy.stats.binomtest (reference library), one-sided, p = 1/2 per trial
        ref = binomtest(k, n, 0.5, alternative="greater").pvalue
        assert guessing_p_value(k, n) == pytest.approx(ref, rel=1e-9, abs=1e-300), (k, n)


@pytest.mark.parametrize("k, n, exact", [(9, 10, 11 / 1024), (10, 10, 1 / 1024),
                                         (0, 5, 1.0), (0, 0, 1.0), (3, 4, 5 / 16)])
def test_p_value_hand_computed(k, n, exact):
    # Σ_{i>=k} C(n, i) / 2^n by hand: 9/10 -> (10 + 1)/1024, 3/4 -> (4 + 1)/16
    assert guessing_p_value(k, n) == exact


@pytest.mark.parametrize("k, n, exc", [(5, 4, ValueError), (-1, 4, ValueError),
                                       (1, -1, ValueError), (1.0, 4, TypeError),
                                       (True, 4, TypeError)])
def test_p_value_rejects_bad_counts(k, n, exc):
    with pytest.raises(exc):
        guessing_p_value(k, n)


def _results(trials):
    return {"format": "requant-listening-results", "version": 1,
            "comparisons": {"m1": {"label": "original vs truncate"},
                            "m2": {"label": "original vs tpdf"}},
            "trials": trials}


def _trials(cid, right, wrong, seed):
    rng = np.random.default_rng(seed)
    out = []
    for ok in [True] * right + [False] * wrong:
        x = "A" if rng.integers(2) else "B"
        ans = x if ok else ("B" if x == "A" else "A")
        out.append({"comparison": cid, "x": x, "answer": ans, "correct": ok})
    return out


def test_score_cli_prints_counts_and_p(tmp_path):
    from scipy.stats import binomtest

    res = _results(_trials("m1", 7, 3, 1) + _trials("m2", 3, 1, 2))
    path = tmp_path / "results.json"
    path.write_text(json.dumps(res))
    code, out, err = run_cli("score", path)
    assert code == 0, err
    lines = out.splitlines()
    for label, k, n in (("original vs truncate", 7, 10), ("original vs tpdf", 3, 4)):
        line = next(ln for ln in lines if ln.startswith(label + ":"))
        assert f"{k}/{n} correct" in line
        p = float(line.split("p = ")[1])
        assert p == pytest.approx(binomtest(k, n, 0.5, alternative="greater").pvalue, rel=1e-3)


@pytest.mark.parametrize("content, message", [
    ("{not json", "not valid JSON"),
    ('{"format": "something-else", "trials": []}', "not a listening-results file"),
    (json.dumps(_results([{"comparison": "m1", "x": "A", "answer": "B", "correct": True}])),
     "altered or damaged"),
    (json.dumps(_results([{"comparison": "m1", "x": "C", "answer": "B"}])), "not 'A' or 'B'"),
])
def test_score_cli_bad_files_one_line(tmp_path, content, message):
    path = tmp_path / "r.json"
    path.write_text(content)
    code, out, err = run_cli("score", path)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and message in lines[0] and "Traceback" not in err


def test_score_results_groups_in_order():
    rows = score_results(_results(_trials("m2", 2, 0, 3) + _trials("m1", 1, 1, 4)))
    assert [(r["comparison"], r["correct"], r["total"]) for r in rows] == [("m2", 2, 2),
                                                                         ("m1", 1, 2)]
    assert rows[0]["label"] == "original vs tpdf"


# ---------------------------------------------------------------------------
# loudness: no jumps between the players of a comparison (issue 22)


def check_comparisons(out, kit):
    """Every comparison of a kit against the 1 dB rule, measured on the written files.

    Players A and B (and any player not stated) play within 1 dB of each other, as played
    (file loudness by pyloudnorm + the page's playback gain); a stated player's button
    states its difference, which is the measured one within 0.1 dB, and warns. Returns
    ``{comparison id: (largest A/B difference as played, stated differences)}``.
    """
    from requant.listening.page import level_note

    html_page = (out / "index.html").read_text(encoding="utf-8")
    found = {}
    for c in kit["comparisons"]:
        levels = {r["player"]: played_level(out / kit["players"][r["player"]]["file"],
                                            r["gain_db"], c["measure"])
                  for r in c["players"]}
        matched = [levels[r["player"]] for r in c["players"]
                   if r["state"] == "matched" and levels[r["player"]] is not None]
        spread = max(matched) - min(matched) if matched else 0.0
        assert spread <= 1.0, (c["id"], levels)  # the rule: within 1 dB of each other
        assert all(r["gain_db"] <= 0 for r in c["players"])  # a page can only turn down
        stated = []
        ref = levels[c["players"][0]["player"]]
        for r in c["players"]:
            note, warn = level_note(c, r, kit["players"])
            assert html.escape(note, quote=False) in html_page  # in its button, before it plays
            if r["state"] == "stated":
                diff = levels[r["player"]] - ref
                stated.append(diff)
                said = re.match(r"this one is ([0-9.]+) dB (louder|quieter) than ", note)
                assert warn and said, note
                assert said[2] == ("louder" if diff > 0 else "quieter")
                assert float(said[1]) == pytest.approx(abs(diff), abs=0.1), (note, diff)
            elif r["state"] == "matched" and r is not c["players"][0]:
                # "matched" only when true, with the figure
                assert "matched" in note and abs(r["difference_db"]) <= 1.0
        found[c["id"]] = (spread, stated)
    return found


def test_every_comparison_of_the_16_bit_kit_is_matched(kit16):
    _, out, kit = kit16
    found = check_comparisons(out, kit)
    # 16 bits: every render already within 1 dB, played as written (no gain at all)
    for c in kit["comparisons"]:
        assert c["matched"] and all(r["gain_db"] == 0 for r in c["players"]), c["id"]
    # the error renders are stated: one per method comparison, all quieter than the
    # programme here (the hearing-shaped error least so: K-weighting lifts its treble)
    assert all(len(found[m["id"]][1]) == 1 for m in kit["methods"])
    assert all(d < 0 for cid, (_, stated) in found.items() for d in stated)


def test_a_loud_render_is_turned_down_and_says_so(tmp_path):
    # 3 bits with hearing-shaped noise: the render is several dB louder than the original
    # (the noise is loud). The page must play it turned down to the original's loudness, and
    # never call it matched as written.
    src = tmp_path / "in.wav"
    sf.write(src, tones(2.0, level_db=-20.0), FS, subtype="FLOAT")
    kit = make_listening_kit(src, tmp_path / "k", recipe=Recipe(bits=3, seed=5),
                             methods=["tpdf", "tpdf+hearing"], pairs=["tpdf,tpdf+hearing"])
    c = next(c for c in kit["comparisons"] if c["id"] == "m2")
    b = next(r for r in c["players"] if r["role"] == "B")
    assert b["level"] - c["players"][0]["level"] > 1.0  # louder as written
    assert b["gain_db"] < -1.0 and b["state"] == "matched" and abs(b["difference_db"]) < 1e-9
    check_comparisons(tmp_path / "k", kit)
    page = (tmp_path / "k" / "index.html").read_text(encoding="utf-8")
    assert f"as written, plays {-b['gain_db']:.1f} dB quieter: matched (+0.00 dB)" in page


def test_quiet_renders_are_raised_to_the_original_loudness(tmp_path):
    # An 8-bit kit of a fade far below the 8-bit noise floor: at the original's gain the
    # shaped render would be tens of dB louder than the raised original. Each render gets
    # its own stated gain instead, and the quiet comparison is within 1 dB.
    x, _ = fade_source(steady=0.5, fade=2.0, silence=0.3, top_db=-30.0, bottom_db=-110.0)
    src = tmp_path / "fade.wav"
    sf.write(src, np.repeat(x, 2, axis=1), FS, subtype="FLOAT")
    kit = make_listening_kit(src, tmp_path / "k", recipe=Recipe(bits=8, seed=6), quiet=0.5,
                             methods=["tpdf", "tpdf+hearing"])
    q = kit["quiet_passage"]
    shaped = kit["methods"][1]["quiet"]
    assert shaped["own_gain"] and shaped["difference_at_shared_gain_db"] > 10.0
    assert shaped["gain_db"] == pytest.approx(
        q["gain_db"] - shaped["difference_at_shared_gain_db"], abs=1e-9)
    found = check_comparisons(tmp_path / "k", kit)
    assert found["m2q"][0] <= 1.0
    page = (tmp_path / "k" / "index.html").read_text(encoding="utf-8")
    assert f"raised {shaped['gain_db']:+.1f} dB (its own gain" in page


@pytest.mark.slow
@pytest.mark.parametrize("bits", [8, 4])
def test_demo_kits_have_no_loudness_jumps(tmp_path, bits):
    # Issue 22: the 8- and 4-bit kits of the demo cue (with its quiet passage, and a
    # method-against-method pair) have no difference over 1 dB between players the listener
    # switches between, except the error renders, whose difference each button states.
    from requant.demo import default_demo_dir

    src = default_demo_dir() / "tidewater_master.flac"
    if not src.is_file():
        pytest.skip("the demo audio is not in this checkout")
    out = tmp_path / f"kit{bits}"
    kit = make_listening_kit(src, out, recipe=Recipe(bits=bits, seed=4778606049103618758),
                             methods=["truncate", "tpdf", "tpdf+hearing"],
                             pairs=["tpdf,tpdf+hearing"], quiet=2.0)
    found = check_comparisons(out, kit)
    assert kit["loudness"]["held"] is True
    assert {c["id"] for c in kit["comparisons"]} == {"m1", "m1q", "m2", "m2q", "m3", "m3q",
                                                     "p1", "p1q"}
    for cid, (spread, stated) in found.items():
        assert spread <= 1.0
        assert (len(stated) == 1) == (cid in ("m1", "m2", "m3"))  # the error renders


# ---------------------------------------------------------------------------
# level plans


def _p(pid, lufs, rms=None, stated=False):
    return {"player": pid, "lufs": lufs, "rms_dbfs": lufs if rms is None else rms,
            "stated": stated}


def test_plan_levels_plays_close_players_as_written():
    plan = plan_levels([_p("o", -20.0), _p("r", -19.2), _p("e", -55.0, stated=True)])
    assert plan["measure"] == "LUFS" and plan["matched"] and plan["spread_db"] == pytest.approx(0.8)
    assert [r["gain_db"] for r in plan["players"]] == [0.0, 0.0, 0.0]
    assert [r["state"] for r in plan["players"]] == ["matched", "matched", "stated"]
    assert plan["players"][2]["difference_db"] == pytest.approx(-35.0)


def test_plan_levels_turns_down_the_louder():
    plan = plan_levels([_p("o", -20.0), _p("r", -13.0), _p("e", -30.0, stated=True)])
    gains = [r["gain_db"] for r in plan["players"]]
    assert gains == [0.0, pytest.approx(-7.0), 0.0]
    assert plan["players"][1]["difference_db"] == pytest.approx(0.0)
    # the original louder than a render: the original is turned down in this comparison
    plan = plan_levels([_p("o", -20.0), _p("r", -26.0)])
    assert [r["gain_db"] for r in plan["players"]] == [pytest.approx(-6.0), 0.0]


def test_plan_levels_falls_back_to_rms_and_states_what_cannot_be_matched():
    # one loudness undefined (below the absolute gate): the whole comparison uses RMS
    plan = plan_levels([_p("o", -30.0, -31.0), _p("r", None, -30.5)])
    assert plan["measure"] == "dBFS RMS" and plan["players"][1]["level"] == -30.5
    # digital silence is stated as such; too far apart to match: stated
    plan = plan_levels([_p("o", -20.0), {"player": "s", "lufs": None, "rms_dbfs": None,
                                         "stated": False}])
    assert plan["players"][1]["state"] == "silent" and plan["matched"]
    plan = plan_levels([_p("o", -20.0), _p("r", -75.0, -75.0)])
    assert not plan["matched"] and {r["state"] for r in plan["players"]} == {"stated"}


# ---------------------------------------------------------------------------
# method against method


@pytest.mark.parametrize("text, bits, label", [("tpdf@12", 12, "tpdf@12"),
                                               ("TPDF+Hearing@8", 8, "tpdf+hearing@8"),
                                               ("truncate@1", 1, "truncate@1")])
def test_method_with_its_own_word_length(text, bits, label):
    m = parse_method(text)
    assert (m.bits, m.label) == (bits, label)
    assert m.recipe(Recipe(bits=16)).bits == bits


@pytest.mark.parametrize("text", ["tpdf@0", "tpdf@33", "tpdf@x", "tpdf@", "tpdf@1.5"])
def test_bad_word_length_in_method(text):
    with pytest.raises(UsageError, match="whole number of bits from 1 to 32"):
        parse_method(text)


def test_plan_methods_adds_pair_methods_and_refuses_repeats():
    methods, pairs = plan_methods(["tpdf"], ["tpdf,tpdf+hearing"], 16)
    assert [m.label for m in methods] == ["tpdf", "tpdf+hearing"] and pairs == [(0, 1)]
    methods, pairs = plan_methods(None, ["tpdf@12,tpdf@16"], 16)
    assert [m.label for m in methods] == ["tpdf@12", "tpdf@16"] and pairs == [(0, 1)]
    # mixed word lengths: every label names its own
    methods, _ = plan_methods(["tpdf", "truncate@8"], [], 16)
    assert [m.label for m in methods] == ["tpdf@16", "truncate@8"]
    for bad, message in ((["tpdf,tpdf@16"], "with itself"), (["tpdf"], "two methods"),
                         (["tpdf,round", "round,tpdf"], "given twice"),
                         (["tpdf,,round"], "two methods")):
        with pytest.raises(UsageError, match=message):
            plan_methods(None, bad, 16)
    with pytest.raises(UsageError, match="given twice .as 'tpdf'"):
        plan_methods(["tpdf", "tpdf@16"], [], 16)


def test_kit_of_12_against_16_bits(tmp_path):
    src = tmp_path / "in.wav"
    sf.write(src, tones(1.0, level_db=-30.0), FS, subtype="FLOAT")
    kit = make_listening_kit(src, tmp_path / "k", recipe=Recipe(seed=7),
                             pairs=["tpdf@12,tpdf@16"])
    assert kit["word_lengths"] == [12, 16] and [m["bits"] for m in kit["methods"]] == [12, 16]
    y12 = read(tmp_path / "k" / kit["methods"][0]["file"])
    assert np.array_equal(y12 * 2**11, np.round(y12 * 2**11))  # on the 12-bit grid
    # one error gain, set by the fewest bits: 12-bit rounding noise at -40 dBFS
    assert kit["error_gain"]["gain_db"] == pytest.approx(-40.0 + 6.0206 * 12 + 1.7609, abs=0.01)
    p1 = next(c for c in kit["comparisons"] if c["id"] == "p1")
    assert p1["label"] == "tpdf@12 vs tpdf@16" and p1["kind"] == "pair"
    assert (p1["a"], p1["b"]) == (kit["methods"][0]["file"], kit["methods"][1]["file"])
    check_comparisons(tmp_path / "k", kit)
    page = (tmp_path / "k" / "index.html").read_text(encoding="utf-8")
    assert '<option value="p1">tpdf@12 vs tpdf@16</option>' in page


@pytest.mark.slow
def test_cli_pair_and_hidden_answers(tmp_path):
    src = tmp_path / "in.wav"
    sf.write(src, tones(1.0), FS, subtype="FLOAT")
    code, out, err = run_cli("listen", src, tmp_path / "kit", "--bits", 8, "--pair",
                             "tpdf,tpdf+hearing", "--hide-answers", "--seed", 2**62 + 11)
    assert code == 0, err
    assert "tpdf vs tpdf+hearing:" in out and f"seed {2**62 + 11}" in out
    assert "matched within 1 dB" in out and "stated on the page" in out
    kit = json.loads((tmp_path / "kit" / "figures.json").read_text())
    assert kit["page"]["hide_answers"] is True and kit["seed"] == 2**62 + 11
    page = (tmp_path / "kit" / "index.html").read_text(encoding="utf-8")
    assert 'id="hide-answers" checked' in page
    code, out, err = run_cli("listen", src, tmp_path / "kit2", "--pair", "tpdf")
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and "two methods separated by a comma" in lines[0]


# ---------------------------------------------------------------------------
# exact seeds


def test_page_passes_the_seed_as_a_string(tmp_path):
    # JavaScript numbers hold integers exactly only up to 2^53 (ECMA-262, Number type):
    # 4778606049103618758 would reach the page's script as 4778606049103619000.
    seed = 4778606049103618758
    assert float(seed) != seed
    src = tmp_path / "in.wav"
    sf.write(src, tones(0.6), FS, subtype="FLOAT")
    make_listening_kit(src, tmp_path / "k", recipe=Recipe(seed=seed), methods=["tpdf"])
    p = _Page()
    p.feed((tmp_path / "k" / "index.html").read_text(encoding="utf-8"))
    data = json.loads(next(a["data-kit"] for t, a in p.attrs if "data-kit" in a))
    assert data["seed"] == str(seed)
    assert json.loads((tmp_path / "k" / "figures.json").read_text())["seed"] == seed


@pytest.mark.parametrize("saved, seed, exact", [
    ("4778606049103618758", 4778606049103618758, True),
    (4778606049103618758, 4778606049103618758, False),   # a number: maybe rounded
    (123, 123, True),
    (None, None, True),
])
def test_score_reads_both_forms_of_the_seed(tmp_path, saved, seed, exact):
    res = _results(_trials("m1", 3, 1, 5))
    res["kit"] = {"id": "abc", "source": "take.wav", "seed": saved}
    assert read_seed(res) == (seed, exact)
    path = tmp_path / "r.json"
    path.write_text(json.dumps(res))
    code, out, err = run_cli("score", path)
    assert code == 0, err
    if seed is not None:
        assert f"kit abc: take.wav, seed {seed}" in out
    assert ("older page" in out) is (not exact)


@pytest.mark.parametrize("saved", ["12a", -4, 1.5, True, "-3"])
def test_score_refuses_a_damaged_seed(tmp_path, saved):
    res = _results(_trials("m1", 1, 0, 6))
    res["kit"] = {"seed": saved}
    path = tmp_path / "r.json"
    path.write_text(json.dumps(res))
    code, _, err = run_cli("score", path)
    assert code == 2 and "is not a whole number" in err and "Traceback" not in err
