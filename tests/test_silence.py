"""Digital silence stays silent (``Recipe.silence = 'keep'``).

In every run of at least ``silence_min_ms`` of exact zeros, per channel, the
output codes and the error are exactly zero; shorter zero runs are dithered;
the decision is the same for every block size; the report's predictions cover
the requantized samples only; ``silence = 'dither'`` is the old behaviour, bit
for bit.
"""

import hashlib
import json
import math

import numpy as np
import pytest
import soundfile as sf

from requant.convert import Outputs, convert_file
from requant.dsp import kernel as _kernel
from requant.dsp.quantizer import Requantizer, requantize
from requant.dsp.shaping import coefficients_for
from requant.errors import UsageError
from requant.recipe import DEFAULT_SILENCE_MIN_MS, Recipe, RecipeError, Shaping

RATE = 48000
#: 20 ms at 48 kHz
L = 960


def material(n=30000, rate=RATE):
    """Two channels with silent runs: a head in both, a long pause in channel 1 only, a
    300-frame (6 ms, too short) gap in channel 2, and a tail in both."""
    t = np.arange(n) / rate
    x = np.empty((n, 2))
    x[:, 0] = 0.25 * np.sin(2 * np.pi * 441.0 * t) + 0.01 * np.sin(2 * np.pi * 3001.0 * t)
    x[:, 1] = 0.002 * np.sin(2 * np.pi * 97.0 * t)
    x[:2000] = 0.0
    x[9000:12500, 0] = 0.0
    x[15000:15300, 1] = 0.0
    x[-3000:] = 0.0
    return x.astype(np.float32)


def zero_runs(col, min_len):
    """(start, stop) of every run of exact zeros of at least ``min_len`` samples."""
    z = np.concatenate(([0], (col == 0).astype(np.int8), [0]))
    d = np.diff(z)
    starts, stops = np.flatnonzero(d == 1), np.flatnonzero(d == -1)
    return [(a, b) for a, b in zip(starts, stops, strict=True) if b - a >= min_len]


def run(x, sizes, *, kernel=None, masks=None, **kw):
    """Requantize ``x`` in blocks of ``sizes`` (cycled), then flush; codes, error, the
    requantizer. ``masks``, a list, receives :meth:`Requantizer.silent_mask` of each."""
    rq = Requantizer(x.shape[1], **kw)
    codes, errs = [], []
    i = k = 0

    def took(c, e):
        codes.append(c.copy())
        errs.append(e.copy())
        if masks is not None:
            masks.append(rq.silent_mask())
            assert masks[-1].shape == c.shape

    while i < x.shape[0]:
        n = sizes[k % len(sizes)]
        took(*rq.process(x[i:i + n], kernel=kernel))
        i += n
        k += 1
    while rq.held:
        took(*rq.flush(kernel=kernel, max_frames=sizes[0]))
    assert rq.frames == x.shape[0]
    return np.concatenate(codes), np.concatenate(errs), rq


# --------------------------------------------------------------------------- the recipe

def test_recipe_keeps_silence_by_default_and_checks_its_fields():
    r = Recipe()
    assert r.silence == "keep" and r.silence_min_ms == DEFAULT_SILENCE_MIN_MS == 20.0
    assert Recipe.from_dict(r.to_dict()) == r
    assert r.silence_frames(44100) == 882 and r.silence_frames(48000) == 960
    assert Recipe(silence_min_ms=0.5).silence_frames(1) == 1  # never less than one frame
    assert Recipe(silence="dither").silence_frames(48000) == 0
    # the shortest run decides nothing when silence is dithered: not part of the identity
    assert "silence_min_ms" not in Recipe(silence="dither").identity()
    assert Recipe(silence_min_ms=5).identity() != Recipe().identity()
    with pytest.raises(RecipeError, match="silence='mute' is not known.*keep, dither"):
        Recipe(silence="mute")
    for bad in (0, -1, 1e9, float("nan")):
        with pytest.raises(RecipeError, match="silence_min_ms"):
            Recipe(silence_min_ms=bad)
    with pytest.raises(RecipeError, match="silence_min_ms must be a number"):
        Recipe(silence_min_ms="20")
    assert "silence kept (>= 20 ms)" in r.describe()


def test_requantizer_needs_the_rate_to_keep_silence():
    with pytest.raises(UsageError, match="sample rate"):
        Requantizer.from_recipe(Recipe(seed=1), 2)
    rq = Requantizer.from_recipe(Recipe(seed=1), 2, sample_rate=44100)
    assert rq.silence_frames == 882 and rq.hold == 881
    assert Requantizer.from_recipe(Recipe(seed=1, silence="dither"), 2).silence_frames == 0
    with pytest.raises(UsageError, match="silence_frames"):
        Requantizer(1, bits=16, silence_frames=-1)


# --------------------------------------------------------------------------- the kernel

SHAPED = {"none": (), "first-order": (1.0,), "hearing": None}


@pytest.mark.parametrize("bits", [8, 16, 24])
@pytest.mark.parametrize("shaping", sorted(SHAPED))
def test_long_zero_runs_give_zero_codes_and_zero_error_per_channel(bits, shaping):
    x = material()
    coeffs = SHAPED[shaping]
    if coeffs is None:
        coeffs = coefficients_for(Shaping("hearing"), RATE)
    masks = []
    codes, err, rq = run(x, [4096], bits=bits, dither="tpdf", coeffs=coeffs, seed=3,
                         silence_frames=L, masks=masks)
    mask = np.concatenate(masks)
    expected = 0
    for c in range(2):
        runs = zero_runs(x[:, c], L)
        inside = np.zeros(x.shape[0], bool)
        for a, b in runs:
            assert not codes[a:b, c].any() and not err[a:b, c].any()
            inside[a:b] = True
            expected += b - a
        # the mask names exactly these samples (everything else was requantized)
        assert np.array_equal(mask[:, c], inside)
    assert [zero_runs(x[:, c], L) for c in range(2)] == [
        [(0, 2000), (9000, 12500), (27000, 30000)], [(0, 2000), (27000, 30000)]]
    assert rq.totals()["silent"].sum() == expected
    # channel 2's 300-frame gap is shorter than 20 ms: dithered, as a quiet passage is
    assert codes[15000:15300, 1].any() and err[15000:15300, 1].any()


def test_a_quiet_passage_that_is_not_exactly_zero_is_dithered():
    x = np.full((5000, 1), 1e-9, np.float32)  # far below one 16-bit LSB, but not zero
    codes, err, rq = run(x, [5000], bits=16, dither="tpdf", seed=1, silence_frames=L)
    assert codes.any() and rq.totals()["silent"][0] == 0


def test_negative_zero_is_digital_silence_and_nan_is_not():
    x = np.zeros((3000, 1), np.float32)
    x[:2000] = -0.0
    codes, _, rq = run(x, [700], bits=16, dither="tpdf", seed=1, silence_frames=L)
    assert not codes.any() and rq.totals()["silent"][0] == 3000


@pytest.mark.parametrize("dither, coeffs", [("tpdf", SHAPED["first-order"]),
                                            ("tpdf", (1.5, -0.6)), ("tpdf-hp", ())])
def test_after_a_silent_run_the_loop_starts_from_a_clean_state(dither, coeffs):
    # The state after a silent run is that of a requantizer that saw only silence for as
    # long (the generator still advances one word per sample), so what follows it is the
    # same, sample for sample, whatever came before the run.
    rs = np.random.default_rng(5)
    music = rs.uniform(-0.5, 0.5, (4000, 1)).astype(np.float32)
    after = rs.uniform(-0.5, 0.5, (3000, 1)).astype(np.float32)
    gap = np.zeros((L + 37, 1), np.float32)
    a = np.concatenate([music, gap, after])
    b = np.concatenate([np.zeros_like(music), gap, after])
    kw = dict(bits=10, dither=dither, coeffs=coeffs, seed=9, silence_frames=L)
    ca, ea, _ = run(a, [1111], **kw)
    cb, eb, _ = run(b, [1111], **kw)
    tail = slice(music.shape[0] + gap.shape[0], None)
    assert np.array_equal(ca[tail], cb[tail]) and np.array_equal(ea[tail], eb[tail])
    assert not np.array_equal(ca[:music.shape[0]], cb[:music.shape[0]])


@pytest.mark.parametrize("sizes", [[1], [7], [1000], [65536], [L - 1], [L + 1], [3, 2000, 1]],
                         ids=str)
@pytest.mark.parametrize("coeffs", [(), (1.5, -0.6)], ids=["flat", "shaped"])
def test_every_block_size_gives_the_same_bits(sizes, coeffs):
    # silent runs straddle blocks of every size here (the head, the pause and the tail are
    # 2000-3500 frames, the look-ahead 959)
    x = material()
    kw = dict(bits=12, dither="tpdf", coeffs=coeffs, seed=42, silence_frames=L)
    whole_masks, masks = [], []
    whole_c, whole_e, whole = run(x, [x.shape[0]], masks=whole_masks, **kw)
    c, e, rq = run(x, sizes, masks=masks, **kw)
    assert np.array_equal(whole_c, c)
    assert np.array_equal(whole_e, e)
    assert np.array_equal(np.concatenate(whole_masks), np.concatenate(masks))
    assert np.allclose(whole.acc, rq.acc, rtol=1e-12, atol=1e-9)
    assert np.array_equal(whole.fbs, rq.fbs)


@pytest.mark.parametrize("dither, coeffs", [("tpdf", ()), ("rpdf", (1.0,)),
                                            ("tpdf-hp", ()), ("none", (1.5, -0.6))])
def test_plain_twin_equals_compiled_with_silence(dither, coeffs):
    x = material(12000)
    kw = dict(bits=8, dither=dither, coeffs=coeffs, seed=8, silence_frames=300)
    a = run(x, [2500], **kw)
    b = run(x, [2500], kernel=_kernel.quantize_block_plain, **kw)
    assert np.array_equal(a[0], b[0]) and np.array_equal(a[1], b[1])
    assert np.array_equal(a[2].acc, b[2].acc) and np.array_equal(a[2].fbs, b[2].fbs)


def test_only_a_short_run_of_zeros_at_a_block_end_is_held_back():
    rq = Requantizer(2, bits=16, seed=1, silence_frames=L)
    x = material(6000)
    codes, _ = rq.process(x[4000:6000])  # music in both channels to the end: nothing waits
    assert codes.shape[0] == 2000 and rq.held == 0
    y = x[:3000].copy()
    y[2900:, 1] = 0.0  # a run of 100 zeros reaches the end: undecided, held back
    codes, _ = rq.process(y)
    assert codes.shape[0] == 2900 and rq.held == 100
    codes, _ = rq.process(x[:1500])  # those 100 frames come first in the next call
    assert codes.shape[0] == 1600 and rq.held == 0
    z = np.zeros((1500, 2), np.float32)  # long enough: decided at once, nothing held
    codes, _ = rq.process(z)
    assert codes.shape[0] == 1500 and rq.held == 0
    codes, _ = rq.process(z[:10])  # the same run goes on: decided before
    assert codes.shape[0] == 10 and rq.held == 0 and not codes.any()


def test_blocks_of_another_float_type_behind_held_frames():
    x = material(20000)
    kw = dict(bits=16, dither="tpdf", seed=2, silence_frames=L)
    whole, _, _ = run(x.astype(np.float64), [20000], **kw)
    rq = Requantizer(2, **kw)
    parts = [rq.process(x[:9500])[0].copy()]  # ends 500 frames into channel 1's pause
    assert rq.held == 500
    parts.append(rq.process(x[9500:9800].astype(np.float64))[0].copy())
    assert rq.held == 800
    parts.append(rq.process(x[9800:])[0].copy())
    while rq.held:
        parts.append(rq.flush()[0].copy())
    assert np.array_equal(np.concatenate(parts), whole)


def test_requantize_in_memory_keeps_silence_when_asked():
    x = np.zeros(4000)
    x[1000:1010] = 0.3
    y = requantize(x, bits=8, seed=1, silence_frames=100)
    assert not y[:1000].any() and not y[1010:].any()
    assert requantize(x, bits=8, seed=1)[:1000].any()  # the default dithers everything


# --------------------------------------------------------------------------- dither: as before

#: sha256 (first 32 hex digits) of the codes and of the error of ``material()``,
#: Requantizer(2, bits, dither, coeffs, seed=777).process(x), recorded with requant 0.1
#: (before silence could be kept): ``silence='dither'`` must stay this, bit for bit.
BEFORE = {
    (16, "tpdf", ()): ("5b9bbb4ad83d9890ed474a93547397d6", "776f046053ec3427c799fdc1b67a0880"),
    (8, "tpdf", (1.5, -0.6)): ("9d27fcac0961f5c64a2e41e7812ba576",
                               "5074e81807bab47a23bc76bd62e43581"),
    (12, "tpdf-hp", ()): ("b8717ef03c76d462cdc150a6e62707bd", "198148b172f79cfa97a27336aa39ccda"),
    (24, "rpdf", ()): ("0f1646dccccde914f7a893de0075972a", "569a01e6cac307951e836004bdaf7ce0"),
}


@pytest.mark.parametrize("key", sorted(BEFORE, key=str), ids=str)
def test_silence_dither_is_the_old_behaviour_bit_for_bit(key):
    bits, dither, coeffs = key
    rq = Requantizer(2, bits=bits, dither=dither, coeffs=coeffs, seed=777)
    codes, err = rq.process(material())
    digest = (hashlib.sha256(codes.tobytes()).hexdigest()[:32],
              hashlib.sha256(err.tobytes()).hexdigest()[:32])
    assert digest == BEFORE[key]
    assert rq.totals()["silent"].sum() == 0


# --------------------------------------------------------------------------- whole files

def _write(path, x, rate=RATE):
    sf.write(path, x, rate, subtype="FLOAT")
    return path


def thirty_percent_silent(seconds=10.0, rate=RATE):
    """Music-like noise in both channels with 30% of each channel digital silence: a head
    and a tail in both, and a pause of its own in each."""
    n = int(seconds * rate)
    rs = np.random.default_rng(11)
    x = rs.normal(0.0, 0.1, (n, 2))
    x[:int(0.1 * n)] = 0.0
    x[-int(0.1 * n):] = 0.0
    x[int(0.3 * n):int(0.4 * n), 0] = 0.0
    x[int(0.6 * n):int(0.7 * n), 1] = 0.0
    return x.astype(np.float32)


@pytest.mark.parametrize("shaping", ["none", "hearing"])
def test_measured_matches_predicted_with_thirty_percent_silence(tmp_path, shaping):
    x = thirty_percent_silent()
    src = _write(tmp_path / "in.wav", x)
    rep = convert_file(src, tmp_path / "out.wav",
                       Recipe(bits=16, dither="tpdf", shaping=shaping, seed=4),
                       outputs=Outputs(report=tmp_path / "r.json"))
    d = json.loads((tmp_path / "r.json").read_text())
    n = x.shape[0]
    assert d["measured"]["silent_frames"] == rep.measured.silent_frames == int(0.6 * n)
    assert [ch["measured"]["silent_frames"] for ch in d["channels"]] == [int(0.3 * n)] * 2
    m, p = d["measured"], d["predicted"]
    # TPDF error power Δ²/4 times the noise power gain Σ n_k² of the shaping filter
    # (Lipshitz, Wannamaker & Vanderkooy 1992; Gerzon & Craven 1989), over the 70% of
    # samples requantized
    assert abs(10 * math.log10(m["error_power_lsb2"] / p["error_power_lsb2"])) < 0.1
    assert abs(m["a_weighted_noise_dbfs"] - p["a_weighted_noise_dbfs"]) < 0.25
    for ch in d["channels"]:
        assert abs(10 * math.log10(ch["measured"]["error_power_lsb2"]
                                   / ch["predicted"]["error_power_lsb2"])) < 0.1
    if shaping == "none":
        assert p["error_power_lsb2"] == pytest.approx(0.25 * 0.7)
    assert any("Digital silence kept silent" in note and "30.0% of all samples" in note
               for note in d["notes"])
    assert not any("noise modulation" in w for w in d["warnings"])
    # the error histogram holds requantized samples only: no spike of silent zeros at 0
    hist = d["analysis"]["histogram"]
    counts, edges = np.array(hist["counts"]), np.array(hist["edges_lsb"])
    zero = int(np.searchsorted(edges, 0.0)) - 1
    assert counts[zero] < 1.3 * max(counts[zero - 1], counts[zero + 1])
    assert d["settings"]["silence"] == "keep" and d["settings"]["silence_min_ms"] == 20.0
    y, _ = sf.read(tmp_path / "out.wav", dtype="int16")
    assert not y[:int(0.1 * n)].any() and not y[-int(0.1 * n):].any()
    assert not y[int(0.3 * n):int(0.4 * n), 0].any() and y[int(0.3 * n):int(0.4 * n), 1].any()


@pytest.mark.parametrize("block_frames", [7, 1000, 65536])
def test_convert_gives_the_same_file_for_any_block_size(tmp_path, block_frames):
    x = material()
    src = _write(tmp_path / "in.wav", x)
    outs = {}
    for bf in (block_frames, 30000):
        dst = tmp_path / f"out{bf}.wav"
        convert_file(src, dst, Recipe(bits=8, shaping="hearing", seed=5),
                     outputs=Outputs(error=tmp_path / f"err{bf}.wav", overwrite=True),
                     block_frames=bf)
        outs[bf] = (dst.read_bytes(), (tmp_path / f"err{bf}.wav").read_bytes())
    assert outs[block_frames] == outs[30000]


def test_convert_with_silence_dither_matches_the_requantizer_without_silence(tmp_path):
    x = material()
    src = _write(tmp_path / "in.wav", x)
    convert_file(src, tmp_path / "out.wav", Recipe(bits=16, seed=777, silence="dither"))
    y, _ = sf.read(tmp_path / "out.wav", dtype="int16")
    codes, _ = Requantizer(2, bits=16, seed=777).process(x)
    assert np.array_equal(y, codes)
    assert hashlib.sha256(codes.tobytes()).hexdigest()[:32] == BEFORE[(16, "tpdf", ())][0]


def test_a_nan_behind_held_frames_is_found_where_it_is(tmp_path):
    x = material(6000)
    # the first 1000-frame block ends in a short run of zeros in channel 1: its last five
    # frames are held back, with a NaN in channel 2 among them
    x[995:1000, 0] = 0.0
    x[997, 1] = np.nan
    src = _write(tmp_path / "in.wav", x)
    from requant.errors import InputError

    with pytest.raises(InputError, match=r"frame 997, channel 2"):
        convert_file(src, tmp_path / "out.wav", Recipe(seed=1), block_frames=1000)
    assert not (tmp_path / "out.wav").exists()


# --------------------------------------------------------------------------- the command line

def test_cli_convert_takes_silence_options_and_records_them(tmp_path):
    from helpers import run_cli

    src = _write(tmp_path / "in.wav", material())
    code, out, err = run_cli("convert", src, tmp_path / "a.wav", "--seed", "1", "--report",
                             tmp_path / "a.json")
    assert code == 0, err
    d = json.loads((tmp_path / "a.json").read_text())
    assert (d["settings"]["silence"], d["settings"]["silence_min_ms"]) == ("keep", 20.0)
    assert d["measured"]["silent_frames"] == 2000 + 3500 + 3000 + 2000 + 3000
    assert "Digital silence kept silent" in out  # the note, on the console too
    code, _, err = run_cli("convert", src, tmp_path / "b.wav", "--seed", "1", "--silence",
                           "dither", "--report", tmp_path / "b.json")
    assert code == 0, err
    d = json.loads((tmp_path / "b.json").read_text())
    assert d["settings"]["silence"] == "dither" and d["measured"]["silent_frames"] == 0
    # a longer minimum (70 ms, 3360 frames): the 2000-frame head and 3000-frame tail are
    # dithered, channel 1's 3500-frame pause stays silent
    code, _, err = run_cli("convert", src, tmp_path / "c.wav", "--seed", "1", "--silence-min",
                           "70", "--report", tmp_path / "c.json")
    assert code == 0, err
    d = json.loads((tmp_path / "c.json").read_text())
    assert d["settings"]["silence_min_ms"] == 70.0
    assert [ch["measured"]["silent_frames"] for ch in d["channels"]] == [3500, 0]


@pytest.mark.parametrize("args, match", [
    (["--silence", "mute"], "Invalid value for '--silence'"),
    (["--silence-min", "0"], "Invalid value for '--silence-min'"),
    (["--silence-min", "20000"], "Invalid value for '--silence-min'"),
])
def test_cli_refuses_bad_silence_options(tmp_path, args, match):
    from helpers import run_cli

    src = _write(tmp_path / "in.wav", material(3000))
    code, _, err = run_cli("convert", src, tmp_path / "o.wav", *args)
    assert code == 2 and match in err and "Traceback" not in err
    assert not (tmp_path / "o.wav").exists()


def test_profile_sets_silence(tmp_path):
    from requant.library.profiles import parse_profile

    prof = parse_profile('silence = "dither"\nsilence_min_ms = 50')
    assert prof["silence"] == "dither" and prof["silence_min_ms"] == 50
    with pytest.raises(UsageError, match="silence"):
        parse_profile('silence = "off"')


# --------------------------------------------------------------------------- inspect lists the runs

def test_silent_runs_match_a_whole_array_search_for_any_split():
    from hypothesis import given, settings
    from hypothesis import strategies as st

    from requant.dsp.runs import SilentRuns

    @settings(max_examples=150, deadline=None)
    @given(st.lists(st.sampled_from([0, 0, 0, 1]), min_size=0, max_size=80),
           st.lists(st.sampled_from([0, 0, 1]), min_size=0, max_size=80),
           st.integers(1, 6), st.lists(st.integers(1, 30), min_size=1, max_size=6))
    def check(a, b, min_len, sizes):
        n = min(len(a), len(b))
        x = np.array([a[:n], b[:n]], dtype=np.float32).T.reshape(n, 2)
        r = SilentRuns(2, min_len)
        i = k = 0
        while i < n:
            m = sizes[k % len(sizes)]
            blk = x[i:i + m]
            r.feed(blk, zeros=int((blk == 0).sum()))
            i, k = i + m, k + 1
        r.finish()
        cols = [x[:, 0], x[:, 1], x.any(axis=1).astype(np.float32)]
        for j, col in enumerate(cols):
            want = [(int(s), int(e - s)) for s, e in zero_runs(col, min_len)]
            assert r.runs[j] == want
            assert r.counts[j] == len(want) and r.frames[j] == sum(w for _, w in want)

    check()


def test_silent_runs_keep_at_most_the_limit_but_count_them_all():
    from requant.dsp.runs import SilentRuns

    x = np.tile(np.array([0, 0, 0, 1], dtype=np.int32), 50).reshape(-1, 1)
    r = SilentRuns(1, 3, limit=4)
    r.feed(x)
    r.finish()
    assert r.runs[0] == [(0, 3), (4, 3), (8, 3), (12, 3)]
    assert r.counts[0] == 50 and r.frames[0] == 150


@pytest.mark.parametrize("block_frames", [1000, 4096, None])
def test_inspect_lists_the_runs_convert_keeps_silent(tmp_path, block_frames):
    from requant.inspection import format_inspection, inspect_file

    x = material()
    src = _write(tmp_path / "in.wav", x)
    rep = inspect_file(src, block_frames=block_frames)
    assert rep["settings"]["silence_min_frames"] == L
    both = [(d["start_frame"], d["frames"]) for d in rep["silent_runs"]]
    assert both == [(0, 2000), (27000, 3000)]
    ch = [[(d["start_frame"], d["frames"]) for d in p["silent_runs"]] for p in rep["per_channel"]]
    assert ch == [[(0, 2000), (9000, 3500), (27000, 3000)], [(0, 2000), (27000, 3000)]]
    assert rep["silent_run_count"] == 2 and rep["silent_run_frames"] == 5000
    assert rep["silent_runs"][1]["start_s"] == pytest.approx(27000 / RATE)
    text = format_inspection(rep)
    assert "every channel: 0.000 s (0.042 s), 0.562 s (0.062 s)" in text
    assert "ch 1: 0.000 s (0.042 s), 0.188 s (0.073 s), 0.562 s (0.062 s)" in text
    # what convert keeps silent is exactly what inspect lists, channel by channel
    convert_file(src, tmp_path / "out.wav", Recipe(bits=16, seed=3),
                 outputs=Outputs(report=tmp_path / "r.json"))
    d = json.loads((tmp_path / "r.json").read_text())
    assert [c["measured"]["silent_frames"] for c in d["channels"]] == [
        p["silent_run_frames"] for p in rep["per_channel"]]


def test_cli_inspect_takes_silence_min(tmp_path):
    from helpers import run_cli

    src = _write(tmp_path / "in.wav", material())
    code, out, err = run_cli("inspect", src, "--silence-min", "70", "--json", tmp_path / "i.json")
    assert code == 0, err
    d = json.loads((tmp_path / "i.json").read_text())
    assert d["settings"]["silence_min_ms"] == 70.0 and d["silent_run_count"] == 0
    assert [p["silent_run_count"] for p in d["per_channel"]] == [1, 0]
    assert "ch 1: 0.188 s (0.073 s)" in out
    code, _, err = run_cli("inspect", src, "--silence-min", "-1")
    assert code == 2 and "Invalid value for '--silence-min'" in err


@pytest.mark.slow
def test_batch_keeps_silence_and_a_changed_setting_reconverts(tmp_path):
    from helpers import run_cli

    src = tmp_path / "src"
    src.mkdir()
    _write(src / "a.wav", material())
    dst = tmp_path / "dst"
    code, _, err = run_cli("batch", src, dst, "--seed", "3", "-q")
    assert code == 0, err
    y, _ = sf.read(dst / "a.wav", dtype="int16")
    assert not y[:2000].any() and not y[-3000:].any() and y[2000:2100].any()
    # the setting is part of the settings id: dithering silence now converts the file again
    code, out, err = run_cli("batch", src, dst, "--seed", "3", "--silence", "dither")
    assert code == 0, err
    assert "converted 1" in out
    y, _ = sf.read(dst / "a.wav", dtype="int16")
    assert y[:2000].any() and y[-3000:].any()
