"""Data integrity: nothing is lost, nothing hangs, nothing stale ships."""

import json
import os

import numpy as np
import pytest
import soundfile as sf
from hypothesis import given
from hypothesis import settings as hyp_settings
from hypothesis import strategies as st

from requant.audio_io.probe import declared_frames, non_regular_kind

from helpers import run_cli


@pytest.fixture
def fifo(tmp_path):
    path = tmp_path / "pipe.wav"
    os.mkfifo(path)
    return path


def test_a_fifo_is_named_not_opened(fifo):
    assert non_regular_kind(fifo) == "a FIFO (named pipe)"
    assert non_regular_kind(fifo.parent) is None


@pytest.mark.parametrize("command", [["convert", "{f}", "{o}"], ["inspect", "{f}"]])
def test_fifo_input_is_refused_at_once(fifo, tmp_path, command):
    # opening a FIFO for reading waits for a writer forever: refuse it before that
    args = [a.format(f=fifo, o=tmp_path / "o.wav") for a in command]
    code, _, err = run_cli(*args, timeout=30)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and "FIFO" in lines[0] and "Traceback" not in err
    assert not (tmp_path / "o.wav").exists()


@pytest.mark.parametrize("dry_run", [False, True])
def test_batch_lists_a_fifo_as_skipped(tmp_path, dry_run):
    src = tmp_path / "lib"
    src.mkdir()
    sf.write(src / "a.wav", np.zeros((480, 1)), 48000, subtype="PCM_24")
    os.mkfifo(src / "b.wav")
    code, out, err = run_cli("batch", src, tmp_path / "out", "--jobs", 1,
                             *(["--dry-run"] if dry_run else []), timeout=60)
    assert code == 0, err
    if dry_run:
        assert "b.wav" in out and "regular file" in out
        return
    events = [json.loads(line) for line in
              (tmp_path / "out" / "requant-manifest.jsonl").read_text().splitlines()]
    by_source = {e["source"]: e for e in events}
    assert by_source["a.wav"]["status"] == "converted"
    assert by_source["b.wav"]["status"] == "skipped"
    assert "not a regular file" in by_source["b.wav"]["reason"]


@pytest.mark.parametrize("fmt, subtype", [("WAV", "PCM_24"), ("AIFF", "PCM_16"),
                                          ("RF64", "PCM_16"), ("WAV", "FLOAT")])
def test_declared_frames_of_whole_and_cut_files(tmp_path, fmt, subtype):
    # RIFF 1991 / EBU Tech 3306: data size over block align; AIFF: COMM numSampleFrames
    x = np.random.default_rng(1).uniform(-0.5, 0.5, (4800, 2))
    whole = tmp_path / f"w.{fmt.lower()}"
    sf.write(whole, x, 48000, subtype=subtype, format=fmt)
    assert declared_frames(whole) == 4800 == sf.info(whole).frames
    cut = tmp_path / f"c.{fmt.lower()}"
    data = whole.read_bytes()
    cut.write_bytes(data[: len(data) // 2])
    # libsndfile reads what is there; the header still says what should have been
    assert declared_frames(cut) == 4800 and sf.info(cut).frames < 4800


def test_declared_frames_of_other_files(tmp_path):
    sf.write(tmp_path / "x.flac", np.zeros((100, 1)), 48000)
    (tmp_path / "t.wav").write_bytes(b"RIFF")
    assert declared_frames(tmp_path / "x.flac") is None
    assert declared_frames(tmp_path / "t.wav") is None
    assert declared_frames(tmp_path / "absent.wav") is None


def test_ctrl_c_waits_for_a_chunk_handover():
    # the local pool commits a chunk's outputs with Ctrl-C held back: the interrupt
    # arrives after the block, never between a rename and its record
    import signal

    from requant.library.executors.local import _sigint_deferred

    done = []
    with pytest.raises(KeyboardInterrupt):
        with _sigint_deferred():
            os.kill(os.getpid(), signal.SIGINT)
            done.append("after the signal")
    assert done == ["after the signal"]
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler


@pytest.mark.parametrize("fmt", ["WAV", "AIFF"])
def test_a_cut_short_file_is_converted_with_a_warning(tmp_path, fmt):
    from requant.convert import Outputs, convert_file
    from requant.recipe import Recipe

    x = np.random.default_rng(2).uniform(-0.5, 0.5, (9600, 2))
    whole = tmp_path / f"w.{fmt.lower()}"
    sf.write(whole, x, 48000, subtype="PCM_24", format=fmt)
    cut = tmp_path / f"cut.{fmt.lower()}"
    data = whole.read_bytes()
    cut.write_bytes(data[: len(data) * 2 // 3])
    rep = convert_file(cut, tmp_path / "o.wav", Recipe(seed=1),
                       outputs=Outputs(report=tmp_path / "r.json"))
    assert rep.input.truncated and rep.input.declared_frames == 9600
    assert rep.input.frames == sf.info(tmp_path / "o.wav").frames < 9600
    assert any("cut short" in w for w in rep.warnings)
    saved = json.loads((tmp_path / "r.json").read_text())
    assert saved["input"]["declared_frames"] == 9600
    code, _, err = run_cli("convert", cut, tmp_path / "o2.wav")
    assert code == 0 and "cut short" in err
    whole_rep = convert_file(whole, tmp_path / "o3.wav", Recipe(seed=1))
    assert not whole_rep.input.truncated and not whole_rep.warnings


def test_batch_records_a_cut_short_source(tmp_path):
    from requant.library import read_manifest, resolve_settings, run_batch

    src = tmp_path / "lib"
    src.mkdir()
    sf.write(src / "whole.wav", np.zeros((4800, 1)) + 0.1, 48000, subtype="PCM_24")
    data = (src / "whole.wav").read_bytes()
    (src / "cut.wav").write_bytes(data[: len(data) // 2])
    run_batch(src, tmp_path / "out", resolve_settings({"seed": 1}), jobs=1)
    events = {e["source"]: e for e in read_manifest(tmp_path / "out" / "requant-manifest.jsonl")[0]}
    assert "truncated" in events["cut.wav"]["warning_kinds"]
    assert "truncated" not in events["whole.wav"]["warning_kinds"]


def test_demo_refuses_to_replace_files_it_did_not_write(tmp_path):
    from requant.demo import run_demo
    from requant.errors import OutputError

    out = tmp_path / "results"
    out.mkdir()
    mine = out / "coin_8bit_tpdf.wav"
    mine.write_bytes(b"the user's own file")
    with pytest.raises(OutputError, match="already exist.*--overwrite"):
        run_demo(out)
    assert mine.read_bytes() == b"the user's own file"
    assert sorted(p.name for p in out.iterdir()) == ["coin_8bit_tpdf.wav"]  # nothing written
    code, _, err = run_cli("demo", "--out", out)
    assert code == 2 and "--overwrite" in err and "Traceback" not in err
    (tmp_path / "afile").write_text("x")
    with pytest.raises(OutputError, match="is a file"):
        run_demo(tmp_path / "afile")


def _library(folder, names):
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(7)
    for name in names:
        sf.write(folder / name, rng.uniform(-0.5, 0.5, (4800, 2)), 48000, subtype="PCM_24")


def _converted(dst):
    from requant.library import read_manifest

    return {e["source"]: e for e in read_manifest(dst / "requant-manifest.jsonl")[0]
            if e["status"] == "converted"}


def test_resume_reconverts_exactly_the_changed_sources(tmp_path):
    from requant.library import read_manifest, resolve_settings, run_batch

    src, dst = tmp_path / "lib", tmp_path / "out"
    names = ["same.wav", "touched.wav", "replaced.wav", "cut.wav", "rewritten.wav"]
    _library(src, names)
    settings = resolve_settings({"seed": 4})
    first = run_batch(src, dst, settings, jobs=1)
    assert first["counts"]["converted"] == 5
    ident = _converted(dst)["replaced.wav"]["source_identity"]
    assert ident["size"] == (src / "replaced.wav").stat().st_size and len(ident["sha256"]) == 64

    os.utime(src / "touched.wav", ns=(1, 1))  # a copy that keeps the content, not the time
    # a re-delivered master: other audio, the same name and the same size
    sf.write(src / "replaced.wav", np.random.default_rng(99).uniform(-0.5, 0.5, (4800, 2)),
             48000, subtype="PCM_24")
    data = (src / "cut.wav").read_bytes()
    (src / "cut.wav").write_bytes(data[: len(data) // 2])
    # same size and time, other bytes: only a full re-hash can tell
    blob = bytearray((src / "rewritten.wav").read_bytes())
    st = (src / "rewritten.wav").stat()
    blob[-1] ^= 0x01
    (src / "rewritten.wav").write_bytes(bytes(blob))
    os.utime(src / "rewritten.wav", ns=(st.st_atime_ns, st.st_mtime_ns))

    before = len(read_manifest(dst / "requant-manifest.jsonl")[0])
    second = run_batch(src, dst, settings, jobs=1)
    events = read_manifest(dst / "requant-manifest.jsonl")[0][before:]
    by_source = {e["source"]: e for e in events}
    assert {s for s, e in by_source.items() if e["status"] == "converted"} == {
        "replaced.wav", "cut.wav"}
    assert by_source["replaced.wav"]["reason"] == "source changed since it was converted"
    assert by_source["touched.wav"]["reason"] == "up to date"
    assert by_source["touched.wav"]["source_identity"]["mtime_ns"] == 1
    assert by_source["rewritten.wav"]["reason"] == "up to date"  # size and time kept
    assert second["counts"]["converted"] == 2

    # the paranoid rerun hashes every source
    before = len(read_manifest(dst / "requant-manifest.jsonl")[0])
    run_batch(src, dst, settings, jobs=1, verify_sources=True)
    events = read_manifest(dst / "requant-manifest.jsonl")[0][before:]
    assert [e["source"] for e in events if e["status"] == "converted"] == ["rewritten.wav"]

    # and after that, nothing is left to do
    third = run_batch(src, dst, settings, jobs=1)
    assert third["counts"]["converted"] == 0 and third["counts"]["up_to_date"] == 5


def test_dry_run_names_a_changed_source(tmp_path):
    src, dst = tmp_path / "lib", tmp_path / "out"
    _library(src, ["a.wav", "b.wav"])
    code, _, err = run_cli("batch", src, dst, "--seed", 1, "--jobs", 1, "-q")
    assert code == 0, err
    sf.write(src / "b.wav", np.zeros((4800, 2)) + 0.25, 48000, subtype="PCM_24")
    code, out, err = run_cli("batch", src, dst, "--seed", 1, "--dry-run")
    assert code == 0, err
    lines = {ln.split()[2]: ln for ln in out.splitlines() if ln.startswith("would")}
    assert "up to date" in lines["a.wav"] and "source changed" in lines["b.wav"]


# --------------------------------------------------------------------------- absurd magnitudes

def _float_file(path, values, subtype="DOUBLE"):
    x = np.random.default_rng(3).uniform(-0.5, 0.5, (4800, 2))
    for (frame, ch), v in values.items():
        x[frame, ch] = v
    with np.errstate(over="ignore"):  # a float32 file may hold infinities on purpose
        data = x if subtype == "DOUBLE" else x.astype(np.float32)
    sf.write(path, data, 48000, subtype=subtype)
    return path


@pytest.mark.parametrize("value, subtype", [(1e30, "DOUBLE"), (-1e300, "DOUBLE"),
                                            (3e38, "FLOAT"), (2e4, "FLOAT")])
def test_absurd_magnitudes_fail_with_one_line(tmp_path, value, subtype):
    src = _float_file(tmp_path / "in.wav", {(1000, 1): value}, subtype)
    code, out, err = run_cli("convert", src, tmp_path / "o.wav", "--error", tmp_path / "e.wav",
                             "--report", tmp_path / "r.json")
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and "beyond full scale" in lines[0], err
    assert "frame 1000, channel 2" in lines[0]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.wav"]  # nothing partial


def test_large_overs_are_clipped_counted_and_finite(tmp_path):
    # +40 dBFS is far over, but a number: clipped, counted, every figure finite
    src = _float_file(tmp_path / "in.wav", {(1000, 0): 100.0, (2000, 1): -100.0})
    rep = tmp_path / "r.json"
    code, _, err = run_cli("convert", src, tmp_path / "o.wav", "--error", tmp_path / "e.wav",
                           "--report", rep)
    assert code == 0, err
    doc = json.loads(rep.read_text())  # strict: our reader refuses NaN
    assert doc["measured"]["clipped_samples"] == 2 and doc["measured"]["snr_db"] is not None
    e = sf.read(tmp_path / "e.wav")[0]
    assert np.all(np.isfinite(e))


def test_one_poisoned_file_does_not_stop_a_library(tmp_path):
    lib = tmp_path / "lib"
    lib.mkdir()
    _float_file(lib / "bad.wav", {(10, 0): 1e300})
    _float_file(lib / "good.wav", {})
    for _ in range(2):  # and the rerun does not crash on what the first run recorded
        code, _, err = run_cli("batch", lib, tmp_path / "out", "--jobs", 1, "--analyze",
                               "--seed", 1)
        assert code == 1 and "Traceback" not in err
    events = [json.loads(line) for line in
              (tmp_path / "out" / "requant-manifest.jsonl").read_text().splitlines()]
    latest = {e["source"]: e for e in events}
    assert latest["good.wav"]["status"] in ("converted", "skipped")
    assert latest["bad.wav"]["status"] == "failed"
    assert "beyond full scale" in latest["bad.wav"]["error"]


def test_json_safe_and_the_manifest_writer(tmp_path):
    from requant.audio_io.writers import json_safe
    from requant.library.manifest import ManifestWriter, read_manifest

    doc, n = json_safe({"a": float("nan"), "b": [1.0, float("inf"), np.float32(2.5)],
                        "c": {"d": -np.inf}, "e": "x", "f": True, "g": np.int64(3)})
    assert n == 3 and doc == {"a": None, "b": [1.0, None, 2.5], "c": {"d": None}, "e": "x",
                              "f": True, "g": 3}
    w = ManifestWriter(str(tmp_path / "m.jsonl"))
    w.append({"source": "x.wav", "status": "converted", "snr_db": float("inf"), "warnings": []})
    w.close()
    events, bad = read_manifest(str(tmp_path / "m.jsonl"))
    assert bad == 0 and events[0]["snr_db"] is None
    assert "non-finite-figure" in events[0]["warning_kinds"]


def test_inspect_of_a_damaged_file_writes_strict_json(tmp_path):
    src = _float_file(tmp_path / "in.wav", {(10, 0): 1e300})
    code, _, err = run_cli("inspect", src, "--json", tmp_path / "i.json")
    assert code == 0 and "Traceback" not in err and "RuntimeWarning" not in err
    doc = json.loads((tmp_path / "i.json").read_text())
    assert any("no finite value" in s for s in doc["recommendations"])


@pytest.mark.slow
@given(values=st.lists(st.tuples(st.integers(0, 4799), st.integers(0, 1),
                                 st.floats(allow_nan=True, allow_infinity=True)),
                       min_size=1, max_size=4),
       double=st.booleans())
@hyp_settings(max_examples=40, deadline=None)
def test_any_float_magnitudes(tmp_path_factory, values, double):
    # whatever floats a file holds: the report is strict JSON, or one clear error; no temps
    from requant.convert import Outputs, convert_file
    from requant.errors import RequantError
    from requant.recipe import Recipe

    tmp = tmp_path_factory.mktemp("mag")
    src = _float_file(tmp / "in.wav", {(f, c): v for f, c, v in values},
                      "DOUBLE" if double else "FLOAT")
    try:
        convert_file(src, tmp / "o.wav", Recipe(seed=1),
                     outputs=Outputs(error=tmp / "e.wav", report=tmp / "r.json"))
    except RequantError as exc:
        assert "\n" not in str(exc)
        assert sorted(p.name for p in tmp.iterdir()) == ["in.wav"]
        return
    json.loads((tmp / "r.json").read_text())
    assert np.all(np.isfinite(sf.read(tmp / "e.wav")[0]))
