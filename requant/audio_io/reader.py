"""Reading audio: opening an input with one clear error, grid checks, and blocks.

:class:`BlockReader` reads on a thread of its own: libsndfile calls through
python-soundfile (cffi) release the GIL, so reading the next block overlaps
requantizing this one. Buffers circulate through a free queue, so memory is a
fixed handful of blocks whatever the file length.
"""

import collections
import os
import queue
import threading

import numpy as np

from requant.audio_io.formats import container_bits_of
from requant.audio_io.probe import non_regular_kind, sndfile_target
from requant.errors import InputError

__all__ = ["open_input", "read_block", "read_failed", "on_grid", "first_nonfinite", "BlockReader",
           "read_blocks"]

_END = object()


def open_input(path):
    """Open an audio file for reading; raise :class:`InputError` if it can't be.

    Returns
    -------
    soundfile.SoundFile
    """
    import soundfile as sf

    p = os.fspath(path)
    if not os.path.exists(p):
        raise InputError(f"{p!r}: no such file; check the path")
    if os.path.isdir(p):
        raise InputError(f"{p!r} is a folder; give an audio file (use 'requant batch' for folders)")
    kind = non_regular_kind(p)
    if kind is not None:
        # opening a FIFO waits for a writer forever; a device may never end
        raise InputError(f"{p!r} is {kind}, not a regular file; give an audio file saved on "
                         "disk")
    try:
        target, closefd = sndfile_target(p)
        return sf.SoundFile(target, closefd=closefd)
    except (sf.LibsndfileError, RuntimeError, TypeError) as exc:
        detail = str(exc).split(":")[-1].strip() or "unreadable"
        raise InputError(
            f"{p!r} is not an audio file that can be read ({detail}); check that it is a "
            "complete WAV, FLAC, AIFF or other PCM file"
        ) from None
    except OSError as exc:
        raise InputError(f"{p!r} cannot be opened ({exc.strerror or exc}); check its "
                         "permissions") from None


def on_grid(f, *, dtype, scale, kmin, kmax, block_frames, subtype):
    """True when every sample already lies on the target grid, in range.

    An integer container no wider than the target is on the grid without a
    look. Otherwise the file is scanned, stopping at the first sample off the
    grid (usually within the first block of real audio).
    """
    cbits = container_bits_of(subtype)
    if cbits is not None and cbits <= round(np.log2(scale)) + 1:
        return True
    f.seek(0)
    try:
        # a small first look settles almost every real file (the first off-grid sample)
        n = min(block_frames, 4096)
        while True:
            x = f.read(n, dtype="float64")
            n = block_frames
            if x.shape[0] == 0:
                return True
            with np.errstate(over="ignore"):  # a damaged file: infinite is off the grid
                v = x * scale
            if not np.all(np.isfinite(v)):
                return False
            if np.any(v != np.floor(v)) or v.min() < kmin or v.max() > kmax:
                return False
    finally:
        f.seek(0)


def first_nonfinite(x, start_frame):
    bad = np.argwhere(~np.isfinite(x))[0]
    kind = "NaN" if np.isnan(x[tuple(bad)]) else "infinite"
    return start_frame + int(bad[0]), int(bad[1]), kind


def read_failed(f, start_frame, exc):
    """The one sentence for a read that failed part-way: a damaged input, not an output."""
    detail = str(exc).split(":")[-1].strip() or type(exc).__name__
    at = start_frame / f.samplerate if f.samplerate else 0.0
    return InputError(f"{f.name!r} fails to read in the block that starts at {at:.3f} s (frame "
                      f"{start_frame}: {detail}); the file is damaged or cut short; repair it "
                      "or use a complete copy")


def read_block(f, frames, dtype, out, start_frame):
    """``f.read`` of one block, with a failure blamed on the input, in one sentence."""
    import soundfile as sf

    try:
        return f.read(frames, dtype=dtype, out=out)
    except (sf.LibsndfileError, RuntimeError) as exc:
        raise read_failed(f, start_frame, exc) from None


class BlockReader:
    """Iterate over (start_frame, block) read ahead on a background thread.

    Parameters
    ----------
    f : soundfile.SoundFile
        Open for reading, positioned at the start.
    block_frames : int
    dtype : str
        'float32', 'float64' or 'int32'.
    depth : int
        Blocks read ahead.
    keep : int
        Blocks the consumer holds after the one just yielded (see Notes).

    Notes
    -----
    Each yielded block stays valid until ``keep + 1`` more iteration steps
    (the next one, with the default ``keep=0``): a consumer that hands a block
    to another thread can read the next one meanwhile.
    """

    def __init__(self, f, block_frames, dtype, depth=2, keep=0):
        self._f = f
        self._n = block_frames
        self._keep = int(keep)
        self._free = queue.Queue()
        self._full = queue.Queue()
        for _ in range(depth + 1 + self._keep):
            self._free.put(np.empty((block_frames, f.channels), dtype=dtype))
        self._dtype = dtype
        self._stop = False
        self._thread = threading.Thread(target=self._run, name="requant-reader", daemon=True)
        self._thread.start()

    def _run(self):
        try:
            start = 0
            while not self._stop:
                buf = self._free.get()
                if buf is None:
                    break
                x = read_block(self._f, self._n, self._dtype, buf, start)
                if x.shape[0] == 0:
                    break
                self._full.put((start, x, buf))
                start += x.shape[0]
        except BaseException as exc:  # handed to the consumer
            self._full.put(exc)
            return
        self._full.put(_END)

    def __iter__(self):
        held = collections.deque()
        try:
            while True:
                while len(held) > self._keep:
                    self._free.put(held.popleft())
                item = self._full.get()
                if item is _END:
                    return
                if isinstance(item, BaseException):
                    raise item
                start, x, buf = item
                held.append(buf)
                yield start, x
        finally:
            self.close()

    def close(self):
        """Stop the thread (safe to call twice)."""
        self._stop = True
        self._free.put(None)
        self._thread.join()


def read_blocks(f, block_frames, dtype):
    """Plain, same-thread counterpart of :class:`BlockReader` (for short files)."""
    buf = np.empty((block_frames, f.channels), dtype=dtype)
    start = 0
    while True:
        x = read_block(f, block_frames, dtype, buf, start)
        if x.shape[0] == 0:
            return
        yield start, x
        start += x.shape[0]


