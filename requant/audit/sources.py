"""The two files of an audit: the master and the delivery, opened and checked together.

The master is read as float (float32 where that holds every sample exactly,
as :func:`requant.audio_io.formats.read_dtype_for` decides). The delivery is
read as int32 codes, left-justified as libsndfile gives them, so the grid it
lies on is read from the bits themselves; a float delivery is accepted when
every sample lies on a grid of 32 bits or fewer. Blocks come from
:class:`requant.audio_io.reader.BlockReader` threads, so reading overlaps the
work on the previous block.
"""

import os

import numpy as np

from requant.audio_io.formats import container_bits_of, read_dtype_for
from requant.audio_io.reader import BlockReader, open_input
from requant.errors import InputError

__all__ = ["Source", "open_pair", "codes_from_float"]

_FLOATS = ("FLOAT", "DOUBLE")
_TWO31 = float(2**31)


def codes_from_float(x, path, start_frame):
    """Float samples of a delivery as int32 codes (left-justified on 32 bits).

    Raises
    ------
    InputError
        If a sample is not finite, outside [-1, 1) or off the 32-bit grid: the
        delivery is then not fixed point and has no word length to audit.
    """
    with np.errstate(over="ignore", invalid="ignore"):
        v = np.asarray(x, dtype=np.float64) * _TWO31
        ok = np.isfinite(v) & (v >= -_TWO31) & (v < _TWO31) & (v == np.floor(v))
    if not np.all(ok):
        bad = int(np.argwhere(~ok)[0][0])
        raise InputError(f"{path!r} is a float file whose frame {start_frame + bad} lies off "
                         "every fixed-point grid of 32 bits or fewer; audit compares fixed-point "
                         "deliveries with their master")
    return v.astype(np.int32)


class Source:
    """One file of the pair, open for reading.

    Attributes
    ----------
    path : str
    role : {'master', 'delivered'}
    rate : int, Hz
    channels, frames : int
    subtype, format : str
        libsndfile's names.
    container_bits : int or None
        Word length of an integer container; None for float files.
    dtype : str
        What :meth:`blocks` yields: the master's float dtype, or ``'int32'``
        codes for the delivery.
    """

    def __init__(self, path, role):
        self.path = os.fspath(path)
        self.role = role
        self._f = open_input(self.path)
        f = self._f
        self.rate, self.channels, self.frames = int(f.samplerate), int(f.channels), int(f.frames)
        self.subtype, self.format = f.subtype, f.format
        self.container_bits = container_bits_of(self.subtype)
        if role == "master":
            self.dtype = read_dtype_for(self.subtype)
        elif self.subtype.startswith("PCM_"):
            self.dtype = "int32"
        elif self.subtype in _FLOATS:
            self.dtype = "float64"
        else:
            self.close()
            raise InputError(f"{self.path!r} holds {self.subtype} samples, not fixed-point PCM: "
                             "audit needs the delivery as PCM (WAV, FLAC, AIFF)")

    def blocks(self, start, count, block_frames):
        """Yield blocks of up to ``block_frames`` frames from ``start``, ``count`` frames in all.

        Blocks are (frames, channels) arrays of :attr:`dtype` (int32 codes for
        the delivery), each valid until the next step. Fewer frames come when
        the file ends first.
        """
        if count <= 0:
            return
        self._f.seek(int(start))
        reader = BlockReader(self._f, block_frames, "float64" if self.dtype == "float64"
                             else self.dtype)
        done = 0
        try:
            for _, x in reader:
                x = x[:count - done]
                if self.role == "delivered" and self.dtype == "float64":
                    x = codes_from_float(x, self.path, start + done)
                yield x
                done += x.shape[0]
                if done >= count:
                    return
        finally:
            reader.close()

    def read(self, start, count):
        """``count`` frames from ``start`` as one array (fewer at the end of the file)."""
        parts = [np.array(b) for b in self.blocks(start, count, min(max(count, 1), 1 << 18))]
        if not parts:
            return np.zeros((0, self.channels), dtype=np.int32 if self.role == "delivered"
                            else self.dtype)
        return np.concatenate(parts)

    def describe(self):
        """Plain facts for the JSON."""
        return {"path": self.path, "sample_rate": self.rate, "channels": self.channels,
                "frames": self.frames, "format": self.format, "subtype": self.subtype,
                "container_bits": self.container_bits}

    def close(self):
        """Close the file (safe to call twice)."""
        try:
            self._f.close()
        except Exception:
            pass


def open_pair(master, delivered):
    """Open the master and the delivery; refuse a pair that cannot be compared.

    Raises
    ------
    InputError
        Either file unreadable, a different sample rate or channel count, or
        an empty file (one sentence naming the files and what to do).
    """
    m = Source(master, "master")
    try:
        d = Source(delivered, "delivered")
    except BaseException:
        m.close()
        raise
    problem = None
    if m.rate != d.rate:
        problem = (f"the master {m.path!r} is at {m.rate} Hz and the delivery {d.path!r} at "
                   f"{d.rate} Hz; audit compares files at the same sample rate, so give the "
                   "master at the delivery's rate")
    elif m.channels != d.channels:
        problem = (f"the master {m.path!r} has {m.channels} channel(s) and the delivery "
                   f"{d.path!r} {d.channels}; audit compares files with the same channels, so "
                   "give the master with the delivery's channel layout")
    elif m.frames == 0 or d.frames == 0:
        empty = m if m.frames == 0 else d
        problem = f"{empty.path!r} holds no audio frames; give a file with audio"
    if problem:
        m.close()
        d.close()
        raise InputError(problem)
    return m, d
