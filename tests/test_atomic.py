"""requant.audio_io.atomic: outputs appear whole or not at all.

The rule checked here is the one POSIX gives for crash-safe replacement
(write a temporary file, fsync it, then rename(2) it over the final name:
rename is atomic within a file system, IEEE Std 1003.1, rename()): every
fsync must come before the rename that publishes the file, also when a
CommitGroup defers them.
"""

import errno
import os

import numpy as np
import pytest
import soundfile as sf

from requant import library as batch
from requant.audio_io import atomic
from requant.audio_io.atomic import AtomicOutputs, CommitGroup, pending_path
from requant.library.executors.base import run_chunk
from requant.library.settings import BatchSettings
from requant.library.task import task_settings


def _write(outs, final, text):
    tmp = outs.path_for(final)
    with open(tmp, "w") as fh:
        fh.write(text)
    return tmp


def _trace(monkeypatch):
    calls = []
    real_fsync, real_replace = os.fsync, os.replace
    monkeypatch.setattr(atomic.os, "fsync", lambda fd: (calls.append("fsync"), real_fsync(fd)))
    monkeypatch.setattr(atomic.os, "replace",
                        lambda a, b: (calls.append("replace"), real_replace(a, b)))
    return calls


def test_plain_commit_flushes_then_renames(tmp_path, monkeypatch):
    calls = _trace(monkeypatch)
    with AtomicOutputs() as outs:
        _write(outs, tmp_path / "a.txt", "A")
    assert (tmp_path / "a.txt").read_text() == "A"
    assert calls == ["fsync", "replace"]


def test_group_defers_and_flushes_everything_before_any_rename(tmp_path, monkeypatch):
    calls = _trace(monkeypatch)
    with CommitGroup() as group:
        for name in "abc":
            with AtomicOutputs() as outs:
                tmp = _write(outs, tmp_path / f"{name}.txt", name)
            assert not (tmp_path / f"{name}.txt").exists()  # waits in the group
            assert pending_path(tmp_path / f"{name}.txt") == tmp
        assert calls == []
        group.flush()
    assert calls == ["fsync"] * 3 + ["replace"] * 3
    assert [(tmp_path / f"{n}.txt").read_text() for n in "abc"] == ["a", "b", "c"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.txt", "b.txt", "c.txt"]
    assert pending_path(tmp_path / "a.txt") == tmp_path / "a.txt"  # outside any group


def test_group_left_without_flush_leaves_nothing(tmp_path):
    with pytest.raises(KeyboardInterrupt):
        with CommitGroup():
            with AtomicOutputs() as outs:
                _write(outs, tmp_path / "a.txt", "A")
            raise KeyboardInterrupt
    assert list(tmp_path.iterdir()) == []


def test_failed_flush_removes_what_was_not_renamed(tmp_path, monkeypatch):
    real_replace = os.replace
    done = []

    def replace(a, b):
        if done:
            raise OSError(errno.ENOSPC, "No space left on device")
        done.append(b)
        real_replace(a, b)

    monkeypatch.setattr(atomic.os, "replace", replace)
    with CommitGroup() as group:
        for name in "ab":
            with AtomicOutputs() as outs:
                _write(outs, tmp_path / f"{name}.txt", name)
        with pytest.raises(OSError):
            group.flush()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.txt"]


def _clip_tasks(tmp_path, n=3):
    src, dst = tmp_path / "src", tmp_path / "dst"
    src.mkdir()
    dst.mkdir()
    for i in range(n):
        sf.write(src / f"c{i}.wav", np.full((480, 1), 0.25 * i, np.float32), 48000,
                 subtype="FLOAT")
    tasks = [{"source": f"c{i}.wav", "output": f"c{i}.wav",
              "source_path": str(src / f"c{i}.wav"), "output_path": str(dst / f"c{i}.wav"),
              "seed": i, "settings": task_settings(BatchSettings()), "overwrite": False,
              "expect_sha256": None, "reason": "new", "note": None, "size": 0}
             for i in range(n)]
    return dst, tasks


def test_batch_chunk_reports_a_failed_flush(tmp_path, monkeypatch):
    # a chunk whose outputs cannot be published says so per file; nothing partial stays
    dst, tasks = _clip_tasks(tmp_path)
    monkeypatch.setattr(atomic.os, "replace",
                        lambda a, b: (_ for _ in ()).throw(OSError(errno.ENOSPC, "No space")))
    results = run_chunk(batch.convert_task, tasks)
    assert [r["status"] for r in results] == ["failed"] * 3
    assert all("disk is full" in r["error"] for r in results)
    assert list(dst.iterdir()) == []


def test_local_pool_commits_in_the_parent(tmp_path, monkeypatch):
    # The workers leave their outputs temporary; this process flushes and renames them
    # (so no worker waits for the disk), each fsync before any rename of its chunk.
    dst, tasks = _clip_tasks(tmp_path, 4)
    calls = _trace(monkeypatch)
    ex = batch.ProcessExecutor(2)  # 4 files on 2 workers travel one per chunk
    ex.start()
    try:
        results = dict((item["source"], res) for item, res in ex.imap_unordered(
            batch.convert_task, tasks))
    finally:
        ex.close()
    assert sorted(results) == [t["source"] for t in tasks]
    assert all(r["status"] == "converted" for r in results.values())
    # every flush and rename happened here, in the parent, each fsync before its rename
    assert calls == ["fsync", "replace"] * 4
    assert sorted(p.name for p in dst.iterdir()) == [f"c{i}.wav" for i in range(4)]
    for t in tasks:
        assert batch.sha256_file(t["output_path"]) == results[t["source"]]["output_sha256"]


def test_local_pool_reports_a_failed_commit(tmp_path, monkeypatch):
    dst, tasks = _clip_tasks(tmp_path)
    monkeypatch.setattr(atomic.os, "replace",
                        lambda a, b: (_ for _ in ()).throw(OSError(errno.ENOSPC, "No space")))
    ex = batch.ProcessExecutor(2)
    ex.start()
    try:
        results = [res for _, res in ex.imap_unordered(batch.convert_task, tasks)]
    finally:
        ex.close()
    assert [r["status"] for r in results] == ["failed"] * 3
    assert all("disk is full" in r["error"] for r in results)
    assert list(dst.iterdir()) == []  # no output, no temporary file


def test_interrupt_inside_a_group_commit_never_removes_what_the_group_renames(tmp_path,
                                                                                 monkeypatch):
    # A Ctrl-C that lands just after a file joined the group must not let the
    # interrupted AtomicOutputs remove it: the group will publish it whole.
    real_add = CommitGroup.add

    def add_then_interrupt(self, pairs):
        real_add(self, pairs)
        raise KeyboardInterrupt

    monkeypatch.setattr(CommitGroup, "add", add_then_interrupt)
    with CommitGroup() as group:
        with pytest.raises(KeyboardInterrupt):
            with AtomicOutputs() as outs:
                _write(outs, tmp_path / "a.txt", "A")
        group.flush()
    assert (tmp_path / "a.txt").read_text() == "A"
    assert [p.name for p in tmp_path.iterdir()] == ["a.txt"]


def _group_of(folder, n):
    with CommitGroup() as group:
        for i in range(n):
            with AtomicOutputs() as outs:
                _write(outs, folder / f"f{i}.txt", f"file {i}")
        return group.detach()


def test_a_whole_file_system_flush_comes_before_every_rename(tmp_path, monkeypatch):
    # commit_pairs(whole_fs=True): one syncfs(2) of the file system (Linux), then the renames;
    # a syncfs that fails (-1) falls back to an fsync per file, before any rename too
    calls = _trace(monkeypatch)
    monkeypatch.setitem(atomic._SYNCFS, "fn", lambda fd: (calls.append("syncfs"), os.sync())[1]
                        or 0)
    atomic.commit_pairs(_group_of(tmp_path, 3), whole_fs=True)
    assert calls == ["syncfs", "replace", "replace", "replace"]
    assert [(tmp_path / f"f{i}.txt").read_text() for i in range(3)] == [
        "file 0", "file 1", "file 2"]
    calls.clear()
    monkeypatch.setitem(atomic._SYNCFS, "fn", lambda fd: (calls.append("syncfs"), -1)[1])
    (tmp_path / "again").mkdir()
    atomic.commit_pairs(_group_of(tmp_path / "again", 2), whole_fs=True)
    assert calls == ["syncfs", "fsync", "fsync", "replace", "replace"]


def test_a_slow_whole_file_system_flush_is_given_up(tmp_path, monkeypatch):
    # syncfs also waits for other programs' unwritten data: one slow call (here: any call,
    # the limit set to 0 s) sends this process back to an fsync per file for good
    calls = _trace(monkeypatch)
    monkeypatch.setattr(atomic, "_SYNCFS_SLOW_S", 0.0)
    monkeypatch.setitem(atomic._SYNCFS, "fn", lambda fd: (calls.append("syncfs"), 0)[1])
    atomic.commit_pairs(_group_of(tmp_path, 2), whole_fs=True)
    assert calls == ["syncfs", "replace", "replace"] and atomic._SYNCFS["fn"] is False
    calls.clear()
    atomic.commit_pairs(_group_of(tmp_path, 2), whole_fs=True)
    assert calls == ["fsync", "fsync", "replace", "replace"]
