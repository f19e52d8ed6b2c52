"""Tests for requant.audio_io.riff: WAV chunk reading and metadata copying.

Fixtures are built byte by byte from the layouts of their specifications
(named beside each builder). The oracles are outside the module under test:
python-soundfile (libsndfile) reads the audio, and a naive chunk walker kept
in this file (``walk``) checks the byte layout of every file written.
"""

from __future__ import annotations

import os
import stat
import struct
import tracemalloc
from datetime import timedelta
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from hypothesis import given, settings
from hypothesis import strategies as st

from requant.audio_io import riff
from requant.audio_io.riff import (
    BEXT_FIXED_BYTES,
    ChunkError,
    coding_history_row,
    copy_metadata,
    read_chunks,
    wav_chunk_ids,
)
from requant.errors import InputError, OutputError, UsageError

RATE = 48000
CHANNELS = 2
ROW = "A=PCM,F=48000,W=16,M=stereo,T=requant 0.1.0; TPDF\r\n"
# Source chunks copy_metadata documents as not carried over.
DROPPED_IDS = {"fmt ", "data", "fact", "ds64", "JUNK", "junk", "PAD ", "FLLR", "PEAK", "levl"}


# --------------------------------------------------------------------------- byte builders

from helpers import chunk, fmt_pcm, pcm24, rf64_wave, riff_wave, u32  # noqa: E402


def smpl_payload() -> bytes:
    # 'smpl', Microsoft's 1994 RIFF update (from memory): 36-byte header of nine
    # uint32 (manufacturer, product, sample period ns, MIDI unity note, MIDI pitch
    # fraction, SMPTE format, SMPTE offset, loop count, sampler-data bytes), then
    # 24-byte loops (id, type, start, end inclusive, fraction, play count), then
    # sampler data.
    loops = [(0, 0, 100, 899, 0, 0), (1, 1, 1000, 1999, 0x80000000, 3)]
    sampler_data = b"\x01\x02\x03"
    head = struct.pack("<9I", 0, 0, 20833, 60, 0, 0, 0, len(loops), len(sampler_data))
    assert len(head) == 36
    return head + b"".join(struct.pack("<6I", *lp) for lp in loops) + sampler_data


def inst_payload() -> bytes:
    # 'inst', Microsoft's 1994 RIFF update (from memory): unshifted note, fine
    # tune (int8 cents), gain (int8 dB), low note, high note, low velocity, high
    # velocity: 7 bytes, so an odd size with a pad byte.
    return struct.pack("<Bbb4B", 60, -5, -3, 0, 127, 1, 127)


def cue_payload() -> bytes:
    # 'cue ', RIFF 1991: dwCuePoints, then per point dwName, dwPosition,
    # fccChunk, dwChunkStart, dwBlockStart, dwSampleOffset.
    points = [(1, 0, b"data", 0, 0, 100), (2, 1, b"data", 0, 0, 1000)]
    return u32(len(points)) + b"".join(struct.pack("<II4sIII", *p) for p in points)


def list_info_payload(title: bytes = b"Loop test") -> bytes:
    # LIST/INFO, RIFF 1991: list type 'INFO', then ZSTR subchunks (INAM title,
    # ICMT comment), each padded to even length.
    return b"INFO" + chunk(b"INAM", title + b"\0") + chunk(b"ICMT", b"odd\0x\0")


def list_adtl_payload() -> bytes:
    # LIST/adtl, RIFF 1991: 'labl' (dwName + ZSTR), 'note' (dwName + ZSTR),
    # 'ltxt' (dwName, dwSampleLength, dwPurpose, wCountry, wLanguage, wDialect,
    # wCodePage, then text).
    ltxt = struct.pack("<II4sHHHH", 2, 1000, b"rgn ", 0, 0, 0, 0) + b"Sustain"
    return (b"adtl" + chunk(b"labl", u32(1) + b"Attack\0") + chunk(b"note", u32(2) + b"n\0")
            + chunk(b"ltxt", ltxt))


def bext_payload(history: bytes) -> bytes:
    # EBU Tech 3285 v2 fixed part: Description 256, Originator 32,
    # OriginatorReference 32, OriginationDate 10, OriginationTime 8,
    # TimeReferenceLow/High 2 x uint32, Version uint16, UMID 64, LoudnessValue,
    # LoudnessRange, MaxTruePeakLevel, MaxMomentaryLoudness,
    # MaxShortTermLoudness 5 x int16, Reserved 180 -> 602 bytes; then CodingHistory.
    fixed = struct.pack("<256s32s32s10s8sIIH64s5h180s", b"Fixture description", b"requant tests",
                        b"REF-0001", b"2024-05-01", b"12:34:56", 0x89ABCDEF, 1, 2,
                        bytes(range(64)), -2300, 510, -100, -1800, -2000, b"")
    assert len(fixed) == 602
    return fixed + history


def peak_payload(channels: int) -> bytes:
    # 'PEAK' (from memory): version, timestamp, then per channel float value + uint32 position.
    return struct.pack("<II", 1, 0) + b"".join(struct.pack("<fI", 0.5, 7) for _ in range(channels))


IXML = b'<?xml version="1.0" encoding="UTF-8"?><BWFXML><IXML_VERSION>1.5</IXML_VERSION></BWFXML>'
HISTORY = b"A=PCM,F=48000,W=24,M=stereo,T=original\r\n"


def source_chunks(codes: np.ndarray, *, history: bytes = HISTORY) -> list[tuple[bytes, bytes]]:
    """A sampler/broadcast WAV: metadata before and after the audio."""
    frames = len(codes)
    return [
        (b"bext", bext_payload(history)),
        (b"JUNK", b"\0" * 28),
        (b"fmt ", fmt_pcm(CHANNELS, RATE, 24)),
        (b"fact", u32(frames)),  # RIFF 1991: dwSampleLength
        (b"LIST", list_info_payload()),
        (b"data", pcm24(codes)),
        (b"smpl", smpl_payload()),
        (b"inst", inst_payload()),
        (b"cue ", cue_payload()),
        (b"LIST", list_adtl_payload()),
        (b"iXML", IXML),
        (b"xtra", b"\x05\x04\x03\x02\x01"),  # unknown id, odd size
        (b"PEAK", peak_payload(CHANNELS)),
    ]


# --------------------------------------------------------------------------- naive oracle

def walk(blob: bytes) -> list[tuple[str, int, int]]:
    """Naive chunk walk of a whole file held in memory (test oracle).

    Asserts the framing: RIFF size (or ds64 riffSize) equals the file length
    minus 8, every odd chunk is followed by a zero pad byte, and the chunks
    end exactly at the end of the file.
    """
    form = blob[:4]
    assert form in (b"RIFF", b"RF64", b"BW64") and blob[8:12] == b"WAVE"
    pos, sizes64 = 12, {}
    if form == b"RIFF":
        assert struct.unpack_from("<I", blob, 4)[0] == len(blob) - 8
    else:
        assert struct.unpack_from("<I", blob, 4)[0] == 0xFFFFFFFF
        assert blob[12:16] == b"ds64"
        riff64, data64, _, n = struct.unpack_from("<QQQI", blob, 20)
        assert riff64 == len(blob) - 8
        sizes64[b"data"] = data64
        for k in range(n):
            cid, size = struct.unpack_from("<4sQ", blob, 48 + 12 * k)
            sizes64[cid] = size
    out = []
    while pos < len(blob):
        cid, size = struct.unpack_from("<4sI", blob, pos)
        if size == 0xFFFFFFFF and cid in sizes64:
            size = sizes64[cid]
        out.append((cid.decode("ascii"), pos + 8, size))
        pos += 8 + size
        if size & 1:
            assert blob[pos] == 0, f"pad byte after {cid!r} is not zero"
            pos += 1
    assert pos == len(blob)
    return out


def payloads(blob: bytes) -> list[tuple[str, bytes]]:
    return [(cid, blob[off:off + size]) for cid, off, size in walk(blob)]


# --------------------------------------------------------------------------- fixtures

@pytest.fixture
def codes() -> np.ndarray:
    rng = np.random.default_rng(20240501)
    return rng.integers(-(2**23), 2**23, size=(64, CHANNELS), dtype=np.int32)


@pytest.fixture
def pair(tmp_path, codes):
    """(source path, output path, source bytes, output bytes, int16 samples written)."""
    src_bytes, _ = riff_wave(source_chunks(codes))
    src = tmp_path / "source.wav"
    src.write_bytes(src_bytes)
    out16 = (codes >> 8).astype(np.int16)  # stand-in for requantization to 16 bits
    out = tmp_path / "output.wav"
    sf.write(out, out16, RATE, subtype="PCM_16")
    return src, out, src_bytes, out.read_bytes(), out16


# --------------------------------------------------------------------------- reading

def test_read_chunks_matches_builder(tmp_path, codes):
    blob, where = riff_wave(source_chunks(codes))
    path = tmp_path / "s.wav"
    path.write_bytes(blob)
    chunks = read_chunks(path)
    assert [(c.id, c.offset, c.size) for c in chunks] == where
    assert wav_chunk_ids(path) == [w[0] for w in where]
    for c, (_cid, payload) in zip(chunks, source_chunks(codes)):
        assert c.read(path) == payload
        assert c.header_offset == c.offset - 8 and c.end == c.offset + len(payload)


def test_fixture_is_valid_for_libsndfile(tmp_path, codes):
    # Reference reader: libsndfile reads the hand-built 24-bit source, returning
    # codes left-justified in int32 (REFERENCES §6).
    blob, _ = riff_wave(source_chunks(codes))
    path = tmp_path / "s.wav"
    path.write_bytes(blob)
    got, rate = sf.read(path, dtype="int32")
    assert rate == RATE
    np.testing.assert_array_equal(got, codes << 8)


def test_chunk_read_refuses_big_payload(tmp_path, codes):
    blob, _ = riff_wave(source_chunks(codes))
    path = tmp_path / "s.wav"
    path.write_bytes(blob)
    data = next(c for c in read_chunks(path) if c.id == "data")
    with pytest.raises(ChunkError, match="max_bytes"):
        data.read(path, max_bytes=data.size - 1)


@pytest.mark.parametrize("form", [b"RF64", b"BW64"])
def test_rf64_read_and_libsndfile_agree(tmp_path, codes, form):
    # EBU Tech 3306 / ITU-R BS.2088 layout; the reference reader must read it too.
    chunks = [(b"fmt ", fmt_pcm(CHANNELS, RATE, 24)), (b"data", pcm24(codes)),
              (b"smpl", smpl_payload())]
    blob, where = rf64_wave(chunks, sample_count=len(codes), form=form)
    path = tmp_path / "s.wav"
    path.write_bytes(blob)
    assert [(c.id, c.offset, c.size) for c in read_chunks(path)] == where
    if form == b"RF64":  # libsndfile 1.2 names RF64 only
        got, _ = sf.read(path, dtype="int32")
        np.testing.assert_array_equal(got, codes << 8)


def test_rf64_table_gives_sizes(tmp_path, codes):
    # EBU Tech 3306: a chunk whose 32-bit size is -1 takes its size from the ds64 table.
    chunks = [(b"fmt ", fmt_pcm(CHANNELS, RATE, 24)), (b"data", pcm24(codes)),
              (b"iXML", IXML), (b"smpl", smpl_payload())]
    blob, where = rf64_wave(chunks, table=(b"iXML",))
    path = tmp_path / "s.wav"
    path.write_bytes(blob)
    chunks_read = read_chunks(path)
    assert [(c.id, c.offset, c.size) for c in chunks_read] == where
    assert chunks_read[3].read(path) == IXML


def test_missing_final_pad_byte_is_tolerated(tmp_path):
    # Common practice in the wild: the last odd chunk lacks its pad byte, with the
    # RIFF size either counting it or not.
    blob, where = riff_wave([(b"fmt ", fmt_pcm(1, 8000, 8)), (b"data", b"\x80" * 3)])
    for variant in (blob[:-1], blob[:4] + u32(len(blob) - 9) + blob[8:-1]):
        path = tmp_path / "p.wav"
        path.write_bytes(variant)
        assert [(c.id, c.offset, c.size) for c in read_chunks(path)] == where
    uncounted = blob[:4] + u32(len(blob) - 9) + blob[8:]  # pad present, not counted
    path.write_bytes(uncounted)
    assert [(c.id, c.offset, c.size) for c in read_chunks(path)] == where


def _good() -> bytes:
    return riff_wave([(b"fmt ", fmt_pcm(1, 8000, 16)), (b"data", b"\0\1" * 8),
                      (b"smpl", smpl_payload())])[0]


def _good64() -> bytes:
    return rf64_wave([(b"fmt ", fmt_pcm(1, 8000, 16)), (b"data", b"\0\0")])[0]


def _with(blob: bytes, at: int, raw: bytes) -> bytes:
    return blob[:at] + raw + blob[at + len(raw):]


BAD_FILES = {
    "empty": (lambda: b"", "too few"),
    "big-endian": (lambda: b"RIFX" + _good()[4:], "big-endian"),
    "aiff": (lambda: b"FORM" + u32(4) + b"AIFF", "not a WAV"),
    "avi": (lambda: _with(_good(), 8, b"AVI "), "not 'WAVE'"),
    "truncated": (lambda: _good()[:-10], "holds only"),
    "truncated-consistent": (lambda: (lambda b: b[:4] + u32(len(b) - 18) + b[8:-10])(_good()),
                             "truncated"),
    "riff-size-too-big": (lambda: (lambda b: _with(b, 4, u32(len(b))))(_good()), "holds only"),
    "riff-size-too-small": (lambda: (lambda b: _with(b, 4, u32(len(b) - 20)))(_good()),
                            "remain in the form"),
    "appended": (lambda: _good() + b"TAG" + b"\1" * 20, "after the end"),
    "garbage-id": (lambda: _with(_good(), 12, b"\xff\x00mt"), "chunk id"),
    "stray": (lambda: (lambda b: _with(b + b"\1\2", 4, u32(len(b) - 6)))(_good()), "stray"),
    "huge-chunk": (lambda: _with(_good(), 40, u32(0xFFFFFF00)), "truncated"),
    "rf64-no-ds64": (lambda: b"RF64" + u32(0xFFFFFFFF) + b"WAVE" + chunk(b"fmt ", b"\0" * 40),
                     "ds64"),
    "rf64-short-ds64": (lambda: b"RF64" + u32(0xFFFFFFFF) + b"WAVE" + chunk(b"ds64", b"\0" * 20)
                        + b"\0" * 12, "'ds64' chunk of 20"),
    # ds64 fields (EBU Tech 3306): riffSize at byte 20, dataSize at 28, tableLength at 44.
    "rf64-huge-table": (lambda: _with(_good64(), 44, u32(2**31)), "table"),
    "rf64-huge-data": (lambda: _with(_good64(), 28, struct.pack("<Q", 2**62)), "truncated"),
    "rf64-huge-riff": (lambda: _with(_good64(), 20, struct.pack("<Q", 2**62)), "holds only"),
}


@pytest.mark.parametrize("name", sorted(BAD_FILES))
def test_bad_files_raise_chunk_error(tmp_path, name):
    make, match = BAD_FILES[name]
    path = tmp_path / "bad.wav"
    path.write_bytes(make())
    tracemalloc.start()
    try:
        with pytest.raises(ChunkError, match=match) as info:
            read_chunks(path)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 256 * 1024, f"{peak=} bytes for a {path.stat().st_size}-byte file"
    assert isinstance(info.value, InputError) and isinstance(info.value, ValueError)
    assert "bad.wav" in str(info.value)


def test_too_many_chunks(tmp_path):
    blob, _ = riff_wave([(b"fmt ", fmt_pcm(1, 8000, 16))] + [(b"note", b"")] * 20)
    path = tmp_path / "many.wav"
    path.write_bytes(blob)
    assert len(read_chunks(path, max_chunks=21)) == 21
    with pytest.raises(ChunkError, match="max_chunks"):
        read_chunks(path, max_chunks=20)


# --------------------------------------------------------------------------- copying

def test_copy_metadata_full(pair):
    src, out, src_bytes, out_before, out16 = pair
    report = copy_metadata(src, out, coding_history_row=ROW)
    new = out.read_bytes()

    assert report == {
        "copied": ["LIST", "smpl", "inst", "cue ", "LIST", "iXML", "xtra"],
        "rewritten": ["bext"],
        "dropped": ["JUNK", "fmt ", "fact", "data", "PEAK"],
        "output_dropped": [],
        "form": "RIFF",
    }
    got = payloads(new)  # walk() checks RIFF size, pad bytes and the end of file
    assert [cid for cid, _ in got] == ["fmt ", "bext", "LIST", "data", "smpl", "inst", "cue ",
                                       "LIST", "iXML", "xtra"]
    before = dict(payloads(out_before))
    source = payloads(src_bytes)
    assert got[0][1] == before["fmt "] and got[3][1] == before["data"]
    kept = [(c, p) for c, p in source if c not in DROPPED_IDS and c != "bext"]
    assert [g for g in got if g[0] not in ("fmt ", "data", "bext")] == kept

    bext_src = dict(source)["bext"]
    bext_new = got[1][1]
    assert bext_new[:BEXT_FIXED_BYTES] == bext_src[:BEXT_FIXED_BYTES]
    assert bext_new[BEXT_FIXED_BYTES:] == HISTORY + ROW.encode("ascii")

    samples, rate = sf.read(out, dtype="int16")
    assert rate == RATE
    np.testing.assert_array_equal(samples, out16)
    assert [(c.id, c.offset, c.size) for c in read_chunks(out)] == walk(new)


def test_copy_metadata_without_row_keeps_bext(pair):
    src, out, src_bytes, _, out16 = pair
    report = copy_metadata(src, out)
    assert report["rewritten"] == [] and report["copied"][0] == "bext"
    assert dict(payloads(out.read_bytes()))["bext"] == dict(payloads(src_bytes))["bext"]
    np.testing.assert_array_equal(sf.read(out, dtype="int16")[0], out16)


@pytest.mark.parametrize("history, expected", [
    (HISTORY, HISTORY + ROW.encode()),
    (HISTORY[:-2], HISTORY + ROW.encode()),  # last row lacks CR LF: add it first
    (HISTORY[:-1], HISTORY + ROW.encode()),  # ends in a bare CR: complete it
    (HISTORY[:-2] + b"\n", HISTORY[:-2] + b"\n" + ROW.encode()),  # LF only: a line ends
    (HISTORY + b"\0\0\0", HISTORY + ROW.encode()),  # NUL padding dropped
    (b"", ROW.encode()),
    (b"\0" * 7, ROW.encode()),
])
def test_bext_row_appended(tmp_path, codes, history, expected):
    src_bytes, _ = riff_wave(source_chunks(codes, history=history))
    src = tmp_path / "s.wav"
    src.write_bytes(src_bytes)
    out = tmp_path / "o.wav"
    sf.write(out, (codes >> 8).astype(np.int16), RATE, subtype="PCM_16")
    copy_metadata(src, out, coding_history_row=ROW)
    bext = dict(payloads(out.read_bytes()))["bext"]
    assert bext[:BEXT_FIXED_BYTES] == bext_payload(b"")
    assert bext[BEXT_FIXED_BYTES:] == expected


def test_short_bext_copied_unchanged(tmp_path, codes):
    chunks = [(b"bext", b"too short for EBU Tech 3285"), (b"fmt ", fmt_pcm(CHANNELS, RATE, 24)),
              (b"data", pcm24(codes))]
    src = tmp_path / "s.wav"
    src.write_bytes(riff_wave(chunks)[0])
    out = tmp_path / "o.wav"
    sf.write(out, (codes >> 8).astype(np.int16), RATE, subtype="PCM_16")
    report = copy_metadata(src, out, coding_history_row=ROW)
    assert report["copied"] == ["bext"] and report["rewritten"] == []
    assert dict(payloads(out.read_bytes()))["bext"] == chunks[0][1]


def _write_with_title(path: Path, samples: np.ndarray) -> None:
    # libsndfile writes its string metadata as a LIST/INFO chunk.
    with sf.SoundFile(path, "w", RATE, CHANNELS, "PCM_16") as f:
        f.title = "written by soundfile"
        f.write(samples)


def test_source_list_info_replaces_outputs(tmp_path, pair):
    src, out, src_bytes, _, out16 = pair
    _write_with_title(out, out16)
    assert [p[:4] for c, p in payloads(out.read_bytes()) if c == "LIST"] == [b"INFO"]
    report = copy_metadata(src, out)
    assert report["output_dropped"] == ["LIST"]
    lists = [p for c, p in payloads(out.read_bytes()) if c == "LIST"]
    assert lists == [list_info_payload(), list_adtl_payload()]


def test_output_list_info_kept_when_source_has_none(tmp_path, codes):
    chunks = [(b"fmt ", fmt_pcm(CHANNELS, RATE, 24)), (b"data", pcm24(codes)),
              (b"LIST", list_adtl_payload())]
    src = tmp_path / "s.wav"
    src.write_bytes(riff_wave(chunks)[0])
    out = tmp_path / "o.wav"
    out16 = (codes >> 8).astype(np.int16)
    _write_with_title(out, out16)
    info = [p for c, p in payloads(out.read_bytes()) if c == "LIST"]
    report = copy_metadata(src, out)
    assert report["output_dropped"] == []
    lists = [p for c, p in payloads(out.read_bytes()) if c == "LIST"]
    assert lists == info + [list_adtl_payload()]
    with sf.SoundFile(out) as f:
        assert f.title == "written by soundfile"
    np.testing.assert_array_equal(sf.read(out, dtype="int16")[0], out16)


def test_outputs_own_fact_and_peak_kept(pair):
    # A float output: libsndfile writes fact and PEAK for it, which describe the
    # output; the source's fact and PEAK are dropped.
    src, out, src_bytes, _, out16 = pair
    sf.write(out, out16 / 32768.0, RATE, subtype="FLOAT")
    before = payloads(out.read_bytes())
    report = copy_metadata(src, out)
    after = payloads(out.read_bytes())
    assert "PEAK" in report["dropped"] and "fact" in report["dropped"]
    own = [(c, p) for c, p in before if c in ("fact", "PEAK")]
    assert len(own) == 2 and [(c, p) for c, p in after if c in ("fact", "PEAK")] == own
    np.testing.assert_array_equal(sf.read(out, dtype="float64")[0], out16 / 32768.0)


def test_rf64_source_to_riff_output(tmp_path, codes):
    chunks = [c for c in source_chunks(codes) if c[0] not in (b"JUNK",)]
    src = tmp_path / "s.wav"
    src.write_bytes(rf64_wave(chunks, sample_count=len(codes))[0])
    out = tmp_path / "o.wav"
    out16 = (codes >> 8).astype(np.int16)
    sf.write(out, out16, RATE, subtype="PCM_16")
    report = copy_metadata(src, out, coding_history_row=ROW)
    assert report["form"] == "RIFF" and report["dropped"][0] == "ds64"
    assert report["copied"] == ["LIST", "smpl", "inst", "cue ", "LIST", "iXML", "xtra"]
    got = dict(payloads(out.read_bytes()))
    assert got["smpl"] == smpl_payload() and got["iXML"] == IXML
    np.testing.assert_array_equal(sf.read(out, dtype="int16")[0], out16)


def _check_ds64(blob: bytes, *, frames: int, block_align: int) -> None:
    # EBU Tech 3306: ds64 riffSize = file length - 8; dataSize = data payload;
    # sampleCount = frames.
    riff64, data64, samples, _ = struct.unpack_from("<QQQI", blob, 20)
    data = next(w for w in walk(blob) if w[0] == "data")
    assert riff64 == len(blob) - 8 and data64 == data[2] == frames * block_align
    assert samples == frames
    assert struct.unpack_from("<I", blob, data[1] - 4)[0] == 0xFFFFFFFF


def test_rf64_output_stays_rf64(pair):
    src, out, _, _, out16 = pair
    sf.write(out, out16, RATE, subtype="PCM_16", format="RF64")
    report = copy_metadata(src, out)
    new = out.read_bytes()
    assert report["form"] == "RF64" and new[:4] == b"RF64"
    _check_ds64(new, frames=len(out16), block_align=2 * CHANNELS)
    assert dict(payloads(new))["smpl"] == smpl_payload()
    np.testing.assert_array_equal(sf.read(out, dtype="int16")[0], out16)


def test_large_result_promoted_to_rf64(pair, monkeypatch):
    # Stand-in for a result over 4 GiB: lower the 32-bit limit below the file size.
    src, out, _, _, out16 = pair
    biggest = len(bext_payload(HISTORY))  # larger than every other chunk of the fixture
    monkeypatch.setattr(riff, "_RIFF_SIZE_LIMIT", biggest)
    report = copy_metadata(src, out)
    new = out.read_bytes()
    assert report["form"] == "RF64" and new[:4] == b"RF64" and len(new) > biggest + 8
    assert struct.unpack_from("<I", new, 44)[0] == 0  # no ds64 table entries
    _check_ds64(new, frames=len(out16), block_align=2 * CHANNELS)  # from fmt's nBlockAlign
    np.testing.assert_array_equal(sf.read(out, dtype="int16")[0], out16)


def test_large_chunk_goes_to_ds64_table(pair, monkeypatch):
    src, out, _, _, _ = pair
    monkeypatch.setattr(riff, "_RIFF_SIZE_LIMIT", len(IXML) - 1)
    copy_metadata(src, out)
    new = out.read_bytes()
    table_len = struct.unpack_from("<I", new, 44)[0]
    big = sorted(struct.unpack_from("<4sQ", new, 48 + 12 * k) for k in range(table_len))
    sizes = {cid.encode(): p for cid, p in payloads(new)}
    assert big == sorted((cid, len(sizes[cid])) for cid in sizes
                         if cid != b"data" and len(sizes[cid]) >= len(IXML)
                         and cid not in (b"fmt ", b"ds64"))
    assert sizes[b"iXML"] == IXML
    assert [(c.id, c.offset, c.size) for c in read_chunks(out)] == walk(new)


def test_failure_leaves_output_unchanged(pair, monkeypatch):
    src, out, _, out_before, _ = pair
    out.chmod(0o640)

    def refuse(*args):
        raise OSError("simulated failure")

    monkeypatch.setattr(os, "replace", refuse)
    with pytest.raises(OutputError, match="simulated"):
        copy_metadata(src, out)
    assert out.read_bytes() == out_before
    assert sorted(p.name for p in out.parent.iterdir()) == ["output.wav", "source.wav"]


def test_source_truncated_during_copy(pair, monkeypatch):
    src, out, src_bytes, out_before, _ = pair
    real_scan = riff._scan

    def scan_then_truncate(fh, path, **kw):
        layout = real_scan(fh, path, **kw)
        if Path(path) == src:
            os.truncate(src, len(src_bytes) - 200)  # after the scan, before the copy
        return layout

    monkeypatch.setattr(riff, "_scan", scan_then_truncate)
    with pytest.raises(ChunkError, match="early|truncated"):
        copy_metadata(src, out)
    assert out.read_bytes() == out_before
    assert sorted(p.name for p in out.parent.iterdir()) == ["output.wav", "source.wav"]


def test_mode_preserved_and_no_leftovers(pair):
    src, out, _, _, _ = pair
    out.chmod(0o640)
    copy_metadata(src, out)
    assert stat.S_IMODE(out.stat().st_mode) == 0o640
    assert sorted(p.name for p in out.parent.iterdir()) == ["output.wav", "source.wav"]


def test_same_file_rejected(pair):
    src, _, src_bytes, _, _ = pair
    with pytest.raises(OutputError, match="same file"):
        copy_metadata(src, src)
    assert src.read_bytes() == src_bytes


def test_output_without_data_rejected(tmp_path, pair):
    src, _, _, _, _ = pair
    bad = tmp_path / "nodata.wav"
    bad.write_bytes(riff_wave([(b"fmt ", fmt_pcm(1, 8000, 16))])[0])
    with pytest.raises(ChunkError, match="exactly one"):
        copy_metadata(src, bad)


@pytest.mark.parametrize("row", ["A=PCM,F=48000", "A=PCM\r\nB\r\n", "A=PCM,T=\u00e9\r\n"])
def test_copy_metadata_rejects_bad_row(pair, row):
    src, out, _, out_before, _ = pair
    with pytest.raises(UsageError, match="CR LF"):
        copy_metadata(src, out, coding_history_row=row)
    assert out.read_bytes() == out_before


# --------------------------------------------------------------------------- coding history

@pytest.mark.parametrize("kw, expected", [
    # EBU Tech 3285 / R 98 row form, e.g. "A=PCM,F=48000,W=16,M=stereo,T=original" + CR LF;
    # the mode words mono, stereo, dual-mono are R 98's (from memory, as secondary sources give).
    (dict(sample_rate=48000, bits=16, channels=2, text="requant 0.1.0; TPDF"),
     "A=PCM,F=48000,W=16,M=stereo,T=requant 0.1.0; TPDF\r\n"),
    (dict(sample_rate=44100, bits=12, channels=1, text="x"), "A=PCM,F=44100,W=12,M=mono,T=x\r\n"),
    (dict(sample_rate=96000, bits=24, channels=2, text="y", mode="dual-mono"),
     "A=PCM,F=96000,W=24,M=dual-mono,T=y\r\n"),
    # Three or more channels: this project's own word; R 98 names none (from memory).
    (dict(sample_rate=48000, bits=24, channels=6, text="z"),
     "A=PCM,F=48000,W=24,M=multichannel,T=z\r\n"),
])
def test_coding_history_row(kw, expected):
    assert coding_history_row(**kw) == expected


@pytest.mark.parametrize("kw, error, match", [
    (dict(text="a,b"), UsageError, "commas"),
    (dict(text="a\r\n"), UsageError, "line breaks"),
    (dict(text="caf\u00e9"), UsageError, "ASCII"),
    (dict(bits=0), UsageError, "bits=0"),
    (dict(bits=33), UsageError, "bits=33"),
    (dict(bits=16.0), TypeError, "float"),
    (dict(sample_rate=0), UsageError, "sample_rate=0"),
    (dict(channels=0), UsageError, "channels=0"),
    (dict(mode="surround"), UsageError, "mode='surround'"),
])
def test_coding_history_row_rejects(kw, error, match):
    args = dict(sample_rate=48000, bits=16, channels=2, text="t") | kw
    with pytest.raises(error, match=match):
        coding_history_row(**args)


# --------------------------------------------------------------------------- fuzzing

FUZZ_FRAMES = 16


def _fuzz_base(form: str) -> tuple[bytes, list[int], list[tuple[int, int]], np.ndarray]:
    rng = np.random.default_rng(7)
    codes = rng.integers(-(2**23), 2**23, size=(FUZZ_FRAMES, CHANNELS), dtype=np.int32)
    chunks = source_chunks(codes)
    if form == "riff":
        blob, where = riff_wave(chunks)
        size_fields = [4] + [off - 4 for _, off, _ in where]
    else:
        blob, where = rf64_wave([c for c in chunks if c[0] != b"JUNK"], sample_count=FUZZ_FRAMES)
        size_fields = [4, 20, 28, 36, 44] + [off - 4 for _, off, _ in where]
    return blob, size_fields, [(off, size) for _, off, size in where if size], codes


@st.composite
def mutations(draw, base: bytes, size_fields: list[int], payloads: list[tuple[int, int]]) -> bytes:
    """Truncate, overwrite random bytes, overwrite a size field (often by a small
    step), append bytes, or overwrite bytes inside a payload (keeps the framing,
    so the copy path is exercised too)."""
    blob = bytearray(base)
    for _ in range(draw(st.integers(1, 3))):
        kind = draw(st.sampled_from(["truncate", "bytes", "size", "append", "payload", "payload"]))
        if kind == "payload":
            off, size = draw(st.sampled_from(payloads))
            for _ in range(draw(st.integers(1, 8))):
                at = off + draw(st.integers(0, size - 1))
                if at < len(blob):
                    blob[at] = draw(st.integers(0, 255))
        if kind == "truncate" and blob:
            del blob[draw(st.integers(0, len(blob) - 1)):]
        elif kind == "bytes" and blob:
            for _ in range(draw(st.integers(1, 8))):
                blob[draw(st.integers(0, len(blob) - 1))] = draw(st.integers(0, 255))
        elif kind == "size":
            at = draw(st.sampled_from(size_fields))
            old = int.from_bytes(base[at:at + 4], "little")
            new = draw(st.one_of(st.integers(0, 2**32 - 1), st.sampled_from([0, 0xFFFFFFFF]),
                                 st.integers(-3, 3).map(lambda d, old=old: (old + d) % 2**32)))
            blob[at:at + 4] = u32(new)
        elif kind == "append":
            blob += draw(st.binary(min_size=1, max_size=16))
    return bytes(blob)


def _call_bounded(fn, *args, **kwargs):
    """Run fn; return (result or ChunkError, peak traced bytes). Any other exception propagates."""
    tracemalloc.start()
    try:
        try:
            result = fn(*args, **kwargs)
        except ChunkError as exc:
            result = exc
        return result, tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


FUZZ = settings(max_examples=200, deadline=timedelta(seconds=5), derandomize=True, database=None)


@pytest.mark.slow
@pytest.mark.parametrize("form", ["riff", "rf64"])
def test_fuzz_mutated_source(tmp_path_factory, form):
    base, size_fields, payload_ranges, codes = _fuzz_base(form)
    folder = tmp_path_factory.mktemp(f"fuzz_src_{form}")
    out16 = (codes >> 8).astype(np.int16)
    out_path = folder / "out.wav"
    sf.write(out_path, out16, RATE, subtype="PCM_16")
    out_bytes = out_path.read_bytes()
    src_path = folder / "src.wav"

    @FUZZ
    @given(mutations(base, size_fields, payload_ranges))
    def check(blob):
        src_path.write_bytes(blob)
        out_path.write_bytes(out_bytes)
        chunks, peak = _call_bounded(read_chunks, src_path)
        assert peak < 256 * 1024
        if not isinstance(chunks, ChunkError):
            end = 12
            for c in chunks:  # in order, inside the file, not overlapping
                assert c.header_offset >= end and c.end <= len(blob)
                end = c.end
        report, peak = _call_bounded(copy_metadata, src_path, out_path, coding_history_row=ROW)
        assert peak < 4 * 2**20
        assert sorted(p.name for p in folder.iterdir()) == ["out.wav", "src.wav"]
        if isinstance(report, ChunkError):
            assert out_path.read_bytes() == out_bytes
            return
        assert not isinstance(chunks, ChunkError)  # copy succeeded only if reading did
        new = out_path.read_bytes()
        got = payloads(new)
        assert [p for c, p in got if c in ("fmt ", "data")] == \
            [p for c, p in payloads(out_bytes) if c in ("fmt ", "data")]
        expected = [(c.id, blob[c.offset:c.end]) for c in chunks
                    if c.id not in DROPPED_IDS and c.id != "bext"]
        assert [g for g in got if g[0] not in ("fmt ", "data", "bext")] == expected
        for c in (c for c in chunks if c.id == "bext" and c.size >= BEXT_FIXED_BYTES):
            new_bext = next(p for cid, p in got if cid == "bext")
            assert new_bext[:BEXT_FIXED_BYTES] == blob[c.offset:c.offset + BEXT_FIXED_BYTES]
            assert new_bext.endswith(ROW.encode())
        try:
            sf.info(src_path)
        except RuntimeError:  # libsndfile refuses the mutated source too
            return
        np.testing.assert_array_equal(sf.read(out_path, dtype="int16")[0], out16)

    check()


@pytest.mark.slow
def test_fuzz_mutated_output(tmp_path_factory):
    base, _, _, codes = _fuzz_base("riff")
    folder = tmp_path_factory.mktemp("fuzz_out")
    src_path = folder / "src.wav"
    src_path.write_bytes(base)
    out_path = folder / "out.wav"
    sf.write(out_path, (codes >> 8).astype(np.int16), RATE, subtype="PCM_16")
    out_bytes = out_path.read_bytes()
    size_fields = [4] + [c.offset - 4 for c in read_chunks(out_path)]
    payload_ranges = [(c.offset, c.size) for c in read_chunks(out_path)]
    kept = [(c, p) for c, p in payloads(base) if c not in DROPPED_IDS]

    @FUZZ
    @given(mutations(out_bytes, size_fields, payload_ranges))
    def check(blob):
        out_path.write_bytes(blob)
        report, peak = _call_bounded(copy_metadata, src_path, out_path)
        assert peak < 4 * 2**20
        assert sorted(p.name for p in folder.iterdir()) == ["out.wav", "src.wav"]
        if isinstance(report, ChunkError):
            assert out_path.read_bytes() == blob
            return
        got = iter(payloads(out_path.read_bytes()))
        # the source's kept chunks appear in order and byte for byte among the result's
        assert all(any(g == k for g in got) for k in kept)

    check()
