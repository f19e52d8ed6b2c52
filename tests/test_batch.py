"""Tests for requant batch: tree walk, manifest, resume, metadata, executors, CLI.

Oracles outside the code under test: python-soundfile (libsndfile) reads every
output; hashlib computes every hash; WAV fixtures with metadata are built byte
by byte from their specifications (named beside each builder) and the outputs
are walked by a naive chunk walker kept in this file.
"""

import hashlib
import json
import os
import re
import signal
import struct
import subprocess
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from requant import library as B
from requant.errors import UsageError
from requant.library import (
    DEFAULT_SETTINGS,
    ProcessExecutor,
    WorkerLost,
    derive_seed,
    read_manifest,
    resolve_settings,
    run_batch,
    settings_id,
)

# --------------------------------------------------------------------------- byte builders
from helpers import chunk, cli_command, fmt_pcm, pcm24, run_cli, u32  # noqa: E402
from helpers import riff_wave as _riff_wave  # noqa: E402


def riff_wave(chunks):
    return _riff_wave(chunks)[0]


def smpl_payload():
    # 'smpl' sampler chunk (Microsoft's 1994 RIFF update, layout from memory): nine
    # uint32 (manufacturer, product, sample period ns, MIDI unity note, pitch
    # fraction, SMPTE format, SMPTE offset, loop count, sampler-data bytes), then
    # 24-byte loops (id, type, start, end, fraction, play count).
    head = struct.pack("<9I", 0, 0, 20833, 60, 0, 0, 0, 1, 0)
    return head + struct.pack("<6I", 7, 0, 100, 899, 0, 0)


def cue_payload():
    # 'cue ', RIFF 1991: dwCuePoints, then per point dwName, dwPosition,
    # fccChunk, dwChunkStart, dwBlockStart, dwSampleOffset.
    return u32(1) + struct.pack("<II4sIII", 1, 0, b"data", 0, 0, 100)


def list_info():
    # LIST/INFO, RIFF 1991: list type 'INFO', then ZSTR subchunks (INAM = title).
    return b"INFO" + chunk(b"INAM", b"Loop one\0")


def list_adtl():
    # LIST/adtl, RIFF 1991: 'labl' = dwName + ZSTR label text.
    return b"adtl" + chunk(b"labl", u32(1) + b"Attack\0")


HISTORY = b"A=PCM,F=48000,W=24,M=stereo,T=original\r\n"


def bext_payload():
    # EBU Tech 3285 v2 fixed part (602 bytes): Description 256, Originator 32,
    # OriginatorReference 32, OriginationDate 10, OriginationTime 8,
    # TimeReference 2 x uint32, Version uint16, UMID 64, 5 x int16 loudness
    # fields, Reserved 180; then CodingHistory rows (EBU R 98).
    fixed = struct.pack("<256s32s32s10s8sIIH64s5h180s", b"Loop one", b"requant tests",
                        b"REF-0042", b"2024-05-01", b"12:00:00", 4800, 0, 2, bytes(64),
                        0, 0, 0, 0, 0, b"")
    assert len(fixed) == 602
    return fixed + HISTORY


IXML = b'<?xml version="1.0" encoding="UTF-8"?><BWFXML><IXML_VERSION>1.5</IXML_VERSION></BWFXML>'
META_IDS = ["bext", "iXML", "smpl", "cue ", "LIST", "LIST", "zzzz"]


def metadata_wav(rng, frames=4800):
    codes = rng.integers(-(2**22), 2**22, size=(frames, 2))
    return riff_wave([
        (b"fmt ", fmt_pcm(2, 48000, 24)),
        (b"bext", bext_payload()),
        (b"iXML", IXML),
        (b"data", pcm24(codes)),
        (b"smpl", smpl_payload()),
        (b"cue ", cue_payload()),
        (b"LIST", list_info()),
        (b"LIST", list_adtl()),
        (b"zzzz", b"\x01\x02\x03\x04\x05"),  # unknown id, odd size: RIFF 1991 says copy it
    ])


def walk(blob):
    """Naive chunk walk (oracle): [(id, payload)], checking sizes and pad bytes."""
    assert blob[:4] == b"RIFF" and blob[8:12] == b"WAVE"
    assert struct.unpack_from("<I", blob, 4)[0] == len(blob) - 8
    pos, out = 12, []
    while pos < len(blob):
        cid, size = struct.unpack_from("<4sI", blob, pos)
        out.append((cid.decode("ascii"), blob[pos + 8:pos + 8 + size]))
        pos += 8 + size + (size & 1)
    assert pos == len(blob)
    return out


# --------------------------------------------------------------------------- the tree

GOOD = {  # relative path -> (rate, channels, subtype, format)
    "drums/kick.wav": (44100, 2, "PCM_24", "WAV"),
    "drums/snare.flac": (48000, 1, "PCM_24", "FLAC"),
    "fx/deep/rumble.aiff": (96000, 2, "PCM_24", "AIFF"),
    "fx/beep.wav": (8000, 1, "FLOAT", "WAV"),
    "misc/tone.caf": (48000, 1, "PCM_24", "CAF"),
}
BROKEN = ["broken/garbage.wav", "broken/empty.wav", "broken/truncated.wav"]
OTHER = ["notes.txt", "art/cover.png", ".DS_Store"]


def make_tree(root, seed=7):
    rng = np.random.default_rng(seed)
    for rel, (rate, ch, subtype, fmt) in GOOD.items():
        p = root / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        n = rate // 20  # 50 ms: quick
        x = 0.25 * rng.standard_normal((n, ch))
        sf.write(p, x, rate, subtype=subtype, format=fmt)
    (root / "loops").mkdir()
    (root / "loops/loop.wav").write_bytes(metadata_wav(rng))
    (root / "broken").mkdir()
    (root / "broken/garbage.wav").write_bytes(rng.integers(0, 256, 3000, dtype=np.uint8).tobytes())
    (root / "broken/empty.wav").write_bytes(b"")
    (root / "broken/truncated.wav").write_bytes((root / "drums/kick.wav").read_bytes()[:30])
    (root / "notes.txt").write_text("delivery notes\n")
    (root / "art").mkdir()
    (root / "art/cover.png").write_bytes(b"\x89PNG\r\n\x1a\n")
    (root / ".DS_Store").write_bytes(b"\0" * 10)
    (root / "fx/again").symlink_to("..")  # a link loop: must not hang the walk
    return root


@pytest.fixture(scope="module")
def tree(tmp_path_factory):
    return make_tree(tmp_path_factory.mktemp("lib"))


def settings(**kw):
    return resolve_settings(dict({"seed": 1234}, **kw))


def latest_by_source(dst):
    """The manifest's events, each converted one with its figures and metadata from its
    run's details file (the compact rows leave them out)."""
    events, bad = read_manifest(dst / B.MANIFEST_NAME)
    details = B.read_details(dst)
    for e in events:
        e.update(details.get((e.get("run_id"), e["source"]), {}))
    return {e["source"]: e for e in events}, events, bad


def sha(path):
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


BOOKKEEPING = {B.MANIFEST_NAME, B.SUMMARY_NAME, B.INDEX_NAME, B.STATE_NAME, B.LOCK_NAME,
               B.RUNS_DIR, B.PAGES_DIR}


def audio_outputs(dst):
    return sorted(p.relative_to(dst).as_posix() for p in dst.rglob("*")
                  if p.is_file() and p.relative_to(dst).parts[0] not in BOOKKEEPING)


# --------------------------------------------------------------------------- the walk and outcomes

def test_tree_outcomes(tree, tmp_path):
    dst = tmp_path / "out"
    summary = run_batch(tree, dst, settings(), jobs=1)
    latest, events, bad = latest_by_source(dst)
    assert int(bad) == 0
    assert summary["counts"]["converted"] == len(GOOD) + 1
    assert summary["counts"]["failed"] == len(BROKEN)
    for rel in BROKEN:
        ev = latest[rel]
        assert ev["status"] == "failed"
        assert ev["error"].startswith(repr(str(tree / rel))) and "\n" not in ev["error"]
        assert not (dst / rel).exists()
    for rel in OTHER + ["fx/again/"]:
        assert latest[rel]["status"] == "skipped" and latest[rel]["output"] is None
        assert latest[rel]["reason"]
    assert {f["source"] for f in summary["failures"]} == set(BROKEN)
    assert {n["source"] for n in summary["not_audio"]} == set(OTHER) | {"fx/again/"}
    # mirrored tree; .caf (not writable by requant) became .wav with a note
    expected = sorted([r for r in GOOD if not r.endswith(".caf")]
                      + ["misc/tone.wav", "loops/loop.wav"])
    assert audio_outputs(dst) == expected
    assert any("written as WAV" in n for n in latest["misc/tone.caf"]["notes"])
    for rel, (rate, ch, _, _fmt) in GOOD.items():
        out = dst / (rel[:-4] + ".wav" if rel.endswith(".caf") else rel)
        info = sf.info(out)
        # libsndfile is the oracle for the container: rate, channels, frames kept, 16-bit
        assert (info.samplerate, info.channels, info.frames) == (rate, ch, rate // 20)
        assert info.subtype == "PCM_16"
        # round + TPDF keeps |output - input| <= 1.5 LSB (rounding 0.5 LSB plus
        # 2 LSB peak-to-peak TPDF; Lipshitz, Wannamaker & Vanderkooy 1992), so the
        # output really is this source, requantized
        x, _ = sf.read(tree / rel, always_2d=True)
        y, _ = sf.read(out, always_2d=True)
        assert np.max(np.abs(y - np.clip(x, -1, 1 - 2**-15))) <= 1.5 * 2**-15


def test_manifest_fields(tree, tmp_path):
    dst = tmp_path / "out"
    summary = run_batch(tree, dst, settings(), jobs=1)
    events, bad = latest_by_source(dst)[1:]
    lines = (dst / B.MANIFEST_NAME).read_text().splitlines()
    durations = {r: (v[0] // 20) / v[0] for r, v in GOOD.items()} | {"loops/loop.wav": 0.1}
    assert int(bad) == 0
    # one row per entry, then the run's own row with its counts
    assert len(lines) - 1 == len(events) == len(GOOD) + 1 + len(BROKEN) + len(OTHER) + 1
    run_row = json.loads(lines[-1])
    assert run_row["status"] == "run" and run_row["counts"] == summary["counts"]
    assert run_row["run_id"] == summary["run_id"] and run_row["rows"] == len(events)
    for ev in events:
        for key in ("source", "output", "status", "error", "settings_id", "timestamp", "worker"):
            assert key in ev
        assert ev["timestamp"].endswith("+00:00")
        assert ev["settings_id"] == summary["settings_id"]
        if ev["status"] == "converted":
            # hashlib is the oracle for output_sha256
            assert ev["output_sha256"] == sha(dst / ev["output"])
            assert isinstance(ev["snr_db"], float) and ev["seconds"] > 0
            assert ev["duration_s"] == pytest.approx(durations[ev["source"]])
            assert ev["worker"].endswith(f":{os.getpid()}")  # --jobs 1: this process
            # the figures are in the run's details file, keyed by the row's run and source
            assert ev["figures"]["sample_rate"] == (GOOD.get(ev["source"]) or (48000,))[0]
            assert ev["output_stat"] == [(dst / ev["output"]).stat().st_size,
                                         (dst / ev["output"]).stat().st_mtime_ns]
            # the documented seed: sha256(run seed, NUL, path), first 8 bytes, 63 bits
            raw = b"1234\0" + ev["source"].encode()
            assert ev["seed"] == int.from_bytes(hashlib.sha256(raw).digest()[:8], "big") >> 1
    saved = json.loads((dst / B.SUMMARY_NAME).read_text())
    assert saved["counts"] == summary["counts"] and saved["run_seed"] == 1234


def test_unreadable_folder_is_a_failure(tmp_path, tree, monkeypatch):
    # running as root, permissions cannot hide a folder: make scandir fail as it would
    real = os.scandir
    locked = str(tree / "fx")

    def scandir(path="."):
        if os.fspath(path) == locked:
            raise PermissionError(13, "Permission denied", locked)
        return real(path)

    monkeypatch.setattr(os, "scandir", scandir)
    summary = run_batch(tree, tmp_path / "out", settings(exclude=["broken/*"]), jobs=1)
    assert [f["source"] for f in summary["failures"]] == ["fx/"]
    assert "cannot be read (Permission denied)" in summary["failures"][0]["error"]
    assert summary["counts"]["converted"] == len(GOOD) + 1 - 2  # the two files under fx/


def test_symlinked_file_is_read(tmp_path, tree):
    src = tmp_path / "src"
    src.mkdir()
    (src / "link.wav").symlink_to(tree / "drums/kick.wav")
    summary = run_batch(src, tmp_path / "out", settings(), jobs=1)
    assert summary["counts"]["converted"] == 1
    assert sf.info(tmp_path / "out/link.wav").frames == 44100 // 20


# --------------------------------------------------------------------------- metadata

def test_wav_chunks_byte_exact(tree, tmp_path):
    dst = tmp_path / "out"
    run_batch(tree, dst, settings(include=["loops/*"]), jobs=1)
    src_chunks = walk((tree / "loops/loop.wav").read_bytes())
    out_chunks = walk((dst / "loops/loop.wav").read_bytes())
    src_meta = [(c, p) for c, p in src_chunks if c not in ("fmt ", "data", "bext")]
    out_meta = [(c, p) for c, p in out_chunks if c not in ("fmt ", "data", "bext")]
    assert out_meta == src_meta  # smpl, cue, LIST INFO, LIST adtl, iXML, unknown: byte for byte
    (src_bext,) = [p for c, p in src_chunks if c == "bext"]
    (out_bext,) = [p for c, p in out_chunks if c == "bext"]
    assert out_bext.startswith(src_bext)  # fixed part and old history kept
    row = out_bext[len(src_bext):].decode("ascii")
    # EBU R 98 row: A=<algorithm>,F=<Hz>,W=<word length>,M=<mode>,T=<text>, CR LF (Tech 3285)
    assert re.fullmatch(r"A=PCM,F=48000,W=16,M=stereo,T=[ -+\--~]*\r\n", row), row
    ev = latest_by_source(dst)[0]["loops/loop.wav"]
    assert sorted(ev["metadata"]["copied"]) == sorted(c for c in META_IDS if c != "bext")
    assert ev["metadata"]["rewritten"] == ["bext"] and ev["metadata"]["dropped"] == []
    assert "metadata-dropped" not in ev["warning_kinds"]
    assert sf.info(dst / "loops/loop.wav").frames == 4800


def test_flac_records_dropped_chunks(tree, tmp_path):
    dst = tmp_path / "out"
    summary = run_batch(tree, dst, settings(include=["loops/*"], format="flac"), jobs=1)
    ev = latest_by_source(dst)[0]["loops/loop.wav"]
    assert ev["output"] == "loops/loop.flac" and sf.info(dst / "loops/loop.flac").format == "FLAC"
    assert sorted(ev["metadata"]["dropped"]) == sorted(META_IDS)
    assert "metadata-dropped" in ev["warning_kinds"]
    assert any("cannot be stored in FLAC" in w for w in ev["warnings"])
    assert [w["source"] for w in summary["warnings"]] == ["loops/loop.wav"]


@pytest.mark.parametrize("src_fmt, out_format", [("FLAC", "same"), ("AIFF", "same"),
                                                   ("WAV", "flac"), ("FLAC", "wav")])
def test_text_tags_kept(tmp_path, src_fmt, out_format):
    src = tmp_path / "src"
    src.mkdir()
    tags = {"title": "Take 5", "artist": "Foley team", "comment": "door slam"}
    path = src / f"slam.{src_fmt.lower()}"
    with sf.SoundFile(path, "w", 8000, 1, "PCM_24", format=src_fmt) as f:
        for k, v in tags.items():
            setattr(f, k, v)
        f.write(np.full(400, 1000 << 8, dtype=np.int32))
    run_batch(src, tmp_path / "out", settings(format=out_format), jobs=1)
    (out,) = [p for p in (tmp_path / "out").iterdir() if p.name.startswith("slam.")]
    # libsndfile reads the tags back (its own string metadata per container)
    with sf.SoundFile(out) as f:
        assert {k: v for k, v in f.copy_metadata().items() if k in tags} == tags


@pytest.mark.parametrize("dither, analyze, flagged", [
    ("none", False, True), ("none", True, True), ("tpdf", True, False), ("tpdf", False, False)])
def test_signal_correlated_error_flagged(tmp_path, dither, analyze, flagged):
    # A quiet sine (about 10 LSB at 16 bits) rounded without dither leaves an error
    # made of harmonics of the signal; TPDF dither makes the error's mean and power
    # independent of the signal (Lipshitz, Wannamaker & Vanderkooy 1992, JAES 40(5)).
    src = tmp_path / "src"
    src.mkdir()
    t = np.arange(24000) / 48000
    sf.write(src / "fade.wav", 10 * 2**-15 * np.sin(2 * np.pi * 997 * t), 48000,
             subtype="FLOAT")
    summary = run_batch(src, tmp_path / "out", settings(dither=dither, analyze=analyze), jobs=1)
    ev = latest_by_source(tmp_path / "out")[0]["fade.wav"]
    assert ("correlated-error" in ev["warning_kinds"]) == flagged
    assert (summary["warnings"] != []) == flagged
    if analyze:
        assert ev["figures"]["correlated_error_fraction"] is not None


# --------------------------------------------------------------------------- resume

def test_resume_does_nothing_twice(tree, tmp_path):
    dst = tmp_path / "out"
    s = settings(exclude=["broken/*"])
    first = run_batch(tree, dst, s, jobs=1)
    outs = audio_outputs(dst)
    stamps = {o: (dst / o).stat().st_mtime_ns for o in outs}
    again = run_batch(tree, dst, s, jobs=1)
    assert again["counts"]["converted"] == 0
    assert again["counts"]["up_to_date"] == first["counts"]["converted"]
    assert {o: (dst / o).stat().st_mtime_ns for o in outs} == stamps  # nothing rewritten

    kick, snare = dst / "drums/kick.wav", dst / "drums/snare.flac"
    kick_hash = sha(kick)
    kick.unlink()
    blob = bytearray(snare.read_bytes())
    blob[-1] ^= 0xFF
    snare.write_bytes(bytes(blob))
    third = run_batch(tree, dst, s, jobs=1)
    latest = latest_by_source(dst)[0]
    assert third["counts"]["converted"] == 2
    assert latest["drums/kick.wav"]["reason"] == "output missing"
    assert latest["drums/snare.flac"]["reason"] == "output changed since it was written"
    assert sha(kick) == kick_hash  # same seed, same bits

    changed = run_batch(tree, dst, s.replace(bits=12), jobs=1)
    assert changed["counts"]["converted"] == first["counts"]["converted"]
    assert changed["settings_id"] != first["settings_id"]
    assert {e["reason"] for e in latest_by_source(dst)[0].values()
            if e["status"] == "converted"} == {"settings changed"}


def test_run_seed_is_reused(tree, tmp_path):
    dst = tmp_path / "out"
    s = resolve_settings({"include": ["drums/*"]})  # no seed: drawn, then recorded
    first = run_batch(tree, dst, s, jobs=1)
    second = run_batch(tree, dst, s, jobs=1)
    assert first["seed_origin"] == "fresh" and second["seed_origin"] == "previous run"
    assert second["run_seed"] == first["run_seed"] and second["counts"]["up_to_date"] == 2


def test_existing_file_not_ours_is_refused(tree, tmp_path):
    dst = tmp_path / "out"
    (dst / "drums").mkdir(parents=True)
    (dst / "drums/kick.wav").write_bytes(b"somebody else's take")
    s = settings(include=["drums/*"])
    summary = run_batch(tree, dst, s, jobs=1)
    assert [f["source"] for f in summary["failures"]] == ["drums/kick.wav"]
    assert "was not written by requant batch" in summary["failures"][0]["error"]
    assert (dst / "drums/kick.wav").read_bytes() == b"somebody else's take"
    again = run_batch(tree, dst, s, jobs=1, overwrite=True)
    assert again["counts"]["failed"] == 0 and sf.info(dst / "drums/kick.wav").frames == 2205


def test_stale_temps_and_torn_line(tree, tmp_path):
    dst = tmp_path / "out"
    s = settings(include=["drums/*"])
    run_batch(tree, dst, s, jobs=1)
    stale = [dst / "drums/.kick.wav.0badc0de.requant-part",
             dst / "drums/..kick.wav.0badc0de.requant-part.x1y2z3.part"]
    for p in stale:
        p.write_bytes(b"half a file")
    with open(dst / B.MANIFEST_NAME, "ab") as fh:
        fh.write(b'{"source": "drums/kick.wav", "status": "conv')  # torn by a crash
    (dst / "drums/kick.wav").unlink()
    summary = run_batch(tree, dst, s, jobs=1)
    assert not any(p.exists() for p in stale)
    assert summary["counts"]["converted"] == 1 and summary["counts"]["up_to_date"] == 1
    assert any("temporary" in n for n in summary["notes"])
    assert any("unreadable line" in n for n in summary["notes"])
    events, bad = read_manifest(dst / B.MANIFEST_NAME)
    assert int(bad) == 1  # only the torn line; the next event started on a line of its own
    assert events[-1]["source"].startswith("drums/")


# --------------------------------------------------------------------------- executors

def test_jobs_1_and_2_identical(tree, tmp_path):
    a, b = tmp_path / "a", tmp_path / "b"
    s = settings(shaping="first-order")
    run_batch(tree, a, s, jobs=1)
    summary = run_batch(tree, b, s, jobs=2)
    assert summary["jobs"] == 2
    outs = audio_outputs(a)
    assert outs == audio_outputs(b) and len(outs) == len(GOOD) + 1
    for o in outs:
        assert (a / o).read_bytes() == (b / o).read_bytes(), o
    workers = {e["worker"] for e in read_manifest(b / B.MANIFEST_NAME)[0]
               if e["status"] == "converted"}
    assert all(not w.endswith(f":{os.getpid()}") for w in workers)


def _crash_on_bad(item):
    if item["name"] == "bad":
        os._exit(9)
    return {"name": item["name"], "pid": os.getpid()}


def test_worker_crash_is_isolated():
    items = [{"name": n, "size": 1} for n in ("a", "b", "bad", "c", "d", "e")]
    ex = ProcessExecutor(2, max_chunk=2)
    ex.start()
    try:
        got = dict((item["name"], res) for item, res in ex.imap_unordered(_crash_on_bad, items))
    finally:
        ex.close()
    assert set(got) == {"a", "b", "bad", "c", "d", "e"}
    assert isinstance(got["bad"], WorkerLost)
    assert all(got[n]["name"] == n for n in "abcde")


class _LosingExecutor:
    """The executor protocol as a cluster executor would implement it (issue 7):
    plain-data items in, (item, result or exception) out, in any order."""

    workers, description, forks = 3, "a test executor", False

    def start(self):
        self.started = True

    def imap_unordered(self, fn, items, tick=None):
        items = list(items)
        for item in reversed(items):  # another order than the plan's
            if item["source"] == "drums/snare.flac":
                yield item, WorkerLost("the worker died while converting this file")
            else:
                res = fn(item)
                res["worker"] = "tcp://10.0.0.7:40123"
                yield item, res

    def drain(self):
        return iter(())

    def close(self):
        pass


def test_custom_executor_protocol(tree, tmp_path):
    ex = _LosingExecutor()
    summary = run_batch(tree, tmp_path / "out", settings(include=["drums/*", "fx/*"]),
                        executor=ex)
    assert ex.started and summary["jobs"] == 3
    latest = latest_by_source(tmp_path / "out")[0]
    assert latest["drums/snare.flac"]["status"] == "failed"
    assert "worker died" in latest["drums/snare.flac"]["error"]
    assert latest["drums/kick.wav"]["worker"] == "tcp://10.0.0.7:40123"
    assert summary["counts"]["converted"] == 3 and summary["counts"]["failed"] == 1
    reference = run_batch(tree, tmp_path / "ref", settings(include=["drums/*", "fx/*"]), jobs=1)
    assert reference["counts"]["converted"] == 4
    for o in ("drums/kick.wav", "fx/beep.wav", "fx/deep/rumble.aiff"):
        assert (tmp_path / "out" / o).read_bytes() == (tmp_path / "ref" / o).read_bytes()


# --------------------------------------------------------------------------- settings

def test_settings_id_tracks_output_settings(tmp_path):
    base = resolve_settings({})
    sid = settings_id(base, 1)
    assert settings_id(base.replace(block_frames=7), 1) == sid  # does not change the bits
    assert settings_id(base, 2) != sid
    for key, value in [("bits", 12), ("quantizer", "truncate"), ("dither", "rpdf"),
                       ("shaping", "first-order"), ("force_dither", True), ("format", "flac")]:
        assert settings_id(base.replace(**{key: value}), 1) != sid, key
    coeffs = tmp_path / "h.json"
    coeffs.write_text("[0.5]")
    s = resolve_settings({"shaping": str(coeffs)})
    before = settings_id(s, 1)
    coeffs.write_text("[0.25]")
    again = resolve_settings({"shaping": str(coeffs)})  # the next run reads the file again
    assert settings_id(again, 1) != before  # the file's content counts, not its name


def test_derive_seed_is_order_free():
    seeds = {derive_seed(5, f"bank/{i}.wav") for i in range(1000)}
    assert len(seeds) == 1000 and max(seeds) < 2**63
    assert derive_seed(5, "a.wav") != derive_seed(6, "a.wav")


def test_defaults_match_convert_file():
    # batch and convert must not drift apart (python-soundfile's default meta-test idea)
    import inspect

    from requant.convert import convert_file
    from requant.recipe import Recipe

    params = inspect.signature(convert_file).parameters
    assert params["recipe"].default is None  # convert_file's None means Recipe()
    recipe = Recipe().to_dict()
    for key in recipe:
        assert DEFAULT_SETTINGS[key] == recipe[key], key
    assert DEFAULT_SETTINGS["block_frames"] == params["block_frames"].default


@pytest.mark.parametrize("options, match", [
    ({"bits": 0}, "bits"),
    ({"dither": "gauss"}, "dither"),
    ({"format": "mp3"}, "format"),
    ({"format": "flac", "bits": 32}, "FLAC"),
    ({"shaping": "warm"}, "shaping"),
    ({"include": "*.wav"}, "include"),
])
def test_bad_settings_raise(options, match):
    with pytest.raises(UsageError, match=match):
        resolve_settings(options)


def test_include_exclude_and_collisions(tmp_path, tree):
    src = tmp_path / "src"
    (src / "a").mkdir(parents=True)
    for name in ("one.wav", "one.flac", "two.wav", "skip_me.wav"):
        sf.write(src / "a" / name, np.zeros((100, 1)), 8000, subtype="PCM_24")
    summary = run_batch(src, tmp_path / "out", settings(exclude=["skip_*"], format="flac"),
                        jobs=1)
    assert summary["counts"]["excluded"] == 1
    fails = {f["source"]: f["error"] for f in summary["failures"]}
    assert set(fails) == {"a/one.wav", "a/one.flac"}  # both would write a/one.flac
    assert all("would both be written" in e for e in fails.values())
    assert audio_outputs(tmp_path / "out") == ["a/two.flac"]
    only = run_batch(src, tmp_path / "out2", settings(include=["a/t*"]), jobs=1)
    assert only["counts"]["converted"] == 1 and only["counts"]["excluded"] == 3


def test_destination_inside_source_is_not_walked(tmp_path, tree):
    src = tmp_path / "src"
    src.mkdir()
    sf.write(src / "a.wav", np.zeros((100, 1)), 8000, subtype="PCM_24")
    run_batch(src, src / "out16", settings(), jobs=1)
    again = run_batch(src, src / "out16", settings(), jobs=1)
    assert again["counts"]["up_to_date"] == 1 and again["counts"]["not_audio"] == 0
    with pytest.raises(UsageError, match="inside the destination"):
        run_batch(src, tmp_path, settings(), jobs=1)
    with pytest.raises(UsageError, match="is the source"):
        run_batch(src, src, settings(), jobs=1)


def test_dry_run_writes_nothing(tree, tmp_path):
    dst = tmp_path / "out"
    plan = run_batch(tree, dst, settings(), dry_run=True)
    assert not dst.exists()
    actions = {i["source"]: i["action"] for i in plan["items"]}
    assert all(actions[r] == "convert" for r in GOOD)
    assert all(actions[r] == "fail" for r in BROKEN)
    assert all(actions[r] == "skip" for r in OTHER)
    run_batch(tree, dst, settings(include=["drums/*"]), jobs=1)
    before = sorted(p.name for p in dst.rglob("*"))
    manifest = (dst / B.MANIFEST_NAME).read_bytes()
    plan = run_batch(tree, dst, settings(include=["drums/*"]), dry_run=True)
    assert plan["counts"] == {"convert": 0, "skip": 2, "fail": 0}
    assert sorted(p.name for p in dst.rglob("*")) == before
    assert (dst / B.MANIFEST_NAME).read_bytes() == manifest


def _pages(dst):
    return {p.name: p.stat().st_mtime_ns for p in (dst / B.PAGES_DIR).glob("p-*.html")}


def test_index_html(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    sf.write(src / "<b>bold&.wav", np.zeros((100, 1)), 8000, subtype="PCM_24")
    (src / "zz_bad.wav").write_bytes(b"RIFF\0\0")
    run_batch(src, tmp_path / "out", settings(), jobs=1)
    summary_page = (tmp_path / "out" / B.INDEX_NAME).read_text()
    (page,) = _pages(tmp_path / "out")
    detail = (tmp_path / "out" / B.PAGES_DIR / page).read_text()
    assert "&lt;b&gt;bold&amp;.wav" in detail and "<b>bold" not in detail  # autoescaped
    assert "<b>bold" not in summary_page
    for html in (summary_page, detail):  # self-contained: nothing from the network
        assert not re.search(r"(src|href)=\"(https?:)?//", html)
    assert "<script>" in detail
    # the summary page names the failure and links the detail page that holds it
    assert re.findall(r'<tr class="(\w+)">', summary_page)[0] == "failed"
    assert "zz_bad.wav" in summary_page and f'href="{B.PAGES_DIR}/{page}"' in summary_page
    # the detail page: a row per file, in walk order, each linking its output from DST
    assert re.findall(r'<tr class="(\w+)">', detail) == ["ok", "failed"]
    assert 'href="../%3Cb%3Ebold%26.wav"' in detail


def test_index_pages_stay_small_and_are_rewritten_only_when_they_change(tmp_path):
    # entries that are not audio (no conversion needed) over folders of 300, 900, 1100
    # (more than a page) and 10 files: pages hold whole folders, at most PAGE_ROWS rows
    from requant.library.spool import PAGE_ROWS

    src, dst = tmp_path / "src", tmp_path / "out"
    for folder, n in (("a", 300), ("b", 900), ("c", 1100), ("d", 10)):
        (src / folder).mkdir(parents=True)
        for i in range(n):
            (src / folder / f"n{i:04d}.txt").write_bytes(b"x")
    first = run_batch(src, dst, settings(), jobs=1)
    assert first["library"]["files"] == first["counts"]["not_audio"] == 2310
    pages = _pages(dst)
    rows = {name: (dst / B.PAGES_DIR / name).read_text().count("<tr class=") for name in pages}
    assert sum(rows.values()) == 2310 and max(rows.values()) == PAGE_ROWS
    assert len(pages) == first["library"]["pages"] >= 4
    assert max((dst / B.PAGES_DIR / name).stat().st_size for name in pages) < 2 << 20
    # nothing changed: no row written, no page written
    manifest = (dst / B.MANIFEST_NAME).read_bytes()
    again = run_batch(src, dst, settings(), jobs=1)
    assert again["manifest_rows"] == 0 and _pages(dst) == pages
    assert (dst / B.MANIFEST_NAME).read_bytes().count(b"\n") == manifest.count(b"\n") + 1
    # one new file in the last folder: its page changes, the others stay as they were
    (src / "d" / "new.txt").write_bytes(b"y")
    third = run_batch(src, dst, settings(), jobs=1)
    after = _pages(dst)
    assert third["manifest_rows"] == 1 and len(after) == len(pages)
    assert len(set(after) - set(pages)) == 1
    assert all(after[name] == pages[name] for name in set(after) & set(pages))


def test_index_rows_are_escaped_and_name_a_pending_file():
    from requant.library.index import row_html
    from requant.library.resume import CLASSES

    ev = {"source": "a/<i>&.wav", "output": "a/<i>&.flac", "status": "converted",
          "reason": "new", "warnings": ["x < y"], "warning_kinds": ["clipping"],
          "snr_db": 80.123, "duration_s": 1.5, "seconds": 0.25, "error": None,
          "timestamp": "2026-01-02T03:04:05.678+00:00"}
    html = row_html(7, ev, CLASSES["warn"])
    assert "<i>" not in html and "a/&lt;i&gt;&amp;.wav" in html and "x &lt; y" in html
    assert 'href="../a/%3Ci%3E%26.flac"' in html and "80.12" in html and "2026-01-02 03:04" in html
    assert html.startswith('<tr class="warn"><td class="n">7</td>')
    pending = row_html(1, "b/<b>.wav", CLASSES["pending"])
    assert "not started" in pending and "&lt;b&gt;" in pending and "<b>" not in pending


def test_chunks_taper_towards_the_end():
    items = [{"size": 10, "i": i} for i in range(1000)]
    chunks = list(B.chunk_items(items, per=16, chunk_bytes=1 << 20, taper=8))
    assert [it for c in chunks for it in c] == items  # every item once, in order
    sizes = [len(c) for c in chunks]
    assert max(sizes) == 16 and sizes[-1] == 1
    assert sizes == sorted(sizes, reverse=True)  # never growing again
    # each chunk holds at most 1/taper of what was left when it was cut
    left = len(items)
    for n in sizes:
        assert n <= max(1, -(-left // 8))
        left -= n
    # the byte limit still cuts first; without taper, chunks are uniform
    big = [{"size": 6 << 20} for _ in range(5)]
    assert [len(c) for c in B.chunk_items(big, per=16, chunk_bytes=8 << 20, taper=2)] == [2, 2, 1]
    assert [len(c) for c in B.chunk_items(items[:40], per=16, chunk_bytes=1 << 20)] == [16, 16, 8]


def test_unusual_names(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    names = ["caf\u00e9 \u2013 \"q\" 'x'.wav", "new\nline.wav", "\u65e5\u672c.flac"]
    for name in names:
        sf.write(src / name, np.zeros((100, 1)), 8000, subtype="PCM_24",
                 format="FLAC" if name.endswith("flac") else "WAV")
    undecodable = os.fsencode(src) + b"/bad\xff.wav"
    with open(undecodable, "wb") as fh:
        fh.write((src / "new\nline.wav").read_bytes())
    summary = run_batch(src, tmp_path / "out", settings(), jobs=1)
    # a name that is not UTF-8 converts too, to the same bytes of name
    assert summary["counts"]["converted"] == 4 and summary["failures"] == []
    assert sorted(audio_outputs(tmp_path / "out")) == sorted(names + ["bad\udcff.wav"])
    events, bad = read_manifest(tmp_path / "out" / B.MANIFEST_NAME)
    assert int(bad) == 0 and len(events) == 4
    assert "bad\udcff.wav" in {e["source"] for e in events}
    # the manifest stays strict UTF-8 JSON (RFC 8259): the byte is written as \\xff
    raw = (tmp_path / "out" / B.MANIFEST_NAME).read_bytes().decode("utf-8")
    assert "bad\\\\xff.wav" in raw and "\\udcff" not in raw
    again = run_batch(src, tmp_path / "out", settings(), jobs=1)
    assert again["counts"]["up_to_date"] == 4


# --------------------------------------------------------------------------- the command line

@pytest.mark.slow
def test_cli_exit_codes(tree, tmp_path):
    code, out, err = run_cli("batch", tree, tmp_path / "o1", "--seed", 1, "--jobs", 1)
    assert code == 1, err
    assert "failed (3)" in err and all(r in err for r in BROKEN)
    assert "Traceback" not in err and "converted 6" in out
    code, out, err = run_cli("batch", tree, tmp_path / "o2", "--exclude", "broken/*", "-q",
                             "--jobs", 2)
    assert code == 0, err
    assert out == ""


def _children(pid):
    kids = []
    for d in Path("/proc").iterdir():
        if d.name.isdigit():
            try:
                fields = (d / "stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[1]) == pid:
                kids.append(int(d.name))
    return kids


def _alive(pid):
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state not in ("Z", "X")


def _many_clips(root, n=240):
    rng = np.random.default_rng(3)
    for i in range(n):
        p = root / f"bank{i % 6}" / f"clip{i:03d}.wav"
        p.parent.mkdir(parents=True, exist_ok=True)
        sf.write(p, 0.1 * rng.standard_normal((800, 1)), 8000, subtype="PCM_24")


def _start(src, dst, jobs):
    return subprocess.Popen([*cli_command("batch", src, dst),
                             "--seed", "99", "--jobs", str(jobs), "-q"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)


def _wait_for_lines(proc, manifest, n, timeout=60):
    t = time.monotonic()
    while time.monotonic() - t < timeout:
        if manifest.exists() and manifest.read_bytes().count(b"\n") >= n:
            return
        assert proc.poll() is None, "the batch ended before it could be interrupted"
        time.sleep(0.005)
    raise AssertionError("the manifest did not grow")


@pytest.mark.slow
@pytest.mark.parametrize("jobs", [1, 2])
def test_sigkill_then_resume(tmp_path, jobs):
    src, dst = tmp_path / "src", tmp_path / "out"
    _many_clips(src)
    proc = _start(src, dst, jobs)
    _wait_for_lines(proc, dst / B.MANIFEST_NAME, 30)
    workers = _children(proc.pid)
    proc.send_signal(signal.SIGKILL)
    assert proc.wait() == -signal.SIGKILL
    assert not (dst / B.SUMMARY_NAME).exists()  # killed mid-run, before the summary
    assert (workers == []) if jobs == 1 else len(workers) >= jobs
    t = time.monotonic()  # workers follow their parent (PR_SET_PDEATHSIG)
    while any(map(_alive, workers)) and time.monotonic() - t < 10:
        time.sleep(0.05)
    assert not any(map(_alive, workers))
    code, _, err = run_cli("batch", src, dst, "--seed", 99, "--jobs", jobs, "-q")
    assert code == 0, err
    events, bad = read_manifest(dst / B.MANIFEST_NAME)
    assert int(bad) <= 1  # at most the line torn by the kill
    assert not list(dst.rglob("*.part")) and not list(dst.rglob("*requant-part*"))
    outs = audio_outputs(dst)
    assert len(outs) == 240
    latest = {}
    hashes = {}
    for e in events:
        if e["status"] == "converted":
            latest[e["output"]] = e["output_sha256"]
            hashes.setdefault(e["source"], set()).add(e["output_sha256"])
    assert all(len(h) == 1 for h in hashes.values())  # never two different results
    for o in outs:
        assert sha(dst / o) == latest[o]
    summary = json.loads((dst / B.SUMMARY_NAME).read_text())
    assert summary["counts"]["converted"] + summary["counts"]["up_to_date"] == 240
    assert summary["counts"]["up_to_date"] >= 1


@pytest.mark.slow
@pytest.mark.parametrize("target, jobs", [("parent", 1), ("parent", 2), ("group", 2)])
def test_sigint_stops_cleanly(tmp_path, target, jobs):
    src, dst = tmp_path / "src", tmp_path / "out"
    _many_clips(src)
    proc = _start(src, dst, jobs)
    _wait_for_lines(proc, dst / B.MANIFEST_NAME, 20)
    if target == "group":  # Ctrl-C in a terminal reaches the whole process group
        os.killpg(proc.pid, signal.SIGINT)
    else:
        proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and "interrupted" in lines[0] and "Traceback" not in err, err
    summary = json.loads((dst / B.SUMMARY_NAME).read_text())
    assert summary["interrupted"] and summary["counts"]["not_started"] > 0
    assert not list(dst.rglob("*requant-part*"))
    code, _, err = run_cli("batch", src, dst, "--seed", 99, "-q")
    assert code == 0, err
    assert len(audio_outputs(dst)) == 240
