"""Byte-level WAV chunk reader and metadata copier (RIFF/WAVE and RF64/BW64).

Batch conversion writes its audio with python-soundfile, which writes its own
``fmt ``, ``data`` and perhaps ``fact``, ``PEAK`` or ``LIST`` chunks. Sampler
loops, cue points, broadcast metadata and anything else the source WAV held
would be lost. Requantizing never moves a sample, so those chunks stay valid:
:func:`copy_metadata` carries them over from the source, byte for byte.

Everything here reads chunk headers only and seeks past payloads, so the
audio payload is never loaded into memory, and a header that declares a huge
size cannot cause a huge allocation.

Notes
-----
Layouts follow these specifications:

* RIFF/WAVE: IBM & Microsoft, *Multimedia Programming Interface and Data
  Specifications 1.0*, 1991. A chunk is a four-character id, a 32-bit
  little-endian payload size and the payload, followed by one pad byte when
  the size is odd (word alignment). The pad byte is not counted in the size.
  A program that copies a file should copy the chunks it does not interpret.
* RF64: EBU Tech 3306 (and the same layout with the id ``BW64``, ITU-R
  BS.2088). The file starts with ``RF64`` and a size of 0xFFFFFFFF; the first
  chunk, ``ds64``, holds the 64-bit RIFF size, data size and sample count,
  then a table of (id, 64-bit size) pairs for other chunks over 4 GiB. A chunk
  whose 32-bit size is 0xFFFFFFFF takes its size from ``ds64``.
* ``bext``: EBU Tech 3285 version 2, a 602-byte fixed part followed by the
  CodingHistory text, rows as defined by EBU R 98.
"""

from __future__ import annotations

import dataclasses
import operator
import os
import stat
import struct
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import BinaryIO

from requant.audio_io.atomic import TEMP_SUFFIX, temp_stem
from requant.errors import InputError, OutputError, UsageError

__all__ = [
    "POSITION_CHUNKS",
    "BEXT_FIXED_BYTES",
    "DEFAULT_MAX_CHUNKS",
    "MAX_IN_MEMORY_BYTES",
    "Chunk",
    "ChunkError",
    "coding_history_row",
    "copy_metadata",
    "read_chunks",
    "wav_chunk_ids",
]

#: Largest payload, in bytes, that :meth:`Chunk.read` loads into memory.
MAX_IN_MEMORY_BYTES = 64 * 2**20
#: Default cap on the number of chunks in one file (bounds the memory of the chunk list).
DEFAULT_MAX_CHUNKS = 100_000
#: Size in bytes of the fixed part of a ``bext`` chunk (EBU Tech 3285 v2).
BEXT_FIXED_BYTES = 602

_COPY_BLOCK = 2**20  # bytes per read/write when copying a payload
_SIZE_MARK = 0xFFFFFFFF  # RF64: "take the size from ds64" (EBU Tech 3306)
_RIFF_SIZE_LIMIT = 0xFFFFFFFF  # largest size a 32-bit field holds; tests lower it
_DS64_FIXED = 28  # riffSize u64, dataSize u64, sampleCount u64, tableLength u32
_RF64_FORMS = (b"RF64", b"BW64")

# Source chunks that are not copied, and why.
_REGENERATED = frozenset({"fmt ", "data", "fact", "ds64"})  # the writer's own describe the output
_PADDING = frozenset({"JUNK", "junk", "PAD ", "FLLR"})  # filler, no content (common practice)
_STALE = frozenset({"PEAK", "levl"})  # summaries of sample values; requantizing changes them
#: Chunks that hold sample positions or the sample period (cue points, sampler loops,
#: playlist segments): wrong after a change of sample rate. (A ``LIST``/``adtl`` naming cue
#: points stays: its labels are text and harmless without the cues.)
POSITION_CHUNKS = frozenset({"cue ", "smpl", "plst"})
_R98_MODES = ("mono", "stereo", "dual-mono", "joint-stereo", "multichannel")


class ChunkError(InputError):
    """A WAV file is truncated, inconsistent or not a RIFF/RF64 WAVE file.

    A ``requant.errors.InputError``, and so also a ``ValueError``.
    """


@dataclasses.dataclass(frozen=True)
class Chunk:
    """One chunk of a RIFF/RF64 file.

    Parameters
    ----------
    id : str, 4 characters
        Chunk id, such as ``'fmt '`` or ``'smpl'``.
    offset : int, bytes
        Position of the payload (just after the 8-byte header) in the file.
    size : int, bytes
        Payload size, without the pad byte; for RF64 the 64-bit size.
    """

    id: str
    offset: int
    size: int

    @property
    def header_offset(self) -> int:
        """int, bytes: position of the chunk's 8-byte header."""
        return self.offset - 8

    @property
    def end(self) -> int:
        """int, bytes: position just past the payload (before any pad byte)."""
        return self.offset + self.size

    def read(self, path: str | os.PathLike, *, max_bytes: int = MAX_IN_MEMORY_BYTES) -> bytes:
        """Read this chunk's payload from `path`.

        Parameters
        ----------
        path : str or os.PathLike
            The file this chunk was read from.
        max_bytes : int, bytes, default MAX_IN_MEMORY_BYTES
            Refuse payloads larger than this (use :func:`copy_metadata`,
            which streams, for big chunks).

        Returns
        -------
        bytes
            The payload, without the pad byte.

        Raises
        ------
        ChunkError
            If the payload is larger than `max_bytes` or the file is shorter
            than the chunk says.
        """
        if self.size > max_bytes:
            raise ChunkError(
                f"chunk {self.id!r} holds {self.size} bytes, more than {max_bytes=}; "
                "stream it instead of loading it"
            )
        with _open(path) as fh:
            return _read_at(fh, self.offset, self.size, path)


@dataclasses.dataclass(frozen=True)
class _Ds64:
    riff_size: int
    data_size: int
    sample_count: int
    table: dict[str, int]


@dataclasses.dataclass(frozen=True)
class _Layout:
    form: bytes  # b"RIFF", b"RF64" or b"BW64"
    chunks: tuple[Chunk, ...]
    ds64: _Ds64 | None


def _fail(path, message: str) -> ChunkError:
    return ChunkError(f"{os.fspath(path)!r}: {message}")


def _open(path) -> BinaryIO:
    # Unbuffered: every read sees the file as it is now (no stale buffer), and
    # reads are header-sized or block-sized anyway.
    return open(path, "rb", buffering=0)


def _read_at(fh: BinaryIO, offset: int, n: int, path) -> bytes:
    fh.seek(offset)
    data = b""
    while len(data) < n:  # raw reads may return fewer bytes than asked
        part = fh.read(n - len(data))
        if not part:
            break
        data += part
    if len(data) != n:
        raise _fail(path, f"ends at byte {offset + len(data)} but {n} bytes were expected from "
                          f"byte {offset}; the file is truncated or changed while being read")
    return data


def _chunk_id(raw: bytes, pos: int, path) -> str:
    # RIFF 1991: a chunk id is four ASCII characters (printable, space-padded).
    if not all(0x20 <= b <= 0x7E for b in raw):
        raise _fail(path, f"holds {raw!r} where a chunk id was expected at byte {pos}; "
                          "the file is damaged or its size fields are wrong")
    return raw.decode("ascii")


def _scan(fh: BinaryIO, path, *, max_chunks: int = DEFAULT_MAX_CHUNKS) -> _Layout:
    """Walk the chunk headers of an open WAV file (see :func:`read_chunks`)."""
    file_size = os.fstat(fh.fileno()).st_size
    if file_size < 12:
        raise _fail(path, f"holds only {file_size} bytes, too few for a WAV header")
    form, size32, wave = struct.unpack("<4sI4s", _read_at(fh, 0, 12, path))
    if form == b"RIFX":
        raise _fail(path, f"is a big-endian {form.decode()!r} file, which is not supported")
    if form not in (b"RIFF", *_RF64_FORMS):
        raise _fail(path, f"starts with {form!r}, not 'RIFF' or 'RF64', so it is not a WAV file")
    if wave != b"WAVE":
        raise _fail(path, f"is a RIFF file of form {wave!r}, not 'WAVE'")

    chunks: list[Chunk] = []
    ds64 = None
    pos = 12
    riff_size = size32
    if form in _RF64_FORMS:
        if file_size < 20 + _DS64_FIXED:
            raise _fail(path, f"holds only {file_size} bytes, too few for an RF64 header with ds64")
        ds_id, ds_size = struct.unpack("<4sI", _read_at(fh, 12, 8, path))
        if ds_id != b"ds64":
            raise _fail(path, f"is RF64 but its first chunk is {ds_id!r}, not the 'ds64' chunk "
                              "that EBU Tech 3306 requires")
        if ds_size < _DS64_FIXED or 20 + ds_size > file_size:
            raise _fail(path, f"has a 'ds64' chunk of {ds_size} bytes, which does not fit "
                              f"{_DS64_FIXED} <= size <= {file_size - 20}")
        r64, d64, n64, table_len = struct.unpack("<QQQI", _read_at(fh, 20, _DS64_FIXED, path))
        if table_len > max_chunks or _DS64_FIXED + 12 * table_len > ds_size:
            raise _fail(path, f"has a 'ds64' table of {table_len} entries, which does not fit "
                              f"its {ds_size}-byte chunk")
        table: dict[str, int] = {}
        raw_table = _read_at(fh, 20 + _DS64_FIXED, 12 * table_len, path)
        for k in range(table_len):
            raw_id, size64 = struct.unpack_from("<4sQ", raw_table, 12 * k)
            table.setdefault(_chunk_id(raw_id, 20 + _DS64_FIXED + 12 * k, path), size64)
        ds64 = _Ds64(r64, d64, n64, table)
        if size32 == _SIZE_MARK:
            riff_size = r64
        chunks.append(Chunk("ds64", 20, ds_size))
        pos = 20 + ds_size + (ds_size & 1)

    form_end = 8 + riff_size
    if form_end > file_size + 1:
        raise _fail(path, f"declares {form_end} bytes in its header but holds only {file_size}; "
                          "the file is truncated or its size field is wrong")
    limit = min(form_end, file_size)
    if chunks and chunks[0].end > limit:
        raise _fail(path, f"has a 'ds64' chunk that runs past the {limit}-byte RF64 form")

    while pos < limit:
        if limit - pos < 8:
            tail = _read_at(fh, pos, limit - pos, path)
            if any(tail):
                raise _fail(path, f"ends with {limit - pos} stray bytes at byte {pos} that "
                                  "are not a chunk")
            pos = limit
            break
        raw_id, size = struct.unpack("<4sI", _read_at(fh, pos, 8, path))
        cid = _chunk_id(raw_id, pos, path)
        if ds64 is not None and size == _SIZE_MARK:
            size = ds64.data_size if cid == "data" else ds64.table.get(cid, size)
        if pos + 8 + size > limit:
            raise _fail(path, f"has chunk {cid!r} at byte {pos} declaring {size} bytes, but only "
                              f"{limit - pos - 8} remain in the form; the file is truncated or "
                              "its size fields are wrong")
        if len(chunks) >= max_chunks:
            raise _fail(path, f"holds more than {max_chunks=} chunks; it is damaged or not "
                              "an audio file")
        chunks.append(Chunk(cid, pos + 8, size))
        pos += 8 + size + (size & 1)

    # Two tolerated off-by-one cases, both about a final odd chunk's pad byte:
    # the pad byte is missing from the file (pos == form_end == file_size + 1),
    # or it is present but not counted in the RIFF size (pos == file_size == form_end + 1).
    last_odd = bool(chunks) and chunks[-1].size & 1 and pos == chunks[-1].end + 1
    if form_end == file_size + 1 and not (last_odd and pos == form_end):
        raise _fail(path, f"declares {form_end} bytes in its header but holds only {file_size}; "
                          "the file is truncated or its size field is wrong")
    if file_size > form_end and not (last_odd and pos == file_size == form_end + 1):
        raise _fail(path, f"holds {file_size - form_end} bytes after the end of the form that "
                          f"its header declares ({form_end} bytes); the size field is wrong or "
                          "data was appended")
    return _Layout(form, tuple(chunks), ds64)


def read_chunks(path: str | os.PathLike, *, max_chunks: int = DEFAULT_MAX_CHUNKS) -> list[Chunk]:
    """List the chunks of a WAV file (RIFF/WAVE, RF64 or BW64).

    Only the 8-byte chunk headers (and the small ``ds64`` chunk) are read;
    payloads, including the audio, are skipped with seeks.

    Parameters
    ----------
    path : str or os.PathLike
        The WAV file.
    max_chunks : int, default DEFAULT_MAX_CHUNKS
        Refuse files with more chunks than this (bounds memory).

    Returns
    -------
    list of Chunk
        In file order. For RF64 the ``ds64`` chunk comes first and every size
        is the 64-bit size.

    Raises
    ------
    ChunkError
        If the file is not a little-endian RIFF/RF64 WAVE file, or a size
        field disagrees with the file (truncated, lying or garbage). Two
        off-by-one slips about the final chunk's pad byte are tolerated
        (a missing final pad byte, and a final pad byte that the RIFF size
        does not count), and so are fewer than 8 zero bytes at the end of
        the form.
    OSError
        If the file cannot be opened.

    Examples
    --------
    >>> import os, struct, tempfile
    >>> fmt = struct.pack("<HHIIHH", 1, 1, 8000, 16000, 2, 16)
    >>> body = b"WAVE" + b"fmt " + struct.pack("<I", 16) + fmt + b"data" + struct.pack("<I", 0)
    >>> with tempfile.NamedTemporaryFile(suffix=".wav", delete=False) as f:
    ...     _ = f.write(b"RIFF" + struct.pack("<I", len(body)) + body)
    >>> [(c.id, c.offset, c.size) for c in read_chunks(f.name)]
    [('fmt ', 20, 16), ('data', 44, 0)]
    >>> os.unlink(f.name)
    """
    with _open(path) as fh:
        return list(_scan(fh, path, max_chunks=max_chunks).chunks)


def wav_chunk_ids(path: str | os.PathLike) -> list[str]:
    """Return the chunk ids of a WAV file in file order, such as ``['fmt ', 'data']``.

    Parameters
    ----------
    path : str or os.PathLike
        The WAV file.

    Returns
    -------
    list of str

    Raises
    ------
    ChunkError
        As :func:`read_chunks`.
    """
    return [c.id for c in read_chunks(path)]


def coding_history_row(*, sample_rate: int, bits: int, channels: int, text: str,
                       mode: str | None = None) -> str:
    """Format one CodingHistory row for a ``bext`` chunk (EBU R 98).

    Parameters
    ----------
    sample_rate : int, Hz
        Sample rate of the output (``F=``).
    bits : int, 1..32
        Word length of the output (``W=``).
    channels : int, >= 1
        Channel count; gives ``M=mono`` for 1, ``stereo`` for 2 and
        ``multichannel`` for more, unless `mode` is given.
    text : str
        Free text (``T=``): printable ASCII without commas, for example
        ``"requant 0.1.0; TPDF"``.
    mode : {'mono', 'stereo', 'dual-mono', 'joint-stereo', 'multichannel'}, optional
        Overrides the mode derived from `channels`.

    Returns
    -------
    str
        ``"A=PCM,F=...,W=...,M=...,T=...\\r\\n"``.

    Raises
    ------
    TypeError
        If a number is not an integer.
    requant.errors.UsageError
        If a value is out of range or `text` holds a comma, a line break or
        non-ASCII characters.

    Notes
    -----
    EBU R 98 (as recalled, from memory; several secondary sources agree)
    defines the fields A (coding algorithm: ANALOGUE, PCM, MPEG1L1 ...),
    F (sampling frequency, Hz), B (bit rate, for MPEG), W (word length, bits),
    M (mode: mono, stereo, dual-mono, joint-stereo) and T (free ASCII text
    without commas), separated by commas; EBU Tech 3285 ends each row with
    CR LF. R 98 lists W values 8 to 24 and names no mode for more than two
    channels: ``W`` here takes any word length requant writes, and
    ``multichannel`` is this project's own word for three or more channels.

    Examples
    --------
    >>> coding_history_row(sample_rate=48000, bits=16, channels=2, text="requant 0.1.0; TPDF")
    'A=PCM,F=48000,W=16,M=stereo,T=requant 0.1.0; TPDF\\r\\n'
    """
    sample_rate = operator.index(sample_rate)
    bits = operator.index(bits)
    channels = operator.index(channels)
    if sample_rate <= 0:
        raise UsageError(f"{sample_rate=} must be a positive number of Hz")
    if not 1 <= bits <= 32:
        raise UsageError(f"{bits=} must be a word length from 1 to 32")
    if channels < 1:
        raise UsageError(f"{channels=} must be at least 1")
    if not isinstance(text, str):
        raise TypeError(f"text must be a str, not {type(text).__name__}")
    if not all(" " <= ch <= "~" for ch in text) or "," in text:
        raise UsageError(f"{text=} must be printable ASCII without commas or line breaks "
                         "(EBU R 98 T= field)")
    if mode is None:
        mode = {1: "mono", 2: "stereo"}.get(channels, "multichannel")
    elif mode not in _R98_MODES:
        raise UsageError(f"{mode=} must be one of {_R98_MODES}")
    return f"A=PCM,F={sample_rate},W={bits},M={mode},T={text}\r\n"


# --------------------------------------------------------------------------- copying

@dataclasses.dataclass(frozen=True)
class _Item:
    """One chunk of the file being written: its id, payload size and payload writer."""

    id: str
    size: int
    write: Callable[[BinaryIO], None]
    mark: bool = False  # RF64: the header's size field reads 0xFFFFFFFF


def _copy_range(fin: BinaryIO, offset: int, size: int, fout: BinaryIO, path) -> None:
    """Copy `size` bytes from `fin` at `offset` to `fout` in bounded blocks."""
    if size <= 0:
        return
    fin.seek(offset)
    buf = bytearray(min(size, _COPY_BLOCK))
    view = memoryview(buf)
    remaining = size
    while remaining:
        n = fin.readinto(view[:min(remaining, len(buf))])
        if not n:
            raise _fail(path, f"ended {remaining} bytes early while a chunk was being copied; "
                              "the file changed or is damaged")
        fout.write(view[:n])
        remaining -= n


def _copier(fin: BinaryIO, chunk: Chunk, path) -> Callable[[BinaryIO], None]:
    return lambda fout: _copy_range(fin, chunk.offset, chunk.size, fout, path)


def _list_type(fh: BinaryIO, chunk: Chunk, path) -> str | None:
    if chunk.id != "LIST" or chunk.size < 4:
        return None
    return _read_at(fh, chunk.offset, 4, path).decode("latin-1")


def _bext_with_row(fh: BinaryIO, chunk: Chunk, row: bytes, path) -> _Item | None:
    """Plan a ``bext`` payload with `row` appended to its CodingHistory.

    The fixed part and the existing history are kept byte for byte; trailing
    NUL bytes after the history are dropped, and a line break is added first
    if the last row lacks one. Returns None when the chunk is shorter than
    the 602-byte fixed part (it is then copied unchanged).
    """
    start = chunk.offset + BEXT_FIXED_BYTES
    if chunk.size < BEXT_FIXED_BYTES:
        return None
    keep_end = chunk.end  # scan back over trailing NULs in bounded blocks
    while keep_end > start:
        n = min(_COPY_BLOCK, keep_end - start)
        block = _read_at(fh, keep_end - n, n, path)
        stripped = block.rstrip(b"\0")
        keep_end -= n - len(stripped)
        if stripped:
            break
    sep = b""
    if keep_end > start:
        last = _read_at(fh, keep_end - 1, 1, path)
        sep = {b"\n": b"", b"\r": b"\n"}.get(last, b"\r\n")
    keep = keep_end - chunk.offset
    extra = sep + row

    def write(fout: BinaryIO) -> None:
        _copy_range(fh, chunk.offset, keep, fout, path)
        fout.write(extra)

    return _Item("bext", keep + len(extra), write)


def _u16_at(fh: BinaryIO, chunk: Chunk, at: int, path) -> int | None:
    if chunk.size < at + 2:
        return None
    return struct.unpack("<H", _read_at(fh, chunk.offset + at, 2, path))[0]


def _write_failed(output: Path, exc: OSError) -> OutputError:
    return OutputError(f"{os.fspath(output)!r}: could not write the file with metadata "
                       f"({exc}); the output was left unchanged")


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:  # not possible on every platform
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def copy_metadata(source: str | os.PathLike, output: str | os.PathLike, *,
                  coding_history_row: str | None = None,
                  also_drop: frozenset[str] = frozenset()) -> dict[str, list[str] | str]:
    """Copy the source WAV's metadata chunks into a freshly written output WAV.

    `output` is rewritten atomically (a temporary file in the same folder,
    fsync, ``os.replace``): on any error it is left as it was, and no partial
    file remains.

    Parameters
    ----------
    source : str or os.PathLike
        The WAV (RIFF, RF64 or BW64) the audio came from.
    output : str or os.PathLike
        The WAV just written from the same samples (by soundfile).
    coding_history_row : str, optional
        A row from :func:`coding_history_row`, ending in CR LF. If given, it
        is appended to the CodingHistory of the source's ``bext`` chunk. No
        ``bext`` is created when the source has none.
    also_drop : frozenset of str, optional
        More source chunk ids not to carry (e.g. those that point at sample
        positions, :data:`POSITION_CHUNKS`, when the rate changed).

    Returns
    -------
    dict
        ``copied``: ids of source chunks copied byte for byte, in output
        order; ``rewritten``: ids of source chunks copied with a change
        (``bext`` with the new row); ``dropped``: ids of source chunks not
        carried over; ``output_dropped``: ids of the output's own chunks
        removed because the source's copy supersedes them, or because they
        are padding; ``form``: ``'RIFF'`` or ``'RF64'``/``'BW64'``.

    Raises
    ------
    ChunkError
        If either file is not a readable WAV (see :func:`read_chunks`), or
        the output does not hold exactly one ``fmt `` and one ``data`` chunk.
    requant.errors.UsageError
        If the row is malformed.
    requant.errors.OutputError
        If `source` and `output` are the same file, or the new file cannot be
        written or moved into place (the output is then left unchanged).
    OSError
        If a file cannot be opened for reading.

    Notes
    -----
    Which source chunks are carried over (by the RIFF rule that a copier
    keeps the chunks it does not interpret):

    * dropped, because the output's own describe the new audio: ``fmt ``,
      ``data``, ``fact``, ``ds64``;
    * dropped, being filler: ``JUNK``, ``junk``, ``PAD ``, ``FLLR`` (filler
      ids seen in practice);
    * dropped, because they summarise sample values that requantizing
      changes: ``PEAK`` (peak value and position per channel) and ``levl``
      (peak envelope, EBU Tech 3285 Supplement 3, from memory);
    * copied byte for byte: everything else, such as ``LIST`` (INFO, adtl),
      ``cue ``, ``smpl``, ``inst``, ``iXML``, ``axml``, ``chna``, ``cart``
      and unknown chunks, and ``bext`` unless a row is appended.

    Copied chunks refer to samples by index (loop points, cue positions),
    which requantizing never moves. Text fields that describe the format,
    such as a bit depth inside ``iXML``, are copied as they are. The loudness
    fields of ``bext`` v2 are kept: 16-bit TPDF noise (about -96 dBFS) moves
    a -23 LUFS programme by well under their 0.01 LU step, but at very short
    word lengths (8 bits: noise near -48 dBFS) they may be off by a few
    hundredths of a LU, and the true-peak field by an LSB or so.

    The output's own chunks are kept (``fmt `` first, then ``fact``,
    ``PEAK`` etc. as soundfile wrote them), except a chunk that the source
    also has: then the source's copy wins. ``LIST`` chunks are matched by
    list type, so the source's ``LIST``/``INFO`` replaces soundfile's while a
    ``LIST``/``adtl`` of the output stays if the source has none.

    Placement: the output's ``fmt `` comes first, then its other pre-audio
    chunks, then the source chunks that stood before the source's ``data``
    chunk (in source order), then ``data``, then the source chunks that
    followed the source's ``data`` chunk, then the output's own chunks that
    followed its ``data``. Source order is kept otherwise.

    Every odd-sized chunk gets its zero pad byte. The result is RIFF unless
    the output was already RF64/BW64 or the result exceeds what 32-bit size
    fields hold (4 GiB), in which case it is RF64 with a ``ds64`` chunk
    (EBU Tech 3306) whose sizes are the 64-bit truth, whose table lists any
    non-data chunk over 4 GiB, and whose sample count is the data size over
    the block align of ``fmt ``.
    """
    source = Path(os.fspath(source))
    output = Path(os.fspath(output))
    row = None if coding_history_row is None else _encoded_row(coding_history_row)
    tmp = None
    try:
        with _open(source) as fs, _open(output) as fo:
            if os.path.samestat(os.fstat(fs.fileno()), os.fstat(fo.fileno())):
                raise OutputError(f"source and output are the same file ({os.fspath(output)!r}); "
                                  "write the output to a new path first")
            src = _scan(fs, source)
            out = _scan(fo, output)
            items, report = _plan(fs, src, source, fo, out, output, row, also_drop)
            report["form"], header, items = _frame(fo, out, output, items)
            tmp = _write_temp(output, header, items)
        try:
            os.replace(tmp, output)
        except OSError as exc:
            raise _write_failed(output, exc) from exc
    except BaseException:
        if tmp is not None:
            tmp.unlink(missing_ok=True)
        raise
    _fsync_dir(output.parent)
    return report


def _encoded_row(coding_history_row: str) -> bytes:
    """A coding-history row as bytes, after checking it is one ASCII row ending in CR LF."""
    if not isinstance(coding_history_row, str):
        raise TypeError(f"coding_history_row must be a str, not "
                        f"{type(coding_history_row).__name__}")
    if not coding_history_row.isascii() or not coding_history_row.endswith("\r\n") \
            or any(ch in coding_history_row[:-2] for ch in "\r\n\0"):
        raise UsageError(f"{coding_history_row=} must be one ASCII row ending in CR LF; "
                         "build it with coding_history_row()")
    return coding_history_row.encode("ascii")


def _plan(fs, src: _Layout, source: Path, fo, out: _Layout, output: Path, row,
          also_drop=frozenset()):
    """Choose and order the chunks of the new file; see :func:`copy_metadata`."""
    fmts = [c for c in out.chunks if c.id == "fmt "]
    datas = [c for c in out.chunks if c.id == "data"]
    if len(fmts) != 1 or len(datas) != 1:
        raise _fail(output, f"holds {len(fmts)} 'fmt ' and {len(datas)} 'data' chunks; "
                            "expected exactly one of each, as soundfile writes")
    dropped: list[str] = []
    output_dropped: list[str] = []

    src_pre: list[tuple[_Item, bool]] = []  # (item, rewritten)
    src_post: list[tuple[_Item, bool]] = []
    src_keys: set[tuple[str, str | None]] = set()
    seen_data = False
    for c in src.chunks:
        if c.id == "data":
            seen_data = True
        if c.id in _REGENERATED or c.id in _PADDING or c.id in _STALE or c.id in also_drop:
            dropped.append(c.id)
            continue
        item = _bext_with_row(fs, c, row, source) if c.id == "bext" and row is not None else None
        if item is None:
            entry = (_Item(c.id, c.size, _copier(fs, c, source)), False)
        else:
            entry = (item, True)
        src_keys.add((c.id, _list_type(fs, c, source)))
        (src_post if seen_data else src_pre).append(entry)
    if not seen_data:  # not a playable WAV; keep its chunks after the audio
        src_pre, src_post = [], src_pre

    out_pre: list[_Item] = []
    out_post: list[_Item] = []
    seen_data = False
    for c in out.chunks:
        if c.id in ("fmt ", "ds64"):
            continue
        if c.id == "data":
            seen_data = True
            continue
        if c.id in _PADDING or (c.id, _list_type(fo, c, output)) in src_keys:
            output_dropped.append(c.id)
            continue
        (out_post if seen_data else out_pre).append(_Item(c.id, c.size, _copier(fo, c, output)))

    fmt, data = fmts[0], datas[0]
    items = ([_Item("fmt ", fmt.size, _copier(fo, fmt, output))] + out_pre
             + [i for i, _ in src_pre]
             + [_Item("data", data.size, _copier(fo, data, output))]
             + [i for i, _ in src_post] + out_post)
    report = {
        "copied": [i.id for i, rewritten in src_pre + src_post if not rewritten],
        "rewritten": [i.id for i, rewritten in src_pre + src_post if rewritten],
        "dropped": dropped,
        "output_dropped": output_dropped,
    }
    return items, report


def _frame(fo, out: _Layout, output: Path, items: list[_Item]):
    """Choose RIFF or RF64 and build the file header (and ds64) for `items`.

    Returns the form name, the header bytes and the items, those whose size
    field must read 0xFFFFFFFF (RF64) marked.
    """
    body = 4 + sum(8 + i.size + (i.size & 1) for i in items)  # 'WAVE' + chunks
    big = [i for i in items if i.id != "data" and i.size > _RIFF_SIZE_LIMIT]
    data = next(i for i in items if i.id == "data")
    rf64 = (out.form in _RF64_FORMS or body > _RIFF_SIZE_LIMIT or big
            or data.size > _RIFF_SIZE_LIMIT)
    if not rf64:
        return "RIFF", b"RIFF" + struct.pack("<I", body) + b"WAVE", items

    form = out.form if out.form in _RF64_FORMS else b"RF64"
    ds_size = _DS64_FIXED + 12 * len(big)
    riff_size = body + 8 + ds_size
    if out.ds64 is not None:
        samples = out.ds64.sample_count
    else:
        fmt = next(c for c in out.chunks if c.id == "fmt ")
        block_align = _u16_at(fo, fmt, 12, output)
        samples = data.size // block_align if block_align else 0
    ds64 = struct.pack("<QQQI", riff_size, data.size, samples, len(big))
    ds64 += b"".join(struct.pack("<4sQ", i.id.encode("ascii"), i.size) for i in big)
    header = (form + struct.pack("<I", _SIZE_MARK) + b"WAVE"
              + b"ds64" + struct.pack("<I", ds_size) + ds64)
    # EBU Tech 3306: in RF64 the data chunk's size field is -1 (its size is in
    # ds64), and so is that of any chunk listed in the ds64 table.
    items = [dataclasses.replace(i, mark=True) if i.id == "data" or i.size > _RIFF_SIZE_LIMIT
             else i for i in items]
    return form.decode("ascii"), header, items


def _write_temp(output: Path, header: bytes, items: list[_Item]) -> Path:
    """Write header and items to a new temporary file beside `output`, fsync and check it.

    Returns the temporary file's path; removes it again on any error.
    """
    try:
        stem = temp_stem(output.parent, output.name)
        fd, tmp_name = tempfile.mkstemp(dir=output.parent, prefix=f".{stem}.",
                                        suffix=TEMP_SUFFIX)
    except OSError as exc:
        raise _write_failed(output, exc) from exc
    tmp = Path(tmp_name)
    try:
        with os.fdopen(fd, "wb") as fw:
            fw.write(header)
            for it in items:
                size_field = _SIZE_MARK if it.mark else it.size
                fw.write(it.id.encode("ascii") + struct.pack("<I", size_field))
                start = fw.tell()
                it.write(fw)
                if fw.tell() - start != it.size:
                    raise _fail(output, f"chunk {it.id!r} came out {fw.tell() - start} bytes long "
                                        f"instead of {it.size}; output left unchanged")
                if it.size & 1:
                    fw.write(b"\0")
            fw.flush()
            os.fsync(fw.fileno())
        os.chmod(tmp, stat.S_IMODE(os.stat(output).st_mode))
        with _open(tmp) as fh:  # self-check: the new file must read back as planned
            got = [(c.id, c.size) for c in _scan(fh, tmp).chunks if c.id != "ds64"]
        if got != [(i.id, i.size) for i in items]:
            raise _fail(output, "the rewritten file did not read back as planned; output left "
                                "unchanged")
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        if isinstance(exc, OutputError):
            raise
        raise _write_failed(output, exc) from exc
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return tmp
