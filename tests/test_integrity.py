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


@pytest.mark.slow
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
    by_source = {e["source"]: e for e in events if e["status"] != "run"}
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
    # a touched source with the same bytes stays up to date, and its new time is recorded
    assert by_source["touched.wav"]["reason"] == "up to date"
    assert by_source["touched.wav"]["source_identity"]["mtime_ns"] == 1
    # size and time kept: nothing looks changed, so nothing is written for it (nor for same.wav)
    assert "rewritten.wav" not in by_source and "same.wav" not in by_source
    assert second["counts"]["converted"] == 2 and second["counts"]["up_to_date"] == 3

    # the paranoid rerun hashes every source
    before = len(read_manifest(dst / "requant-manifest.jsonl")[0])
    run_batch(src, dst, settings, jobs=1, verify_sources=True)
    events = read_manifest(dst / "requant-manifest.jsonl")[0][before:]
    assert [e["source"] for e in events if e["status"] == "converted"] == ["rewritten.wav"]

    # and after that, nothing is left to do
    third = run_batch(src, dst, settings, jobs=1)
    assert third["counts"]["converted"] == 0 and third["counts"]["up_to_date"] == 5


@pytest.mark.slow
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


@pytest.mark.slow
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
    latest = {e["source"]: e for e in events if e["status"] != "run"}
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
    assert int(bad) == 0 and events[0]["snr_db"] is None
    assert "non-finite-figure" in events[0]["warning_kinds"]


@pytest.mark.slow
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


# --------------------------------------------------------------------------- damaged bookkeeping

@pytest.mark.parametrize("line", [
    b'{"source": "a.wav", "status": "converted", "settings_id": ["x"]}',
    b'{"source": "a.wav", "status": "converted", "output": 7}',
    b'{"source": "a.wav", "status": "converted", "source_identity": "big"}',
    b'{"source": "a.wav", "status": "converted", "output_sha256": NaN}',
    b'{"source": "a.wav", "status": "exploded"}',
    b"[" * 100000 + b"]" * 100000,
    b"\xff\xfe not json",
])
@pytest.mark.slow
def test_a_damaged_manifest_line_is_named_and_left_out(tmp_path, line):
    src, dst = tmp_path / "lib", tmp_path / "out"
    _library(src, ["a.wav", "b.wav"])
    code, _, err = run_cli("batch", src, dst, "--seed", 2, "--jobs", 1, "-q")
    assert code == 0, err
    manifest = dst / "requant-manifest.jsonl"
    lines = manifest.read_bytes().splitlines()
    manifest.write_bytes(b"\n".join(lines[:1] + [line] + lines[1:]) + b"\n")
    code, out, err = run_cli("batch", src, dst, "--seed", 2, "--jobs", 1)
    assert code == 0 and "Traceback" not in err, err
    said = err + out
    assert "unreadable line(s) (first: line 2" in said and "move the manifest aside" in said


@pytest.mark.slow
def test_a_manifest_that_is_a_folder_is_one_line(tmp_path):
    src, dst = tmp_path / "lib", tmp_path / "out"
    _library(src, ["a.wav"])
    (dst / "requant-manifest.jsonl").mkdir(parents=True)
    code, _, err = run_cli("batch", src, dst, "--jobs", 1)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and "move it aside" in lines[0]
    # the lock went with the process: the next run is not told another batch is writing
    (dst / "requant-manifest.jsonl").rmdir()
    code, _, err = run_cli("batch", src, dst, "--jobs", 1, "-q")
    assert code == 0, err


@pytest.mark.parametrize("state", [b"not json", b"[1, 2]", b'{"run_seed": "7"}',
                                   b'{"claimed_outputs": "a.wav"}', b"{" * 100000])
@pytest.mark.slow
def test_a_damaged_state_file_is_named_and_safe(tmp_path, state):
    src, dst = tmp_path / "lib", tmp_path / "out"
    _library(src, ["a.wav"])
    code, _, err = run_cli("batch", src, dst, "--seed", 3, "--jobs", 1, "-q")
    assert code == 0, err
    (dst / "requant-batch.json").write_bytes(state)
    code, out, err = run_cli("batch", src, dst, "--seed", 3, "--jobs", 1)
    assert code == 0 and "Traceback" not in err, err
    assert "requant-batch.json" in err and "damaged" in err and "move it aside" in err


# --------------------------------------------------------------------------- kills and temporaries

def _long_input(path, seconds=20.0):
    rate = 48000
    x = np.random.default_rng(4).uniform(-0.5, 0.5, (int(seconds * rate), 2)).astype(np.float32)
    sf.write(path, x, rate, subtype="FLOAT")
    return path


def _temps(folder):
    return [p.name for p in folder.iterdir() if p.name.endswith(".requant-part")]


@pytest.mark.slow
@pytest.mark.parametrize("sig, code", [("SIGTERM", 143), ("SIGINT", 130)])
def test_a_stopped_convert_leaves_nothing(tmp_path, sig, code):
    import signal
    import subprocess
    import time

    from helpers import cli_command

    src = _long_input(tmp_path / "in.wav")
    out = tmp_path / "out"
    out.mkdir()
    proc = subprocess.Popen(cli_command("convert", src, out / "o.wav", "--error",
                                        out / "e.wav", "--report", out / "r.json",
                                        "--block-frames", 4096),
                            stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 30
    while not _temps(out) and time.monotonic() < deadline:
        time.sleep(0.01)
    proc.send_signal(getattr(signal, sig))
    _, err = proc.communicate(timeout=60)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert proc.returncode == code and len(lines) == 1 and "no partial output" in lines[0], err
    assert list(out.iterdir()) == []


@pytest.mark.slow
def test_temporaries_of_a_killed_convert_are_removed_by_the_next(tmp_path):
    import signal
    import subprocess
    import time

    from helpers import cli_command

    src = _long_input(tmp_path / "in.wav")
    out = tmp_path / "out"
    out.mkdir()
    proc = subprocess.Popen(cli_command("convert", src, out / "o.wav", "--error",
                                        out / "e.wav", "--block-frames", 4096))
    deadline = time.monotonic() + 30
    while len(_temps(out)) < 2 and time.monotonic() < deadline:
        time.sleep(0.01)
    proc.send_signal(signal.SIGKILL)  # no chance to clean up
    proc.wait(timeout=30)
    assert len(_temps(out)) == 2 and not (out / "o.wav").exists()
    code, _, err = run_cli("convert", src, out / "o.wav", "--error", out / "e.wav")
    assert code == 0, err
    assert _temps(out) == [] and sorted(p.name for p in out.iterdir()) == ["e.wav", "o.wav"]


def test_a_live_temporary_is_not_taken_for_a_stale_one(tmp_path):
    from requant.audio_io.atomic import AtomicOutputs, is_stale_temp, remove_stale_temps_of

    outs = AtomicOutputs()
    tmp = outs.path_for(tmp_path / "take.wav")
    assert not is_stale_temp(tmp)  # its writer holds it
    assert remove_stale_temps_of(tmp_path / "take.wav") == [] and os.path.exists(tmp)
    outs.discard()
    leftover = tmp_path / ".take.wav.0123abcd.requant-part"
    leftover.write_bytes(b"half a file")
    assert is_stale_temp(leftover)
    assert remove_stale_temps_of(tmp_path / "take.wav") == [leftover.name]
    other = tmp_path / ".take.wav.more.0123abcd.requant-part"  # another output's temporary
    other.write_bytes(b"x")
    assert remove_stale_temps_of(tmp_path / "take.wav") == [] and other.exists()


def test_a_legal_long_name_still_converts(tmp_path):
    # a 250-byte name is legal (255 on most file systems); its temporary must fit too
    src = _float_file(tmp_path / "in.wav", {})
    name = "n" * 246 + ".wav"
    code, _, err = run_cli("convert", src, tmp_path / name, "--error",
                           tmp_path / ("e" * 246 + ".wav"), "--report",
                           tmp_path / ("r" * 245 + ".json"))
    assert code == 0, err
    assert (tmp_path / name).exists() and _temps(tmp_path) == []


# ------------------------------------------------------------------- one line, not a traceback

@pytest.mark.slow
def test_a_source_folder_named_like_the_batch_bookkeeping(tmp_path):
    src, dst = tmp_path / "lib", tmp_path / "out"
    _library(src / "requant-summary.json", ["a.wav"])
    _library(src, ["b.wav"])
    code, out, err = run_cli("batch", src, dst, "--jobs", 1)
    assert code == 1 and "Traceback" not in err
    assert "where the batch keeps its 'requant-summary.json'" in err
    assert json.loads((dst / "requant-summary.json").read_text())["counts"]["converted"] == 1


@pytest.mark.slow
@pytest.mark.parametrize("rate", [1, 2, 4])
def test_extreme_sample_rates_with_reports(tmp_path, rate):
    sf.write(tmp_path / "in.wav", np.random.default_rng(1).uniform(-0.5, 0.5, (40, 1)), rate,
             subtype="FLOAT")
    for ext in ("json", "html", "md"):
        code, _, err = run_cli("convert", tmp_path / "in.wav", tmp_path / f"o.{ext}.wav",
                               "--report", tmp_path / f"r.{ext}")
        assert code == 0 and "Traceback" not in err, err


@pytest.mark.slow
def test_names_that_are_not_utf8(tmp_path):
    src = _float_file(tmp_path / "ok.wav", {})
    odd = os.fsencode(tmp_path) + b"/bad\xffname.wav"
    os.symlink(src, odd)
    out = os.fsencode(tmp_path) + b"/o\xfe.flac"
    report = os.fsencode(tmp_path) + b"/r\xfc.md"
    import subprocess

    from helpers import cli_command

    proc = subprocess.run(cli_command("convert", os.fsdecode(odd), os.fsdecode(out), "--report",
                                      os.fsdecode(report)), capture_output=True)
    assert proc.returncode == 0, proc.stderr
    assert os.path.exists(out) and os.path.exists(report)
    assert b"\\xff" in open(report, "rb").read()  # shown with an escape, still UTF-8 text
    open(report, "rb").read().decode("utf-8")
    proc = subprocess.run(cli_command("inspect", os.fsdecode(odd)), capture_output=True)
    assert proc.returncode == 0, proc.stderr


@pytest.mark.slow
@pytest.mark.parametrize("damage", ["cut", "corrupt"])
def test_a_damaged_flac_is_one_line(tmp_path, damage):
    sf.write(tmp_path / "ok.flac", np.random.default_rng(1).uniform(-0.5, 0.5, (48000, 2)),
             48000, subtype="PCM_24")
    data = bytearray((tmp_path / "ok.flac").read_bytes())
    if damage == "cut":
        data = data[: len(data) // 2]
    else:
        data[len(data) // 2: len(data) // 2 + 200] = bytes(200)
    (tmp_path / "bad.flac").write_bytes(bytes(data))
    for args in (["inspect", tmp_path / "bad.flac"],
                 ["convert", tmp_path / "bad.flac", tmp_path / "o.wav"]):
        code, _, err = run_cli(*args)
        lines = [ln for ln in err.splitlines() if ln.strip()]
        assert code == 2 and len(lines) == 1 and "damaged or cut short" in lines[0], err
        assert "o.wav" not in lines[0]  # the input's fault, not the output's
    assert not (tmp_path / "o.wav").exists()


def test_stdout_that_cannot_be_written(tmp_path):
    import subprocess

    from helpers import cli_command

    src = _float_file(tmp_path / "in.wav", {})
    with open("/dev/full", "w") as full:
        proc = subprocess.run(cli_command("convert", src, tmp_path / "o.wav"), stdout=full,
                              stderr=subprocess.PIPE, text=True)
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert proc.returncode == 1 and len(lines) == 1 and "standard output" in lines[0]
    assert (tmp_path / "o.wav").exists()  # the work itself was done


def test_write_failures_name_the_file_that_failed(tmp_path, monkeypatch):
    # a full disk while writing the JSON report: one sentence about the report, no traceback
    import errno

    from requant.audio_io import writers
    from requant.convert import Outputs, convert_file
    from requant.errors import OutputError
    from requant.recipe import Recipe

    src = _float_file(tmp_path / "in.wav", {})
    real_dump = json.dump

    def full(*args, **kwargs):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(json, "dump", full)
    with pytest.raises(OutputError, match=r"disk is full while writing '.*r\.json'"):
        convert_file(src, tmp_path / "o.wav", Recipe(seed=1),
                     outputs=Outputs(report=tmp_path / "r.json"))
    with pytest.raises(OutputError, match=r"disk is full while writing '.*i\.json'"):
        writers.write_json_atomic({"a": 1}, tmp_path / "i.json")
    monkeypatch.setattr(json, "dump", real_dump)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.wav"]  # nothing partial
    # a library message quoting a temporary name is told with the final one
    exc = writers.wrap_write_error(RuntimeError(
        "Error opening '/x/.take.wav.0a1b2c3d.requant-part': System error"), "/x/take.wav")
    assert "requant-part" not in str(exc) and "take.wav" in str(exc)


# --------------------------------------------------------------------------- random damage

def _riff_like(draw_bytes, chunks):
    from helpers import fmt_pcm, riff_wave

    body = [(b"fmt ", fmt_pcm(2, 48000, 16))] + chunks + [(b"data", draw_bytes)]
    return riff_wave(body)[0]


@pytest.mark.slow
@given(data=st.one_of(
    st.binary(max_size=600),
    st.builds(_riff_like, st.binary(max_size=400),
              st.lists(st.tuples(st.sampled_from([b"LIST", b"bext", b"smpl", b"JUNK", b"zzzz",
                                                  b"data", b"fmt "]),
                                 st.binary(max_size=64)), max_size=4)),
    st.builds(lambda b, cut: b[:cut], st.builds(_riff_like, st.binary(min_size=8, max_size=400),
                                                st.just([])), st.integers(0, 500))))
@hyp_settings(max_examples=150, deadline=None)
def test_random_bytes_never_make_a_traceback(tmp_path_factory, data):
    # convert and inspect: one clear error or a result; strict JSON; nothing partial
    from requant.convert import Outputs, convert_file
    from requant.errors import RequantError
    from requant.inspection import inspect_file
    from requant.recipe import Recipe

    tmp = tmp_path_factory.mktemp("bytes")
    src = tmp / "in.wav"
    src.write_bytes(data)
    try:
        convert_file(src, tmp / "o.wav", Recipe(seed=1),
                     outputs=Outputs(error=tmp / "e.wav", report=tmp / "r.json"))
        json.loads((tmp / "r.json").read_text())
    except RequantError as exc:
        assert "\n" not in str(exc)
        assert sorted(p.name for p in tmp.iterdir()) == ["in.wav"]
    try:
        from requant.audio_io.writers import json_safe

        json.dumps(json_safe(inspect_file(src))[0], allow_nan=False)
    except RequantError as exc:
        assert "\n" not in str(exc)
    assert src.read_bytes() == data  # the input is never touched


@given(lines=st.lists(st.one_of(
    st.binary(max_size=80),
    st.dictionaries(st.sampled_from(["source", "status", "output", "settings_id",
                                     "output_sha256", "source_identity", "seed", "warnings"]),
                    st.one_of(st.none(), st.integers(), st.floats(), st.text(max_size=8),
                              st.lists(st.integers(), max_size=2)),
                    max_size=6).map(lambda d: json.dumps(d).encode())), max_size=12))
@hyp_settings(max_examples=200, deadline=None)
def test_random_manifests_are_read_not_trusted(tmp_path_factory, lines):
    from requant.library.manifest import latest_by_source, read_manifest

    path = tmp_path_factory.mktemp("m") / "m.jsonl"
    path.write_bytes(b"\n".join(lines))
    events, bad = read_manifest(str(path))
    latest_by_source(events)  # what the plan does with them
    for ev in events:
        assert isinstance(ev["source"], str) and ev["status"] in ("converted", "skipped", "failed")
    assert int(bad) >= 0 and (bad == 0) == (bad.first_line is None)


# --------------------------------------------------------------------------- score

def _results(path, trials, **extra):
    doc = {"format": "requant-listening-results", "version": 2, "trials": trials, **extra}
    path.write_text(json.dumps(doc))
    return path


def test_score_cannot_clear_the_screen_or_forge_a_line(tmp_path):
    evil = "\x1b[2J\x1b[Hall methods: 100/100 correct, p = 0\nforged"
    path = _results(tmp_path / "r.json",
                    [{"comparison": "m1", "x": "A", "answer": "A"}],
                    comparisons={"m1": {"label": evil}}, kit={"id": "k\x07", "source": evil})
    code, out, err = run_cli("score", path)
    assert code == 0, err
    assert "\x1b" not in out and "\x07" not in out
    assert not any(line.startswith("forged") for line in out.splitlines())


def test_score_is_linear_in_trials(tmp_path):
    # exact binomial tail by a recurrence: 60,000 trials in well under a second here
    # (one math.comb per term made 30,000 trials take 20 s); compared with scipy's
    # regularized incomplete beta function, a general reference library
    import time

    from scipy.stats import binom

    from requant.listening.score import guessing_p_value

    t0 = time.perf_counter()
    p = guessing_p_value(30_400, 60_000)
    assert time.perf_counter() - t0 < 5.0
    assert p == pytest.approx(binom.sf(30_400 - 1, 60_000, 0.5), rel=1e-9)
    assert guessing_p_value(9, 10) == 11 / 1024  # C(10,9) + C(10,10) = 11 of 2^10


@pytest.mark.parametrize("content", ["[" * 100000 + "]" * 100000, None])
def test_score_refuses_absurd_files_in_one_line(tmp_path, content):
    path = tmp_path / "r.json"
    if content is None:
        _results(path, [{"comparison": "c", "x": "A", "answer": "A"}] * 200_001)
    else:
        path.write_text(content)
    code, _, err = run_cli("score", path)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and "Traceback" not in err, err


@pytest.mark.parametrize("where", ["a_file/kit", "/proc/requant-nowhere/kit"])
def test_listen_into_a_folder_it_cannot_create(tmp_path, where):
    src = tmp_path / "long.wav"
    sf.write(src, np.random.default_rng(1).uniform(-0.5, 0.5, (48000, 2)), 48000,
             subtype="FLOAT")
    (tmp_path / "a_file").write_text("x")
    target = where if where.startswith("/") else tmp_path / where
    code, _, err = run_cli("listen", src, target)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and "Traceback" not in err, err


@pytest.mark.slow
def test_kills_at_random_moments(tmp_path):
    # SIGKILL or SIGTERM at a random moment of a convert: the final path holds nothing or the
    # whole output; the next run leaves no temporary behind
    import random
    import signal
    import subprocess
    import time

    from helpers import cli_command

    src = _long_input(tmp_path / "in.wav", seconds=8.0)
    ref = tmp_path / "ref"
    ref.mkdir()
    args = ["--seed", 5, "--error", None, "--report", None]

    def command(folder):
        a = list(args)
        a[3], a[5] = folder / "e.wav", folder / "r.json"
        return cli_command("convert", src, folder / "o.wav", *a)

    subprocess.run(command(ref), check=True, capture_output=True)
    rng = random.Random(19)
    for i in range(8):
        out = tmp_path / f"k{i}"
        out.mkdir()
        proc = subprocess.Popen(command(out), stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL)
        time.sleep(rng.uniform(0.0, 0.6))
        proc.send_signal(rng.choice([signal.SIGKILL, signal.SIGTERM]))
        proc.wait(timeout=60)
        for name in ("o.wav", "e.wav"):
            if (out / name).exists():  # written only when whole
                assert (out / name).read_bytes() == (ref / name).read_bytes()
        subprocess.run([*command(out), "--overwrite"], check=True, capture_output=True)
        assert _temps(out) == []
        assert (out / "o.wav").read_bytes() == (ref / "o.wav").read_bytes()


@pytest.mark.parametrize("args, words", [
    (["--shaping", "1e308"], "cannot shape noise usefully"),
    (["--shaping", "1.0,nan"], "finite"),
    (["--block-frames", 10**9], "block-frames"),
])
def test_absurd_option_values_are_one_line(tmp_path, args, words):
    src = _float_file(tmp_path / "in.wav", {})
    code, _, err = run_cli("convert", src, tmp_path / "o.wav", *args)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and words in lines[0], err
    assert not (tmp_path / "o.wav").exists()
