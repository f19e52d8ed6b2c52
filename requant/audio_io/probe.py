"""What a path holds before libsndfile opens it: its kind, and the frames its header declares.

Standard library only, so that the tree walk of a batch (and ``requant --help``)
stays light.
"""

import os
import stat
import struct
import sys

__all__ = ["non_regular_kind", "declared_frames", "sndfile_target"]


def sndfile_target(path, mode="r"):
    """What to hand python-soundfile for ``path``: the name, or an open file descriptor.

    python-soundfile encodes a name strictly, so a file whose name is not valid
    in the file system's encoding (bytes a Linux name may hold) cannot be opened
    by name; opened here and handed over as a descriptor, libsndfile reads and
    writes it natively. Returns ``(target, closefd)``.
    """
    name = os.fspath(path)
    try:
        if isinstance(name, str):
            name.encode(sys.getfilesystemencoding())
        else:
            raise UnicodeEncodeError("bytes", "", 0, 1, "a bytes name")
        return name, True
    except UnicodeEncodeError:
        flags = os.O_RDONLY if mode == "r" else os.O_RDWR | os.O_CREAT | os.O_TRUNC
        return os.open(name, flags, 0o666), True


def non_regular_kind(path):
    """What ``path`` is when it is not a regular file ("a FIFO", "a device", "a socket"),
    else None (links are followed)."""
    try:
        mode = os.stat(path).st_mode
    except OSError:
        return None
    if stat.S_ISREG(mode) or stat.S_ISDIR(mode):
        return None
    if stat.S_ISFIFO(mode):
        return "a FIFO (named pipe)"
    if stat.S_ISSOCK(mode):
        return "a socket"
    if stat.S_ISCHR(mode) or stat.S_ISBLK(mode):
        return "a device"
    return "not a file"


def declared_frames(path):
    """The frames a WAV/RF64 or AIFF header declares, or None for other files.

    libsndfile reports only the frames that are there, so a file whose audio
    was cut short (a copy that stopped half-way) reads as a shorter, valid
    file. Comparing with what the header declares tells the two apart.
    RIFF/WAVE (IBM & Microsoft 1991): ``data`` size over the ``fmt `` block
    align; RF64 (EBU Tech 3306): the ``ds64`` data size; AIFF/AIFC (Apple
    1989): ``COMM``'s numSampleFrames.
    """
    try:
        with open(path, "rb") as fh:
            head = fh.read(12)
            if len(head) < 12:
                return None
            if head[:4] in (b"RIFF", b"RF64", b"BW64") and head[8:] == b"WAVE":
                return _wav_declared_frames(fh, rf64=head[:4] != b"RIFF")
            if head[:4] == b"FORM" and head[8:] in (b"AIFF", b"AIFC"):
                return _aiff_declared_frames(fh)
    except OSError:
        return None
    return None


def _chunk_headers(fh, endian, limit=4096):
    """(id, size, payload offset) of each chunk from the current position; stops at EOF."""
    fmt = "<I" if endian == "<" else ">I"
    for _ in range(limit):
        pos = fh.tell()
        raw = fh.read(8)
        if len(raw) < 8:
            return
        size = struct.unpack(fmt, raw[4:])[0]
        yield raw[:4], size, pos + 8
        fh.seek(pos + 8 + size + (size & 1))


def _wav_declared_frames(fh, *, rf64):
    block_align = data_size = None
    for cid, size, at in _chunk_headers(fh, "<"):
        if cid == b"ds64" and rf64:
            fh.seek(at)
            raw = fh.read(16)
            if len(raw) == 16:
                data_size = struct.unpack("<QQ", raw)[1]
        elif cid == b"fmt ":
            fh.seek(at)
            raw = fh.read(14)
            if len(raw) == 14:
                block_align = struct.unpack("<H", raw[12:14])[0]
        elif cid == b"data":
            if not (rf64 and size == 0xFFFFFFFF and data_size is not None):
                data_size = size
            break
    if not block_align or data_size is None:
        return None
    return data_size // block_align


def _aiff_declared_frames(fh):
    for cid, _size, at in _chunk_headers(fh, ">"):
        if cid == b"COMM":
            fh.seek(at)
            raw = fh.read(6)
            return struct.unpack(">HI", raw)[1] if len(raw) == 6 else None
    return None
