"""The bad-input and fault corpus: every case gets a documented outcome.

Each case runs the real command line in a subprocess and asserts all of:

* the documented exit code (0 ok, 1 some batch files failed, 2 usage or bad input,
  130 interrupted);
* on error, exactly one line on stderr, naming the problem (``requant: error: ...``), and
  no traceback;
* inputs untouched (hashes before and after);
* no temporary file (``*.requant-part``) left anywhere, and no partial output.

The outcomes are listed in README.md, "Exit codes and what happens to files".
"""

import hashlib
import os
import resource
import signal
import struct
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

PY = sys.executable


def sha(path):
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def tree_state(root):
    """{relative path: sha256} of every regular file under root (links not followed)."""
    out = {}
    for dirpath, _dirnames, filenames in os.walk(root):
        for name in filenames:
            p = os.path.join(dirpath, name)
            if os.path.islink(p) or not os.path.isfile(p):
                continue
            out[os.path.relpath(p, root)] = sha(p)
    return out


def part_files(root):
    return [str(p) for p in Path(root).rglob("*.requant-part")]


def run(args, *, cwd, preexec=None, timeout=120):
    env = dict(os.environ)
    env["PYTHONPATH"] = str(Path(__file__).resolve().parents[1])
    proc = subprocess.run([PY, "-m", "requant", *map(str, args)], cwd=cwd, capture_output=True,
                          text=True, timeout=timeout, preexec_fn=preexec, env=env)
    return proc.returncode, proc.stdout, proc.stderr


def tone(path, *, frames=4800, channels=2, rate=48000, subtype="FLOAT", amp=0.5, fmt=None):
    t = np.arange(frames) / rate
    x = amp * np.sin(2 * np.pi * 997 * t)
    sf.write(path, np.stack([x] * channels, axis=1), rate, subtype=subtype, format=fmt)
    return path


@dataclass
class Case:
    """One fault: how to set it up, what must happen."""

    name: str
    setup: object  # callable(tmp) -> list of CLI args
    code: int
    message: str = ""  # regex the error line must match (errors only)
    must_exist: tuple = ()  # outputs that must exist afterwards (relative to tmp)
    must_not_exist: tuple = ("out.wav", "out.flac", "err.wav", "r.json")
    preexec: object = None
    changes: tuple = ()  # files the case itself is allowed to create or change
    extra: dict = field(default_factory=dict)


def c_empty(tmp):
    (tmp / "empty.wav").write_bytes(b"")
    return ["convert", "empty.wav", "out.wav"]


def c_garbage(tmp):
    (tmp / "garbage.wav").write_bytes(np.random.default_rng(0).bytes(5000))
    return ["convert", "garbage.wav", "out.wav"]


def c_text_as_audio(tmp):
    (tmp / "notes.wav").write_text("this is not audio\n")
    return ["convert", "notes.wav", "out.wav"]


def c_truncated_header(tmp):
    tone(tmp / "full.wav", subtype="PCM_24")
    (tmp / "cut.wav").write_bytes((tmp / "full.wav").read_bytes()[:30])
    return ["convert", "cut.wav", "out.wav"]


def c_truncated_data(tmp):
    tone(tmp / "full.wav", subtype="PCM_24")
    b = (tmp / "full.wav").read_bytes()
    (tmp / "cut.wav").write_bytes(b[: len(b) // 2])
    return ["convert", "cut.wav", "out.wav", "--report", "r.json"]


def lying_header(tmp):
    """A WAV whose data chunk declares 2 GB while the file holds 4800 frames."""
    tone(tmp / "ok.wav", subtype="PCM_16")
    b = (tmp / "ok.wav").read_bytes()
    i = b.find(b"data")
    (tmp / "lie.wav").write_bytes(b[:i + 4] + struct.pack("<I", 0x7FFFFFF0) + b[i + 8:])


def c_lying_header(tmp):
    lying_header(tmp)
    return ["convert", "lie.wav", "out.wav", "--bits", "8", "--report", "r.json"]


def c_nan(tmp):
    x = np.zeros((4800, 2), dtype=np.float32)
    x[2400, 0] = np.nan
    sf.write(tmp / "nan.wav", x, 48000, subtype="FLOAT")
    return ["convert", "nan.wav", "out.wav", "--error", "err.wav", "--report", "r.json"]


def c_inf(tmp):
    x = np.zeros((4800, 1), dtype=np.float32)
    x[-1, 0] = -np.inf
    sf.write(tmp / "inf.wav", x, 48000, subtype="FLOAT")
    return ["convert", "inf.wav", "out.wav"]


def c_over_full_scale(tmp):
    tone(tmp / "hot.wav", amp=1.8)
    return ["convert", "hot.wav", "out.wav", "--report", "r.json"]


def c_zero_frames(tmp):
    sf.write(tmp / "zero.wav", np.zeros((0, 2)), 48000, subtype="PCM_24")
    return ["convert", "zero.wav", "out.wav", "--report", "r.json", "--error", "err.wav"]


def c_one_frame(tmp):
    sf.write(tmp / "one.wav", np.full((1, 2), 0.3), 48000, subtype="FLOAT")
    return ["convert", "one.wav", "out.wav", "--report", "r.json", "--error", "err.wav"]


def c_64_channels(tmp):
    tone(tmp / "multi.wav", channels=64, frames=2000)
    return ["convert", "multi.wav", "out.wav", "--report", "r.json"]


def rate_case(rate, shaping):
    def setup(tmp):
        tone(tmp / "rate.wav", rate=rate, frames=rate // 4)
        return ["convert", "rate.wav", "out.wav", "--shaping", shaping, "--report", "r.json"]
    return setup


def named(name):
    def setup(tmp):
        tone(tmp / name)
        return ["convert", name, "out.wav"]
    return setup


def c_missing_folder(tmp):
    tone(tmp / "in.wav")
    return ["convert", "in.wav", "nowhere/out.wav"]


def c_existing_output(tmp):
    tone(tmp / "in.wav")
    (tmp / "out.wav").write_bytes(b"precious")
    return ["convert", "in.wav", "out.wav"]


def c_output_is_input(tmp):
    tone(tmp / "in.wav")
    return ["convert", "in.wav", "in.wav", "--overwrite"]


def c_output_symlink_to_input(tmp):
    tone(tmp / "in.wav")
    os.symlink("in.wav", tmp / "alias.wav")
    return ["convert", "in.wav", "alias.wav", "--overwrite"]


def c_output_hardlink_to_input(tmp):
    tone(tmp / "in.wav")
    os.link(tmp / "in.wav", tmp / "hard.wav")
    return ["convert", "in.wav", "hard.wav", "--overwrite"]


def c_error_is_input(tmp):
    tone(tmp / "in.wav")
    return ["convert", "in.wav", "out.wav", "--error", "in.wav", "--overwrite"]


def c_lossy_target(tmp):
    tone(tmp / "in.wav")
    return ["convert", "in.wav", "out.mp3"]


def c_flac_32(tmp):
    tone(tmp / "in.wav")
    return ["convert", "in.wav", "out.flac", "--bits", "32"]


def bad_option(*opts):
    def setup(tmp):
        tone(tmp / "in.wav")
        return ["convert", "in.wav", "out.wav", *opts]
    return setup


_CLEANUPS = []


def make_read_only(folder):
    """Make a folder read-only even for root: a read-only tmpfs mount, else the immutable
    attribute, else (not root) plain permissions."""
    folder.mkdir()
    if os.geteuid() == 0:
        r = subprocess.run(["mount", "-t", "tmpfs", "-o", "ro,size=1m", "tmpfs", str(folder)],
                           capture_output=True)
        if r.returncode == 0:
            _CLEANUPS.append(["umount", str(folder)])
            return
        r = subprocess.run(["chattr", "+i", str(folder)], capture_output=True)
        if r.returncode == 0:
            _CLEANUPS.append(["chattr", "-i", str(folder)])
            return
        pytest.skip("cannot make a folder read-only for root here (no mount, no chattr)")
    os.chmod(folder, 0o555)
    _CLEANUPS.append(["chmod", "755", str(folder)])


def c_read_only_destination(tmp):
    tone(tmp / "in.wav")
    make_read_only(tmp / "ro")
    return ["convert", "in.wav", "ro/out.wav"]


def c_full_file_system(tmp):
    tone(tmp / "long.wav", frames=48000 * 4)
    small = tmp / "small"
    small.mkdir()
    if os.geteuid() != 0:
        pytest.skip("needs root to mount a tiny file system")
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=256k", "tmpfs", str(small)],
                       capture_output=True)
    if r.returncode != 0:
        pytest.skip("cannot mount a tiny tmpfs here")
    _CLEANUPS.append(["umount", str(small)])
    return ["convert", "long.wav", "small/out.wav", "--error", "small/err.wav"]


def limit_file_size():
    resource.setrlimit(resource.RLIMIT_FSIZE, (200_000, 200_000))


def c_disk_full(tmp):
    tone(tmp / "long.wav", frames=48000 * 4)  # output ~768 kB, error file ~1.5 MB
    return ["convert", "long.wav", "out.wav", "--error", "err.wav"]


def c_huge_declared_size_memory(tmp):
    lying_header(tmp)
    return ["convert", "lie.wav", "out.wav"]


CASES = [
    Case("empty file", c_empty, 2, r"not an audio file"),
    Case("garbage bytes", c_garbage, 2, r"not an audio file"),
    Case("text named .wav", c_text_as_audio, 2, r"not an audio file"),
    Case("truncated header", c_truncated_header, 2, r"not an audio file"),
    Case("truncated data", c_truncated_data, 0, must_exist=("out.wav", "r.json"),
         must_not_exist=()),
    Case("header lies about the length", c_lying_header, 0, must_exist=("out.wav", "r.json"),
         must_not_exist=()),
    Case("NaN sample", c_nan, 2, r"NaN sample at 0\.050000 s \(frame 2400, channel 1\)"),
    Case("infinite sample", c_inf, 2, r"infinite sample at 0\.099979 s"),
    Case("float over full scale", c_over_full_scale, 0, must_exist=("out.wav", "r.json"),
         must_not_exist=()),
    Case("zero frames", c_zero_frames, 0, must_exist=("out.wav", "r.json", "err.wav"),
         must_not_exist=()),
    Case("one frame", c_one_frame, 0, must_exist=("out.wav", "r.json", "err.wav"),
         must_not_exist=()),
    Case("64 channels", c_64_channels, 0, must_exist=("out.wav", "r.json"), must_not_exist=()),
    Case("8 kHz, first-order", rate_case(8000, "first-order"), 0, must_exist=("out.wav",),
         must_not_exist=()),
    Case("8 kHz, hearing", rate_case(8000, "hearing"), 0, must_exist=("out.wav",),
         must_not_exist=()),
    Case("384 kHz, first-order", rate_case(384000, "first-order"), 0, must_exist=("out.wav",),
         must_not_exist=()),
    Case("384 kHz, hearing", rate_case(384000, "hearing"), 0, must_exist=("out.wav",),
         must_not_exist=()),
    Case("unicode name", named("Ωmega ünïcode 音.wav"), 0, must_exist=("out.wav",),
         must_not_exist=()),
    Case("quotes in name", named("take \"1\" 'final'.wav"), 0, must_exist=("out.wav",),
         must_not_exist=()),
    Case("newline in name", named("line\nbreak.wav"), 0, must_exist=("out.wav",),
         must_not_exist=()),
    Case("missing output folder", c_missing_folder, 2, r"does not exist; create it first"),
    Case("existing output", c_existing_output, 2, r"already exists; pass --overwrite",
         must_not_exist=("err.wav", "r.json")),
    Case("output is the input", c_output_is_input, 2, r"is the input file"),
    Case("output is a symlink to the input", c_output_symlink_to_input, 2, r"is the input file"),
    Case("output is a hard link to the input", c_output_hardlink_to_input, 2,
         r"is the input file"),
    Case("error file is the input", c_error_is_input, 2, r"is the input file"),
    Case("lossy target", c_lossy_target, 2, r"lossy format"),
    Case("FLAC cannot hold 32 bits", c_flac_32, 2, r"at most 24 bits"),
    Case("bits out of range", bad_option("--bits", "40"), 2, r"--bits"),
    Case("unknown dither", bad_option("--dither", "gaussian"), 2, r"--dither"),
    Case("unknown quantizer", bad_option("--quantizer", "nearest"), 2, r"--quantizer"),
    Case("negative seed", bad_option("--seed", "-1"), 2, r"--seed"),
    Case("bad shaping list", bad_option("--shaping", "1.0,abc"), 2, r"shaping|coefficient"),
    Case("shaping file missing", bad_option("--shaping", "nofile.json"), 2, r"nofile\.json"),
    Case("report of unknown kind", bad_option("--report", "r.txt"), 2, r"\.json, \.html or \.md"),
    Case("read-only destination", c_read_only_destination, 2, r"read-only or no permission"),
    Case("disk fills up (file-size limit)", c_disk_full, 2, r"size limit",
         preexec=limit_file_size),
    Case("disk fills up (tiny file system)", c_full_file_system, 2, r"disk is full"),
]


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_fault_case(tmp_path, case):
    try:
        check_case(tmp_path, case)
    finally:
        while _CLEANUPS:
            subprocess.run(_CLEANUPS.pop(), capture_output=True)


def check_case(tmp_path, case):
    args = case.setup(tmp_path)
    before = tree_state(tmp_path)
    code, stdout, stderr = run(args, cwd=tmp_path, preexec=case.preexec)
    assert code == case.code, (stdout, stderr)
    assert "Traceback" not in stderr and "Traceback" not in stdout
    if case.code != 0:
        lines = [ln for ln in stderr.splitlines() if ln.strip()]
        assert len(lines) == 1, stderr
        assert lines[0].startswith("requant: error: ")
        assert __import__("re").search(case.message, lines[0]), lines[0]
    after = tree_state(tmp_path)
    # inputs (everything that was there before) untouched
    for rel, digest in before.items():
        assert after.get(rel) == digest, f"{rel} changed or vanished"
    assert part_files(tmp_path) == []
    for rel in case.must_not_exist:
        if rel not in before:
            assert not (tmp_path / rel).exists(), f"{rel} was left behind"
    for rel in case.must_exist:
        assert (tmp_path / rel).exists(), f"{rel} missing"


def test_truncated_and_lying_files_are_reported(tmp_path):
    # the documented outcome: the frames that are there are converted, with a warning
    lying_header(tmp_path)
    code, _, stderr = run(["convert", "lie.wav", "out.wav"], cwd=tmp_path)
    assert code == 0
    assert sf.info(tmp_path / "out.wav").frames == 4800


def test_memory_stays_bounded_when_header_declares_huge_size(tmp_path):
    lying_header(tmp_path)
    code = ("import resource, subprocess, sys; "
            "r = subprocess.run(sys.argv[1:], capture_output=True); "
            "print(r.returncode, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)")
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    out = subprocess.run([PY, "-c", code, PY, "-m", "requant", "convert", "lie.wav", "out.wav",
                          "--report", "r.json"], cwd=tmp_path, capture_output=True, text=True,
                         env=env, timeout=120)
    rc, rss_kb = map(int, out.stdout.split())
    assert rc == 0
    assert rss_kb < 400 * 1024  # far below the 2 GB the header declares


def wait_for(predicate, timeout=60.0):
    t0 = time.time()
    while time.time() - t0 < timeout:
        if predicate():
            return True
        time.sleep(0.02)
    return False


@pytest.mark.slow
def test_sigint_during_convert_leaves_nothing(tmp_path):
    # a long enough file that the conversion is still running when the signal arrives
    rate = 48000
    with sf.SoundFile(tmp_path / "long.wav", "w", rate, 2, "FLOAT") as f:
        block = np.random.default_rng(0).uniform(-0.5, 0.5, (rate * 10, 2)).astype(np.float32)
        for _ in range(18):  # 3 minutes
            f.write(block)
    before = tree_state(tmp_path)
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    proc = subprocess.Popen([PY, "-m", "requant", "convert", "long.wav", "out.wav", "--error",
                             "err.wav", "--report", "r.json", "--block-frames", "4096"],
                            cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, env=env)
    assert wait_for(lambda: part_files(tmp_path) and os.path.getsize(part_files(tmp_path)[0]) > 0)
    proc.send_signal(signal.SIGINT)
    stdout, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 130, stderr
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "interrupted" in lines[0] and "Traceback" not in stderr
    assert tree_state(tmp_path) == before
    assert part_files(tmp_path) == []


# --- batch ---------------------------------------------------------------------------------


def library(tmp):
    """A small tree with good files, broken ones, a non-audio file and a symlink loop."""
    src = tmp / "lib"
    (src / "sub" / "deeper").mkdir(parents=True)
    tone(src / "good.wav", frames=2400)
    tone(src / "sub" / "good.flac", frames=2400, subtype="PCM_24")
    tone(src / "sub" / "deeper" / "good.aiff", frames=2400, subtype="PCM_16", rate=44100)
    (src / "empty.wav").write_bytes(b"")
    (src / "garbage.wav").write_bytes(np.random.default_rng(1).bytes(3000))
    tone(src / "whole.wav", frames=2400, subtype="PCM_24")
    (src / "sub" / "cut.wav").write_bytes((src / "whole.wav").read_bytes()[:40])
    (src / "notes.txt").write_text("session notes\n")
    os.symlink("..", src / "sub" / "loop")  # a symlink loop
    return src


BATCH_CASES = [
    # name, extra args, profile text or None, exit code, message regex
    ("broken files in a tree", [], None, 1, None),
    ("bad profile: unknown key", ["--profile", "p.toml"], "bitz = 16\n", 2, r"bitz"),
    ("bad profile: wrong type", ["--profile", "p.toml"], 'bits = "sixteen"\n', 2, r"bits"),
    ("bad profile: out of range", ["--profile", "p.toml"], "bits = 99\n", 2, r"bits"),
    ("bad profile: unknown dither", ["--profile", "p.toml"], 'dither = "tpfd"\n', 2, r"tpdf"),
    ("bad profile: syntax", ["--profile", "p.toml"], "bits = = 3\n", 2, r"p\.toml"),
    ("missing profile", ["--profile", "nope.toml"], None, 2, r"nope\.toml"),
    ("batch: bits out of range", ["--bits", "0"], None, 2, r"--bits"),
    ("batch: unknown format", ["--format", "mp3"], None, 2, r"--format"),
]


@pytest.mark.parametrize("name, extra, profile, code, message", BATCH_CASES,
                         ids=[c[0] for c in BATCH_CASES])
def test_batch_fault_case(tmp_path, name, extra, profile, code, message):
    library(tmp_path)
    if profile is not None:
        (tmp_path / "p.toml").write_text(profile)
    before = tree_state(tmp_path)
    rc, stdout, stderr = run(["batch", "lib", "out", "--jobs", "2", *extra], cwd=tmp_path)
    assert rc == code, (stdout, stderr)
    assert "Traceback" not in stderr + stdout
    after = tree_state(tmp_path)
    for rel, digest in before.items():
        assert after.get(rel) == digest, rel
    assert part_files(tmp_path) == []
    if code == 2:
        lines = [ln for ln in stderr.splitlines() if ln.strip()]
        assert len(lines) == 1 and lines[0].startswith("requant: error: "), stderr
        assert __import__("re").search(message, lines[0]), lines[0]
        assert not (tmp_path / "out").exists() or not any((tmp_path / "out").rglob("*.wav"))
        return
    # the batch went on past the bad files: the good ones are there, the bad ones recorded
    out = tmp_path / "out"
    for rel in ("good.wav", "sub/good.flac", "sub/deeper/good.aiff", "whole.wav"):
        assert (out / rel).exists(), rel
    import json

    events = [json.loads(ln) for ln in (out / "requant-manifest.jsonl").read_text().splitlines()]
    assert events[-1]["status"] == "run"  # the run's own row comes last
    failed = {e["source"]: e["error"] for e in events if e["status"] == "failed"}
    assert set(failed) == {"empty.wav", "garbage.wav", "sub/cut.wav"}
    assert all(msg and "\n" not in msg for msg in failed.values())
    summary = json.loads((out / "requant-summary.json").read_text())
    assert "requant-summary" not in stderr and summary  # written
    assert "notes.txt" in json.dumps(summary)


def test_batch_missing_source_and_same_folder(tmp_path):
    rc, _, stderr = run(["batch", "nowhere", "out"], cwd=tmp_path)
    assert rc == 2 and len(stderr.strip().splitlines()) == 1 and "Traceback" not in stderr
    library(tmp_path)
    before = tree_state(tmp_path)
    rc, _, stderr = run(["batch", "lib", "lib"], cwd=tmp_path)
    assert rc == 2 and len(stderr.strip().splitlines()) == 1
    assert tree_state(tmp_path) == before


@pytest.mark.slow
def test_sigint_during_batch_leaves_nothing_partial(tmp_path):
    src = tmp_path / "lib"
    src.mkdir()
    block = np.random.default_rng(0).uniform(-0.5, 0.5, (48000, 2)).astype(np.float32)
    for i in range(120):
        sf.write(src / f"clip{i:03d}.wav", block, 48000, subtype="FLOAT")
    before = tree_state(src)
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    proc = subprocess.Popen([PY, "-m", "requant", "batch", "lib", "out", "--jobs", "2"],
                            cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, env=env, start_new_session=True)
    manifest = tmp_path / "out" / "requant-manifest.jsonl"
    assert wait_for(lambda: manifest.exists() and len(manifest.read_text().splitlines()) >= 5)
    os.killpg(proc.pid, signal.SIGINT)  # as a terminal's Ctrl-C: the whole group
    stdout, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 130, stderr
    errors = [ln for ln in stderr.splitlines() if ln.startswith("requant: error: ")]
    assert len(errors) == 1 and "interrupted" in errors[0] and "Traceback" not in stderr
    assert tree_state(src) == before
    assert part_files(tmp_path) == []
    # rerun resumes and completes
    rc, _, stderr = run(["batch", "lib", "out", "--jobs", "2"], cwd=tmp_path)
    assert rc == 0, stderr
    assert len(list((tmp_path / "out").glob("clip*.wav"))) == 120
