"""A plain RIFF/WAVE writer for the codes and the error signal.

libsndfile copies every block through its own buffers and, for float files,
scans it for the peak it writes into a PEAK chunk; on a 20-minute stereo
conversion that was about as much time as requantizing. Our blocks are
already the exact bytes a WAV file holds (little-endian integer codes, or
float32), so this writer hands them to the operating system directly and
fills in the sizes when it closes.

The header is the one libsndfile writes for the same file, minus the
optional PEAK chunk: ``RIFF``/``WAVE``, a 16-byte ``fmt `` chunk (format tag
1 for PCM, 3 for IEEE float, also for more than two channels and more than
16 bits), a 4-byte ``fact`` chunk (sample frames) for float, then ``data``.
Layout: IBM & Microsoft, *Multimedia Programming Interface and Data
Specifications 1.0* (1991): little-endian fields, 8-bit PCM unsigned with
128 for zero, wider PCM two's complement, a pad byte after an odd-sized
chunk. Files over 4 GiB are RF64 and stay with libsndfile.
"""

import os
import struct
import sys
import threading

import numpy as np

__all__ = ["WavWriter", "RAW_SUBTYPES", "SYNC_BYTES"]

#: Bytes written between two background flushes to the disk.
SYNC_BYTES = 32 * 2**20

#: subtype -> (format tag, bits per sample, the dtype :meth:`WavWriter.write` takes)
RAW_SUBTYPES = {
    "PCM_U8": (1, 8, np.int16),    # int16 codes left-justified (code << 8)
    "PCM_16": (1, 16, np.int16),
    "PCM_24": (1, 24, np.int32),   # int32 codes left-justified (code << 8)
    "PCM_32": (1, 32, np.int32),
    "FLOAT": (3, 32, np.float32),
}


def _info_chunk(text):
    """A ``LIST``/``INFO`` chunk holding ``text`` as its ``ICMT`` (comment), padded to even size."""
    body = str(text).encode("ascii", "replace") + b"\0"
    icmt = b"ICMT" + struct.pack("<I", len(body)) + body + b"\0" * (len(body) & 1)
    payload = b"INFO" + icmt
    return b"LIST" + struct.pack("<I", len(payload)) + payload


class WavWriter:
    """Write one WAV file block by block, like a ``soundfile.SoundFile`` in 'w' mode.

    Parameters
    ----------
    path : str or PathLike
        Created or truncated.
    samplerate : int, Hz
    channels : int
    subtype : str
        One of :data:`RAW_SUBTYPES`.

    background_sync : bool
        Flush what has been written to the disk on a helper thread, every
        :data:`SYNC_BYTES`, while writing goes on. The caller's final
        ``fsync`` (outputs are durable before they are renamed into place)
        then has little left to do, instead of waiting for the whole file.
    comment : str, optional
        A line of ASCII text stored as the file's comment: a ``LIST`` chunk of
        type ``INFO`` holding one ``ICMT`` chunk (NUL-terminated), before the
        ``data`` chunk (RIFF 1991, "INFO List Chunk").

    Notes
    -----
    Only :meth:`write` and :meth:`close` are offered; they raise ``OSError``
    as the operating system reports it (disk full, size limit).
    """

    def __init__(self, path, *, samplerate, channels, subtype, background_sync=False,
                 comment=None):
        if subtype not in RAW_SUBTYPES:
            raise ValueError(f"subtype {subtype!r} is not one of {', '.join(RAW_SUBTYPES)}")
        self._info = b"" if comment is None else _info_chunk(comment)
        if sys.byteorder != "little":  # pragma: no cover - every platform we run on
            raise ValueError("WavWriter writes host-order samples; this host is big-endian")
        self.samplerate = int(samplerate)
        self.channels = int(channels)
        self.subtype = subtype
        self._tag, self._bits, self._dtype = RAW_SUBTYPES[subtype]
        self._width = self._bits // 8
        self.frames = 0
        self.closed = False
        self._fd = os.open(os.fspath(path), os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o666)
        try:
            self._write_all(self._header(0))
        except BaseException:
            os.close(self._fd)
            self.closed = True
            raise
        self._unsynced = 0
        self._background = bool(background_sync)
        self._sync_thread = None  # started once SYNC_BYTES have been written (not for short files)
        self._wake = threading.Event()
        self._stop = False

    def _sync_loop(self):
        while True:
            self._wake.wait()
            self._wake.clear()
            if self._stop:
                return
            try:
                os.fdatasync(self._fd)
            except OSError:
                return  # a real failure shows up again in the caller's own fsync

    def _header(self, frames):
        ch, width = self.channels, self._width
        data = frames * ch * width
        fmt = struct.pack("<HHIIHH", self._tag, ch, self.samplerate,
                          self.samplerate * ch * width, ch * width, self._bits)
        chunks = b"fmt " + struct.pack("<I", len(fmt)) + fmt
        if self._tag == 3:
            chunks += b"fact" + struct.pack("<II", 4, frames)
        chunks += self._info
        riff = 4 + len(chunks) + 8 + data + (data & 1)
        return b"RIFF" + struct.pack("<I", riff) + b"WAVE" + chunks + b"data" + struct.pack(
            "<I", data)

    def _write_all(self, buf):
        if isinstance(buf, np.ndarray):
            buf = buf.reshape(-1).view(np.uint8)
        view = memoryview(buf)
        while len(view):
            n = os.write(self._fd, view)
            view = view[n:]

    def write(self, block):
        """Append ``block``, shape (frames, channels), of the subtype's dtype."""
        block = np.asarray(block)
        if block.dtype != self._dtype or block.ndim != 2 or block.shape[1] != self.channels:
            raise TypeError(f"WavWriter({self.subtype}) takes ({'frames'}, {self.channels}) "
                            f"{np.dtype(self._dtype)} blocks, not {block.dtype} {block.shape}")
        if self.subtype == "PCM_24":
            # the top three bytes of each little-endian int32 hold the 24-bit code
            out = np.ascontiguousarray(block).view(np.uint8).reshape(-1, 4)[:, 1:]
            out = np.ascontiguousarray(out)
        elif self.subtype == "PCM_U8":
            out = ((block >> 8) + 128).astype(np.uint8)
        else:
            out = np.ascontiguousarray(block)
        self._write_all(out)
        self.frames += block.shape[0]
        if self._background:
            self._unsynced += out.nbytes
            if self._unsynced >= SYNC_BYTES:
                self._unsynced = 0
                if self._sync_thread is None:
                    self._sync_thread = threading.Thread(target=self._sync_loop, daemon=True,
                                                         name="requant-sync")
                    self._sync_thread.start()
                self._wake.set()

    def close(self):
        """Write the pad byte and the final sizes, and close (safe to call twice)."""
        if self.closed:
            return
        self.closed = True
        if self._sync_thread is not None:
            self._stop = True
            self._wake.set()
            self._sync_thread.join()
        try:
            if (self.frames * self.channels * self._width) & 1:
                self._write_all(b"\0")
            os.lseek(self._fd, 0, os.SEEK_SET)
            self._write_all(self._header(self.frames))
        finally:
            os.close(self._fd)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
