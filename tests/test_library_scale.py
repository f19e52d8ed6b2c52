"""Tests for a batch at library scale: changes not visits, compaction, the streaming plan.

Oracles outside the code under test: python-soundfile (libsndfile) writes the sources;
hashlib hashes outputs; the file system's own ``stat`` says what changed; Python's
``json`` module parses every manifest line (RFC 8259) and ``sorted`` orders names.
"""

import hashlib
import json
import os
import shutil

import numpy as np
import pytest
import soundfile as sf

from requant import library as B
from requant.errors import OutputError
from requant.library import read_manifest, resolve_settings, run_batch

from helpers import run_cli


def settings(**kw):
    return resolve_settings(dict({"seed": 5}, **kw))


def clips(root, names, frames=480, seed=1):
    rng = np.random.default_rng(seed)
    for name in names:
        p = root / name
        p.parent.mkdir(parents=True, exist_ok=True)
        sf.write(p, 0.2 * rng.standard_normal((frames, 1)), 48000, subtype="PCM_24")
    return root


def lines(dst):
    return (dst / B.MANIFEST_NAME).read_bytes().splitlines()


NAMES = [f"bank{i % 3}/clip{i:04d}.wav" for i in range(12)]


# --------------------------------------------------------------------------- changes, not visits

def test_a_rerun_that_changes_nothing_writes_one_row(tmp_path):
    src, dst = clips(tmp_path / "src", NAMES), tmp_path / "out"
    (src / "notes.txt").write_text("delivery notes\n")
    first = run_batch(src, dst, settings(), jobs=1)
    assert first["counts"]["converted"] == 12 and first["manifest_rows"] == 13
    before = lines(dst)
    outputs = {n: (dst / n).stat().st_mtime_ns for n in NAMES}
    again = run_batch(src, dst, settings(), jobs=1)
    after = lines(dst)
    assert after[:-1] == before  # appended, nothing rewritten
    run_row = json.loads(after[-1])  # the only new line: the run's own, with its counts
    assert run_row["status"] == "run" and run_row["rows"] == 0
    assert run_row["counts"]["up_to_date"] == 12 and run_row["counts"]["not_audio"] == 1
    assert again["counts"]["up_to_date"] == 12 and again["manifest_rows"] == 0
    assert again["counts"]["not_audio"] == 1 and again["not_audio"][0]["source"] == "notes.txt"
    assert {n: (dst / n).stat().st_mtime_ns for n in NAMES} == outputs
    # the library's view is unchanged: every file fine, one not audio
    assert again["library"] == first["library"]


def test_converted_rows_are_compact(tmp_path):
    # a 50-character path, as sample libraries name their files
    names = [f"Foley/Footsteps/Concrete/FS_Concrete_Walk_{i:03d}.wav" for i in range(6)]
    src, dst = clips(tmp_path / "src", names), tmp_path / "out"
    run_batch(src, dst, settings(), jobs=1)
    rows = [ln for ln in lines(dst) if json.loads(ln)["status"] == "converted"]
    assert len(rows) == 6 and max(map(len, rows)) <= 600
    ev = read_manifest(dst / B.MANIFEST_NAME)[0][0]
    # the reader fills in what a compact row leaves out
    assert ev["output"] == ev["source"] and ev["error"] is None and ev["warnings"] == []
    assert len(ev["settings_id"]) == 32
    details = B.read_details(dst)[(ev["run_id"], ev["source"])]
    assert details["figures"]["frames"] == 480 and "copied" in details["metadata"]


def test_touched_and_copied_files_record_their_new_identity_once(tmp_path):
    src, dst = clips(tmp_path / "src", NAMES), tmp_path / "out"
    run_batch(src, dst, settings(), jobs=1)
    os.utime(src / NAMES[0], ns=(10**18, 10**18))  # touched: same bytes, new time
    out = dst / NAMES[1]
    data = out.read_bytes()
    out.unlink()
    out.write_bytes(data)  # the output copied back: same bytes, new time
    n = len(lines(dst))
    second = run_batch(src, dst, settings(), jobs=1)
    new = [json.loads(ln) for ln in lines(dst)[n:]]
    assert second["counts"]["converted"] == 0 and second["counts"]["up_to_date"] == 12
    assert [r.get("source") for r in new] == sorted(NAMES[:2]) + [None]
    by = {r["source"]: r for r in new[:2]}
    assert by[NAMES[0]]["reason"] == "up to date"
    assert by[NAMES[0]]["source_identity"]["mtime_ns"] == 10**18
    st = out.stat()
    assert by[NAMES[1]]["output_stat"] == [st.st_size, st.st_mtime_ns]
    # hashlib is the oracle: the recorded output hash is still the file's
    assert by[NAMES[1]]["output_sha256"] == hashlib.sha256(out.read_bytes()).hexdigest()
    n = len(lines(dst))
    third = run_batch(src, dst, settings(), jobs=1)
    assert len(lines(dst)) == n + 1 and third["manifest_rows"] == 0


def test_a_failure_that_repeats_is_not_written_again(tmp_path):
    src, dst = clips(tmp_path / "src", NAMES[:2]), tmp_path / "out"
    (src / "bad.wav").write_bytes(b"RIFF\0\0\0\0WAVEjunk")
    first = run_batch(src, dst, settings(), jobs=1)
    assert first["counts"]["failed"] == 1
    n = len(lines(dst))
    again = run_batch(src, dst, settings(), jobs=1)
    assert again["counts"]["failed"] == 1 and again["failures"][0]["source"] == "bad.wav"
    assert again["manifest_rows"] == 0 and len(lines(dst)) == n + 1
    (src / "bad.wav").write_bytes(b"")  # a different failure: an empty file
    third = run_batch(src, dst, settings(), jobs=1)
    assert third["counts"]["failed"] == 1 and third["manifest_rows"] == 1


# --------------------------------------------------------------------------- compaction

def _history(src, dst):
    """A manifest with replaced rows: conversions, a touched source, a changed source, a
    source that now fails, a format change and back."""
    run_batch(src, dst, settings(), jobs=1)
    os.utime(src / NAMES[0], ns=(10**18, 10**18))
    clips(src, [NAMES[1]], seed=9)
    run_batch(src, dst, settings(), jobs=1)
    (src / NAMES[2]).write_bytes(b"RIFF\0\0\0\0WAVEbroken now")
    run_batch(src, dst, settings(), jobs=1)
    run_batch(src, dst, settings(format="flac"), jobs=1)
    (dst / "notes").mkdir(exist_ok=True)
    run_batch(src, dst, settings(), jobs=1)


def test_compact_keeps_what_resume_reads(tmp_path):
    src, dst = clips(tmp_path / "src", NAMES), tmp_path / "out"
    _history(src, dst)
    before = lines(dst)
    rows_before = [json.loads(ln) for ln in before]
    result = B.compact_manifest(dst)
    after = lines(dst)
    assert result["rows_before"] == len(before) and result["rows_after"] == len(after)
    assert len(after) < len(before)
    # kept byte for byte, in order (a subsequence of the old manifest)
    it = iter(before)
    assert all(any(line == old for old in it) for line in after)
    rows = [json.loads(ln) for ln in after]
    # every run row stays; per file the newest row stays
    assert sum(r["status"] == "run" for r in rows) == sum(r["status"] == "run"
                                                         for r in rows_before)
    newest = {r["source"]: r for r in rows_before if r["status"] != "run"}
    kept = [r for r in rows if r["status"] != "run"]
    assert all(r in kept for r in newest.values())
    # the failing file keeps its newest good row too, and the .flac outputs their rows
    assert any(r["source"] == NAMES[2] and r["status"] == "converted" for r in kept)
    assert any(r.get("output", "").endswith(".flac") for r in kept)

    # resume is the same: dry runs on the compacted manifest and on the original agree,
    # with the same settings (all up to date but the broken file) and with the format of
    # an earlier run (whose .flac outputs are still known as the batch's own)
    compacted = (dst / B.MANIFEST_NAME).read_bytes()
    plans = []
    for manifest in (compacted, b"\n".join(before) + b"\n"):
        (dst / B.MANIFEST_NAME).write_bytes(manifest)
        plans.append([run_batch(src, dst, settings(**kw), dry_run=True)
                      for kw in ({}, {"format": "flac"})])
    assert plans[0] == plans[1]
    same, flac = plans[0]
    assert same["counts"] == {"convert": 0, "skip": 11, "fail": 1}
    assert flac["counts"] == {"convert": 11, "skip": 0, "fail": 1}
    assert {i["reason"] for i in flac["items"] if i["action"] == "convert"} == {
        "settings changed"}
    # and a real run does the same after either
    copy = tmp_path / "copy"
    shutil.copytree(dst, copy)
    (dst / B.MANIFEST_NAME).write_bytes(compacted)
    run_c = run_batch(src, dst, settings(format="flac"), jobs=1)
    run_o = run_batch(src, copy, settings(format="flac"), jobs=1)
    for key in ("counts", "failures", "warnings", "manifest_rows"):
        assert run_c[key] == run_o[key], key


def test_compact_is_crash_safe(tmp_path, monkeypatch):
    from requant.library import compact as C

    src, dst = clips(tmp_path / "src", NAMES[:3]), tmp_path / "out"
    run_batch(src, dst, settings(), jobs=1)
    run_batch(src, dst, settings(bits=12), jobs=1)
    before = (dst / B.MANIFEST_NAME).read_bytes()
    real = C.iter_manifest
    calls = []

    def failing(path, damage=None):
        calls.append(path)
        for i, row in enumerate(real(path, damage)):
            if len(calls) == 2 and i == 2:  # the second pass, half-way through the writing
                raise OSError(28, "No space left on device")
            yield row

    monkeypatch.setattr(C, "iter_manifest", failing)
    with pytest.raises(OutputError, match="the old one is kept"):
        B.compact_manifest(dst)
    assert (dst / B.MANIFEST_NAME).read_bytes() == before  # untouched
    assert not [p for p in dst.iterdir() if p.name.endswith(".requant-part")]


@pytest.mark.slow
def test_compact_from_the_command_line(tmp_path):
    src, dst = clips(tmp_path / "src", NAMES[:3]), tmp_path / "out"
    for bits in (16, 12):
        code, _, err = run_cli("batch", src, dst, "--seed", 1, "--bits", bits, "--jobs", 1, "-q")
        assert code == 0, err
    code, out, err = run_cli("batch", "--compact", dst)
    assert code == 0, err
    assert "rows -> " in out and len(lines(dst)) == 3 + 2  # the newest row per file, 2 runs
    code, _, err = run_cli("batch", src, "--compact", dst)
    assert code == 2 and "takes the destination folder alone" in err
    code, _, err = run_cli("batch", "--compact", tmp_path / "nowhere")
    assert code == 2 and "not a folder" in err and "Traceback" not in err


# --------------------------------------------------------------------------- the streaming plan

def test_folder_walk_is_the_sorted_walk(tmp_path):
    from requant.library.tree import WalkCount, iter_folders, walk_tree

    root = tmp_path / "t"
    names = ["b.wav", "b/x.wav", "b.c/y.wav", "a/z/q.wav", "a/z.wav", "a b.wav", "ab/c.txt",
             "a/.hidden.wav", ".git/config", "skip/me.wav"]
    for n in names:
        (root / n).parent.mkdir(parents=True, exist_ok=True)
        (root / n).write_bytes(b"x")
    (root / "link").symlink_to(root / "a")
    count = WalkCount()
    folders = list(iter_folders(root, exclude=["skip/*"], count=count))
    flat = [e["source"] for _, entries in folders for e in entries]
    # each folder before its subfolders; within a folder, sorted names
    assert [f for f, _ in folders] == ["", "a/", "a/z/", "ab/", "b/", "b.c/", "skip/"]
    assert flat == ["a b.wav", "b.wav", "link/", "a/.hidden.wav", "a/z.wav", "a/z/q.wav",
                    "ab/c.txt", "b/x.wav", "b.c/y.wav"]
    assert count.excluded == 1
    entries, excluded = walk_tree(root, exclude=["skip/*"])
    assert [e["source"] for e in entries] == sorted(flat) and excluded == 1


def test_the_resume_index_reads_rows_not_trusts_them(tmp_path):
    from requant.library.resume import FITS, REASONS, ResumeIndex

    manifest = tmp_path / "m.jsonl"
    good = {"source": "a.wav", "status": "converted", "settings_id": "f" * 64,  # an old 64-digit id
            "output_sha256": "0" * 64, "output_stat": [10, 20],
            "source_identity": {"size": 1, "mtime_ns": 2, "sha256": "1" * 64}}
    rows = [good, dict(good, source="b.wav", output="b.flac"), {"source": "a.wav",
            "status": "failed", "error": "x"}, "not json", dict(good, source="c.wav",
            settings_id="e" * 32)]
    manifest.write_text("\n".join(r if isinstance(r, str) else json.dumps(r) for r in rows)
                        + "\n")
    with ResumeIndex(str(manifest), sid="f" * 32, fmt="same") as index:
        damage = index.build()
        assert int(damage) == 1 and damage.first_line == 4
        found = index.lookup(["a.wav", "b.wav", "c.wav", "d.wav"])
        assert set(found) == {"a.wav", "b.wav", "c.wav"}
        a = found["a.wav"]
        assert a.fits == FITS and a.src == (1, 2) and a.out == (10, 20)
        assert a.cls == 0 and a.last > a.good  # the failure is the latest row, not the good one
        assert index.row(a.good, "a.wav")["status"] == "converted"
        assert index.row(a.good, "b.wav") is None  # checked by name
        assert REASONS[found["b.wav"].fits] == "output name changed"
        assert REASONS[found["c.wav"].fits] == "settings changed"
        assert index.written(["a.wav", "b.flac", "b.wav"]) == {"a.wav", "b.flac"}


def test_claims_are_streamed_and_kept_only_while_unrecorded(tmp_path):
    from requant.library.state import STATE_NAME, iter_claims, read_state, write_state

    names = [f"f{i}/\udcff{i}.wav" if i % 7 == 0 else f"f{i}/x.wav" for i in range(3000)]
    write_state(str(tmp_path), 42, iter(names))
    assert list(iter_claims(str(tmp_path))) == names
    doc = json.loads((tmp_path / STATE_NAME).read_text(encoding="utf-8"))  # strict JSON
    assert doc["run_seed"] == 42 and len(doc["claimed_outputs"]) == 3000
    assert read_state(str(tmp_path), claims=True)["claimed_outputs"] == names

    # a run interrupted after a few files keeps its other claims; the next run drops them
    src, dst = clips(tmp_path / "src", NAMES), tmp_path / "out"

    class Stopping(B.SerialExecutor):
        def imap_unordered(self, fn, items, tick=None):
            for i, pair in enumerate(super().imap_unordered(fn, items, tick)):
                if i == 4:
                    raise KeyboardInterrupt
                yield pair

    summary = run_batch(src, dst, settings(), executor=Stopping())
    assert summary["interrupted"] and summary["counts"]["not_started"] == 8
    claimed = set(iter_claims(str(dst)))
    recorded = {e["output"] for e in read_manifest(dst / B.MANIFEST_NAME)[0]}
    assert len(claimed) == 8 and not claimed & recorded and claimed | recorded == set(NAMES)
    run_batch(src, dst, settings(), jobs=1)
    assert list(iter_claims(str(dst))) == []


@pytest.mark.parametrize("folder", [B.PAGES_DIR, B.RUNS_DIR])
def test_a_source_folder_named_like_the_index_pages_or_the_details(tmp_path, folder):
    src, dst = clips(tmp_path / "src", [f"{folder}/a.wav", "b.wav"]), tmp_path / "out"
    summary = run_batch(src, dst, settings(), jobs=1)
    assert summary["counts"]["converted"] == 1 and summary["counts"]["failed"] == 1
    assert f"where the batch keeps its {folder!r}" in summary["failures"][0]["error"]


def test_detail_pages_list_a_folder_in_name_order(tmp_path):
    import re

    src, dst = clips(tmp_path / "src", ["a.wav", "d.wav", "sub/e.wav"]), tmp_path / "out"
    (src / "b.txt").write_text("notes")
    (src / "c.wav").write_bytes(b"RIFF\0\0\0\0WAVEjunk")
    names = ["a.wav", "b.txt", "c.wav", "d.wav", "sub/e.wav"]  # sorted() order, the walk's too
    for _ in range(2):  # converted, then up to date, a repeated failure, an unchanged note
        run_batch(src, dst, settings(), jobs=1)
        (page,) = (dst / B.PAGES_DIR).glob("p-*.html")
        rows = re.findall(r'<tr class="\w+"><td class="n">\d+</td><td class="status">[^<]*</td>'
                          r"<td>(?:<a [^>]*>)?([^<]+)", page.read_text())
        assert rows == names == sorted(names)
