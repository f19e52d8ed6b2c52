"""``convert`` keeps a master's metadata as ``batch`` does, and says what it kept and dropped.

Chunk layouts follow RIFF 1991 (IBM & Microsoft), Microsoft's 1994 update
('smpl') and EBU Tech 3285 v2 ('bext', coding-history rows per EBU R 98);
the fixture and the naive chunk walk that checks it are shared with the batch
tests.
"""

from __future__ import annotations

import re

import numpy as np
import soundfile as sf
from test_batch import META_IDS, metadata_wav, walk

from helpers import run_cli


def _master(tmp_path):
    path = tmp_path / "master.wav"
    path.write_bytes(metadata_wav(np.random.default_rng(3)))
    return path


def test_convert_to_wav_keeps_every_chunk_byte_for_byte_and_appends_one_history_row(tmp_path):
    src = _master(tmp_path)
    before = src.read_bytes()
    code, out, err = run_cli("convert", src, tmp_path / "out.wav", "--seed", "1",
                             "--report", tmp_path / "r.json")
    assert code == 0, err
    assert src.read_bytes() == before  # the input is never modified
    src_chunks = walk(before)
    out_chunks = walk((tmp_path / "out.wav").read_bytes())
    meta = [(c, p) for c, p in src_chunks if c not in ("fmt ", "data", "bext")]
    assert [(c, p) for c, p in out_chunks if c not in ("fmt ", "data", "bext")] == meta
    (src_bext,) = [p for c, p in src_chunks if c == "bext"]
    (out_bext,) = [p for c, p in out_chunks if c == "bext"]
    assert out_bext.startswith(src_bext)
    # EBU R 98 row: A=<algorithm>,F=<Hz>,W=<word length>,M=<mode>,T=<text> CR LF
    assert re.fullmatch(r"A=PCM,F=48000,W=16,M=stereo,T=[ -+\--~]*\r\n",
                        out_bext[len(src_bext):].decode("ascii"))
    # what the user reads: the chunks kept, the history row
    line = next(ln for ln in out.splitlines() if "metadata kept" in ln)
    assert "bext (+1 coding-history row)" in line
    for cid in ("iXML", "smpl", "cue", "LIST", "zzzz"):
        assert cid in line
    assert "warning" not in err


def test_convert_to_flac_keeps_the_tags_that_map_and_lists_the_chunks_it_dropped(tmp_path):
    src = _master(tmp_path)
    code, out, err = run_cli("convert", src, tmp_path / "out.flac", "--seed", "1")
    assert code == 0, err
    with sf.SoundFile(tmp_path / "out.flac") as f:
        assert f.title == "Loop one"  # LIST/INFO INAM -> the FLAC title tag
    assert "metadata kept: text tags title" in out
    warning = next(ln for ln in err.splitlines() if ln.startswith("warning:"))
    assert "cannot be stored in FLAC" in warning
    for cid in set(META_IDS):
        assert repr(cid) in warning


def test_no_metadata_leaves_the_chunks_behind(tmp_path):
    src = _master(tmp_path)
    code, out, err = run_cli("convert", src, tmp_path / "out.wav", "--seed", "1",
                             "--no-metadata")
    assert code == 0, err
    ids = [c for c, _ in walk((tmp_path / "out.wav").read_bytes())]
    assert "bext" not in ids and "smpl" not in ids
    assert "metadata kept" not in out
