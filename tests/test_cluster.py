"""Tests for ``requant batch --cluster`` on a real dask.distributed cluster.

A real scheduler and two worker processes (``dask scheduler`` and ``dask
worker``, each worker ``--nworkers 1 --nthreads 1`` under its nanny) are
started on 127.0.0.1 for this module and killed at its end; nothing is
mocked. Oracles outside the code under test: python-soundfile (libsndfile)
writes the sources and reads the outputs, hashlib hashes every output, the
dask scheduler itself reports its workers' addresses and process ids, and a
local run of the same batch is the reference that the cluster run must
match byte for byte (the batch's promise: same bytes wherever a file runs).

The scheduler runs with ``allowed-failures`` 1 (dask's default is 3, per
distributed/distributed.yaml): one worker death is still rescheduled, a
second death of the same task raises ``KilledWorker``. Stricter than the
default, so what passes here passes with it.
"""

import hashlib
import json
import os
import re
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from requant import library as B
from requant.library import WorkerLost, read_manifest, resolve_settings, run_batch

from helpers import cli_command, run_cli_timed

pytestmark = pytest.mark.slow  # a real dask cluster on 127.0.0.1

HERE = Path(__file__).parent
BIN = Path(sys.executable).parent
ADDRESS_RE = re.compile(r"^tcp://127\.0\.0\.1:\d+$")


def sha(path):
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def latest(dst):
    events, bad = read_manifest(dst / B.MANIFEST_NAME)
    return {e["source"]: e for e in events}, events, bad


def audio_outputs(dst):
    return sorted(p.relative_to(dst).as_posix() for p in dst.rglob("*")
                  if p.is_file() and p.suffix in (".wav", ".flac", ".aiff"))


def _wait(pred, timeout, what):
    deadline = time.monotonic() + timeout
    while not pred():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout} s waiting for {what}")
        time.sleep(0.02)


# --------------------------------------------------------------------------- the cluster

def _kill_group(proc):
    """SIGTERM the process group this test started, then SIGKILL what is left."""
    for sig, grace in ((signal.SIGTERM, 10), (signal.SIGKILL, 5)):
        try:
            os.killpg(proc.pid, sig)
        except ProcessLookupError:
            return
        try:
            proc.wait(timeout=grace)
        except subprocess.TimeoutExpired:
            continue
        if sig == signal.SIGTERM:  # the leader is gone; its children (the worker) may not be
            try:
                os.killpg(proc.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
        return


class Cluster:
    """A scheduler and two nanny-managed workers on loopback, and a client to ask them."""

    def __init__(self, root):
        self.root = root
        self.procs = []
        self.client = None

    def _spawn(self, args, name, env=None):
        log = open(self.root / f"{name}.log", "wb")
        proc = subprocess.Popen(args, stdout=log, stderr=subprocess.STDOUT,
                                start_new_session=True,  # its own group: killed as one
                                env=dict(os.environ, **(env or {})))
        log.close()
        self.procs.append(proc)
        return proc

    def start(self, workers=2, scheduler_env=None):
        from distributed import Client

        dask = BIN / "dask"
        sched_file = self.root / "scheduler.json"
        # --idle-timeout, --death-timeout: should this test process die without its
        # finalizer, the scheduler and the workers still end by themselves
        self._spawn([str(dask), "scheduler", "--host", "127.0.0.1", "--port", "0",
                     "--no-dashboard", "--idle-timeout", "300",
                     "--scheduler-file", str(sched_file)], "scheduler",
                    # PYTHONPATH: the scheduler and workers can import this module, for
                    # test_lost_file_is_worker_lost_and_alone (schedulers unpickle tasks too)
                    env={"DASK_DISTRIBUTED__SCHEDULER__ALLOWED_FAILURES": "1",
                         "PYTHONPATH": str(HERE), **(scheduler_env or {})})
        _wait(lambda: sched_file.exists() and sched_file.stat().st_size > 0, 60,
              "the dask scheduler")
        self.address = json.loads(sched_file.read_text())["address"]
        self.n_workers = workers
        for i in range(workers):
            self._spawn([str(dask), "worker", self.address, "--host", "127.0.0.1",
                         "--nworkers", "1", "--nthreads", "1", "--no-dashboard",
                         "--death-timeout", "60", "--local-directory", str(self.root)],
                        f"worker{i}", env={"PYTHONPATH": str(HERE)})
        self.client = Client(self.address, timeout=30, set_as_default=False)
        self.ready()

    def ready(self):
        """Wait (bounded) until the workers are connected; return {address: pid}."""
        self.client.wait_for_workers(self.n_workers, timeout=90)
        deadline = time.monotonic() + 30
        while True:
            pids = self.client.run(os.getpid)
            if len(pids) == self.n_workers or time.monotonic() > deadline:
                return pids
            time.sleep(0.2)

    def stop(self):
        if self.client is not None:
            try:
                self.client.close(timeout=10)
            except Exception:
                pass
        for proc in reversed(self.procs):
            _kill_group(proc)


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    pytest.importorskip("distributed", reason="the cluster extra: pip install 'requant[cluster]'")
    c = Cluster(tmp_path_factory.mktemp("dask"))
    try:
        c.start()
        yield c
    finally:
        c.stop()
        assert all(p.poll() is not None for p in c.procs), "a dask process outlived the tests"


# --------------------------------------------------------------------------- trees

def make_library(root, n_clips, *, frames=4800, seed=11):
    """Small clips in several banks and formats, a broken file, a text file."""
    rng = np.random.default_rng(seed)
    kinds = [("wav", "WAV", "PCM_24"), ("flac", "FLAC", "PCM_24"), ("aiff", "AIFF", "PCM_24"),
             ("wav", "WAV", "FLOAT")]
    for i in range(n_clips):
        ext, fmt, subtype = kinds[i % len(kinds)]
        p = root / f"bank{i % 3}" / f"clip{i:04d}.{ext}"
        p.parent.mkdir(parents=True, exist_ok=True)
        sf.write(p, 0.2 * rng.standard_normal((frames, 1 + i % 2)), 48000, subtype=subtype,
                 format=fmt)
    (root / "broken").mkdir(exist_ok=True)
    (root / "broken/garbage.wav").write_bytes(rng.integers(0, 256, 999, dtype=np.uint8).tobytes())
    (root / "notes.txt").write_text("not audio\n")
    return root


@pytest.fixture(scope="module")
def library(tmp_path_factory):
    return make_library(tmp_path_factory.mktemp("lib"), 40)


@pytest.fixture(scope="module")
def big_library(tmp_path_factory):
    # enough work for a kill to land mid-batch: 400 clips of 0.25 s, run with small blocks
    root = tmp_path_factory.mktemp("biglib")
    rng = np.random.default_rng(5)
    for i in range(400):
        p = root / f"bank{i % 4}" / f"clip{i:04d}.wav"
        p.parent.mkdir(parents=True, exist_ok=True)
        sf.write(p, 0.2 * rng.standard_normal((12000, 2)), 48000, subtype="PCM_24")
    return root


# --------------------------------------------------------------------------- tests

def test_cluster_run_matches_local_run(cluster, library, tmp_path):
    workers = set(cluster.ready())
    code_c, out_c, err_c, _ = run_cli_timed("batch", library, tmp_path / "c", "--seed", 99,
                                      "--cluster", cluster.address)
    code_l, out_l, err_l, _ = run_cli_timed("batch", library, tmp_path / "l", "--seed", 99,
                                      "--jobs", 1)
    assert code_c == code_l == 1, (err_c, err_l)  # the broken file fails in both
    assert f"dask cluster at {cluster.address} (2 workers, 2 threads)" in out_c

    got_c, events_c, bad_c = latest(tmp_path / "c")
    got_l, events_l, bad_l = latest(tmp_path / "l")
    assert bad_c == bad_l == 0
    assert len(events_c) == len(events_l) == 40 + 2  # one event per entry, none twice
    assert set(got_c) == set(got_l)
    for src, ev in got_c.items():
        ref = got_l[src]
        for key in ("status", "output", "seed", "settings_id", "output_sha256", "error"):
            assert ev.get(key) == ref.get(key), (src, key)
    assert got_c["broken/garbage.wav"]["status"] == "failed"  # isolated, the batch went on
    converted = [ev for ev in events_c if ev["status"] == "converted"]
    assert len(converted) == 40
    # the worker field is the dask worker's address; local events say host:pid
    assert {ev["worker"] for ev in converted} == workers  # both workers took files
    assert all(ADDRESS_RE.match(ev["worker"]) for ev in converted)
    assert not any(ADDRESS_RE.match(ev["worker"]) for ev in events_l)

    # the outputs, file by file: same names, same bytes, and readable by libsndfile
    names = audio_outputs(tmp_path / "c")
    assert names == audio_outputs(tmp_path / "l") and len(names) == 40
    for name in names:
        assert (tmp_path / "c" / name).read_bytes() == (tmp_path / "l" / name).read_bytes(), name
        assert sha(tmp_path / "c" / name) == got_c[name]["output_sha256"]
        assert sf.info(str(tmp_path / "c" / name)).subtype == "PCM_16"

    summ_c = json.loads((tmp_path / "c" / B.SUMMARY_NAME).read_text())
    summ_l = json.loads((tmp_path / "l" / B.SUMMARY_NAME).read_text())
    for key in ("counts", "settings", "settings_id", "run_seed", "failures", "not_audio"):
        assert summ_c[key] == summ_l[key], key
    assert summ_c["jobs"] == 2 and summ_c["executor"].startswith("dask cluster at tcp://")
    assert not list((tmp_path / "c").glob(".requant-cluster-check-*"))  # removed at the end

    # resume through the cluster: nothing converted twice
    code, out, err, _ = run_cli_timed("batch", library, tmp_path / "c", "--cluster",
                                      cluster.address)
    assert code == 1, err  # the broken file still fails
    assert "converted 0, up to date 40, failed 1" in out


def _children(pid):
    """Process ids whose parent is ``pid`` (Linux /proc)."""
    kids = []
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                stat = Path(f"/proc/{entry}/stat").read_text()
            except OSError:
                continue
            if int(stat.rsplit(")", 1)[1].split()[1]) == pid:
                kids.append(int(entry))
    return kids


@pytest.mark.parametrize("where", ["cluster", "local"])
def test_killed_worker_mid_batch(where, request, big_library, tmp_path):
    dst = tmp_path / "out"
    args = [*cli_command("batch", big_library, dst), "--seed", 3,
            "--block-frames", 128, "--quiet"]
    if where == "cluster":
        cluster = request.getfixturevalue("cluster")
        pids = cluster.ready()
        args += ["--cluster", cluster.address]
    else:
        args += ["--jobs", 2]
    proc = subprocess.Popen(list(map(str, args)), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        manifest = dst / B.MANIFEST_NAME

        def lines():
            return manifest.read_bytes().count(b"\n") if manifest.exists() else 0

        _wait(lambda: lines() >= 60 or proc.poll() is not None, 60, "the first manifest lines")
        time.sleep(0.05)  # land inside a chunk, not on its boundary
        if where == "cluster":
            victim = sorted(pids)[0]
            busy = cluster.client.processing([victim])[victim]  # chunks it holds: rescheduled
            os.kill(pids[victim], signal.SIGKILL)
        else:
            os.kill(_children(proc.pid)[0], signal.SIGKILL)
        at_kill = lines()
        out, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(timeout=10)
    assert at_kill < 400, "the batch ended before the kill: make it longer"
    assert proc.returncode == 0, err

    got, events, bad = latest(dst)
    assert int(bad) == 0  # the manifest parses
    assert {ev["status"] for ev in got.values()} == {"converted"} and len(got) == 400
    by_source = {}
    for ev in events:
        if ev["status"] == "converted":
            by_source.setdefault(ev["source"], set()).add(ev["output_sha256"])
    assert all(len(hashes) == 1 for hashes in by_source.values())  # never two results
    for src, ev in got.items():
        assert sha(dst / ev["output"]) == ev["output_sha256"], src
    if where == "cluster":
        workers = {ev["worker"] for ev in events}
        assert busy  # it held work when it died ...
        assert victim in workers  # ... it converted files before it died ...
        assert victim not in cluster.ready()  # ... and is gone (its nanny started a new one)
    # the same bytes as an undisturbed run in this process
    ref = run_batch(big_library, tmp_path / "ref", resolve_settings({"seed": 3}), jobs=1)
    assert ref["counts"]["converted"] == 400
    for ev in got.values():
        assert (dst / ev["output"]).read_bytes() == (tmp_path / "ref" / ev["output"]).read_bytes()
    # a rerun removes what the killed worker left and finds everything up to date
    again = run_batch(big_library, dst, resolve_settings({}), jobs=1)
    assert again["counts"]["up_to_date"] == 400 and again["counts"]["converted"] == 0

    assert not [p for p in dst.rglob(".*") if p.name.endswith(".requant-part")]


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.mark.parametrize("case", ["refused", "silent"])
def test_unreachable_scheduler_is_one_line(case, library, tmp_path):
    pytest.importorskip("distributed")
    listener = None
    if case == "refused":
        port = _free_port()  # nothing listens there any more
        reason = "connection refused"
    else:  # something accepts connections and never answers
        listener = socket.socket()
        listener.bind(("127.0.0.1", 0))
        listener.listen()
        port = listener.getsockname()[1]
        reason = "no dask answer within 1 s"
    try:
        code, out, err, seconds = run_cli_timed("batch", library, tmp_path / "out", "--cluster",
                                                f"tcp://127.0.0.1:{port}", "--cluster-timeout",
                                                1, timeout=60)
    finally:
        if listener is not None:
            listener.close()
    assert code == 2 and seconds < 10
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith(f"requant: error: cannot reach the dask scheduler at "
                               f"tcp://127.0.0.1:{port}: {reason}")
    assert "`dask scheduler`" in lines[0]
    assert not (tmp_path / "out").exists()  # nothing written


# A meta path finder that hides dask and distributed, as on a machine without the extra.
NO_DASK = """
import sys
class Hide:
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in ("dask", "distributed"):
            raise ImportError(f"No module named {name!r} (hidden by the test)")
        return None
sys.meta_path.insert(0, Hide())
from requant import cli
sys.exit(cli.main(sys.argv[1:]))
"""


def test_without_dask_says_what_to_install(library, tmp_path):
    proc = subprocess.run([sys.executable, "-c", NO_DASK, "batch", str(library),
                           str(tmp_path / "out"), "--cluster", "tcp://127.0.0.1:8786"],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert "pip install 'requant[cluster]'" in lines[0]
    assert not (tmp_path / "out").exists()


def test_cli_stays_free_of_dask():
    code = ("import sys, requant.cli, requant.library.executors.cluster; "
            "print(sorted({m.split('.')[0] for m in sys.modules} & {'dask', 'distributed'}))")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=60)
    assert proc.returncode == 0 and proc.stdout.strip() == "[]", proc.stderr


def test_jobs_and_cluster_do_not_combine(library, tmp_path):
    code, out, err, _ = run_cli_timed("batch", library, tmp_path / "out", "--jobs", 2, "--cluster",
                                "tcp://127.0.0.1:8786")
    assert code == 2 and "--jobs" in err and len(err.strip().splitlines()) == 1


@pytest.mark.parametrize("given, expected", [
    ("tcp://127.0.0.1:8786", "tcp://127.0.0.1:8786"),
    ("127.0.0.1:4000", "tcp://127.0.0.1:4000"),
    # default port 8786: distributed/scheduler.py, Scheduler.default_port
    ("tcp://render-01", "tcp://render-01:8786"),
    ("tls://[::1]:9000", "tls://[::1]:9000"),
])
def test_parse_address(given, expected):
    from requant.library.executors.cluster import parse_address

    assert parse_address(given)[0] == expected


@pytest.mark.parametrize("given", ["", "tcp://", "http://host:80", "host:0", "host:99999",
                                   "tcp://a b:1", "host:port"])
def test_parse_address_refuses(given):
    from requant.errors import UsageError
    from requant.library.executors.cluster import parse_address

    with pytest.raises(UsageError, match="--cluster"):
        parse_address(given)


def test_worker_check_names_the_shared_path_problem(tmp_path):
    from requant.library.executors.cluster import _check_worker, _environment

    (tmp_path / "src").mkdir()
    (tmp_path / "dst").mkdir()
    check = tmp_path / "dst" / ".check.requant-part"
    check.write_text("token-a")
    ctx = {"environment": _environment(), "token": "token-a", "src": str(tmp_path / "src"),
           "dst": str(tmp_path / "dst"), "check_path": str(check)}
    assert _check_worker(ctx, "tcp://w:1") is None
    msg = _check_worker(dict(ctx, token="token-b"), "tcp://w:1")  # another machine's DST
    assert "tcp://w:1" in msg and "destination" in msg and "same path" in msg
    msg = _check_worker(dict(ctx, src=str(tmp_path / "elsewhere")), "tcp://w:1")
    assert "source" in msg and "same path" in msg
    env = dict(_environment(), requant="0.0.0")
    msg = _check_worker(dict(ctx, environment=env), "tcp://w:1")
    assert "requant" in msg and "same requant environment" in msg


# Runs on the dask workers (they import this module through PYTHONPATH): a task
# that kills its worker process, as a file that crashes the audio library would.
def _crash_on_bad(item):
    if item["name"] == "bad":
        os._exit(9)
    return {"name": item["name"], "pid": os.getpid()}


def test_lost_file_is_worker_lost_and_alone(cluster):
    from requant.library.executors.cluster import DaskExecutor

    before = set(cluster.ready())
    items = [{"name": n, "size": 1} for n in ("a", "b", "bad", "c", "d", "e")]
    ex = DaskExecutor(cluster.address, max_chunk=2)
    ex.start()
    try:
        t0 = time.monotonic()
        got = {item["name"]: res for item, res in ex.imap_unordered(_crash_on_bad, items)}
        seconds = time.monotonic() - t0
    finally:
        ex.close()
    assert set(got) == {"a", "b", "bad", "c", "d", "e"} and seconds < 90
    assert isinstance(got["bad"], WorkerLost)  # dask's KilledWorker, after two deaths
    for n in "abcde":  # its chunk-mate was run again alone and succeeded
        assert got[n]["name"] == n and ADDRESS_RE.match(got[n]["worker"]), got[n]
    after = set(cluster.ready())  # the nannies brought the workers back ...
    assert not before & after  # ... after each had died (run alone, "bad" killed two)


HIDE_REQUANT = """
import sys
class Hide:
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in ("requant", "test_cluster"):
            raise ImportError(f"No module named {name!r} (hidden by the test)")
        return None
sys.meta_path.insert(0, Hide())
"""


def test_scheduler_without_requant_is_one_line(library, tmp_path):
    # Recent schedulers unpickle each task: a scheduler machine without requant
    # must stop the batch at start with one line, not fail every file.
    pytest.importorskip("distributed")
    hide = tmp_path / "hide"
    hide.mkdir()
    (hide / "sitecustomize.py").write_text(HIDE_REQUANT)
    c = Cluster(tmp_path)
    try:
        c.start(workers=1, scheduler_env={"PYTHONPATH": str(hide)})
        code, out, err, _ = run_cli_timed("batch", library, tmp_path / "out", "--cluster",
                                          c.address,
                                    timeout=90)
    finally:
        c.stop()
    assert all(p.poll() is not None for p in c.procs)
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert "cannot run requant's tasks" in lines[0] and "scheduler's machine" in lines[0]
    assert not (tmp_path / "out").exists()


def test_audit_tree_runs_on_the_batch_cluster_executor(cluster, tmp_path):
    # requant audit MASTER_DIR DELIVERED_DIR --cluster: the batch's DaskExecutor runs the
    # pairs; the rows equal a local run's, each stamped with the dask worker that made it
    from audit_fixtures import codes_for, programme, quantize

    rng = np.random.default_rng(3)
    mdir, ddir = tmp_path / "m", tmp_path / "d"
    mdir.mkdir()
    ddir.mkdir()
    for i in range(4):
        x = programme(2, 48000, rng).astype(np.float32)
        sf.write(mdir / f"take{i}.wav", x, 48000, subtype="FLOAT")
        q, _ = quantize(x.astype(np.float64), 16, rng)
        sf.write(ddir / f"take{i}.flac", codes_for(q, 16, offset=100 * i), 48000,
                 subtype="PCM_16")
    (ddir / "take9.wav").write_bytes(b"RIFF....WAVEjunk")
    (mdir / "take9.wav").write_bytes(b"RIFF....WAVEjunk")
    code_c, out_c, err_c, _ = run_cli_timed("audit", mdir, ddir, "--cluster", cluster.address,
                                            "--json", tmp_path / "c.json")
    code_l, out_l, err_l, _ = run_cli_timed("audit", mdir, ddir, "--jobs", 1, "--json",
                                            tmp_path / "l.json")
    assert code_c == code_l == 1, (err_c, err_l)  # the broken pair, and the rest went on
    rows_c = json.loads((tmp_path / "c.json").read_text())
    rows_l = json.loads((tmp_path / "l.json").read_text())
    workers = {r.pop("worker", None) for r in rows_c if r["status"] != "failed"}
    for r in rows_c:
        r.pop("worker", None)
        r.pop("worker_name", None)
    assert rows_c == rows_l  # the same figures to the last bit, wherever a pair ran
    assert workers <= set(cluster.ready()) and None not in workers
    assert [r["alignment"]["offset_frames"] for r in rows_l[:4]] == [0, 100, 200, 300]

