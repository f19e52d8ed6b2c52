"""Overlapped block I/O: a reader thread and a writer thread around the kernel.

libsndfile calls through python-soundfile (cffi) and the numba kernel both
release the GIL, so reading the next block, requantizing this one and
encoding the previous one run at the same time. Buffers circulate through a
free queue, so memory is a fixed handful of blocks whatever the file length,
and no buffer is refilled before its consumer hands it back.
"""

import queue
import threading

import numpy as np

__all__ = ["BlockReader", "BlockWriter", "SyncWriter", "read_blocks"]

_END = object()


class BlockReader:
    """Iterate over (start_frame, block) read ahead on a background thread.

    Parameters
    ----------
    f : soundfile.SoundFile
        Open for reading, positioned at the start.
    block_frames : int
    dtype : str
        'float32' or 'float64'.
    depth : int
        Blocks read ahead.

    Notes
    -----
    Each yielded block stays valid until the next iteration step.
    """

    def __init__(self, f, block_frames, dtype, depth=2):
        self._f = f
        self._n = block_frames
        self._free = queue.Queue()
        self._full = queue.Queue()
        for _ in range(depth + 1):
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
                x = self._f.read(self._n, dtype=self._dtype, out=buf)
                if x.shape[0] == 0:
                    break
                self._full.put((start, x, buf))
                start += x.shape[0]
        except BaseException as exc:  # handed to the consumer
            self._full.put(exc)
            return
        self._full.put(_END)

    def __iter__(self):
        prev = None
        try:
            while True:
                if prev is not None:
                    self._free.put(prev)
                    prev = None
                item = self._full.get()
                if item is _END:
                    return
                if isinstance(item, BaseException):
                    raise item
                start, x, prev = item
                yield start, x
        finally:
            self.close()

    def close(self):
        """Stop the thread (safe to call twice)."""
        self._stop = True
        self._free.put(None)
        self._thread.join()


class BlockWriter:
    """Write tuples of arrays to several open files on a background thread.

    Parameters
    ----------
    files : sequence of soundfile.SoundFile
    shapes_dtypes : sequence of (shape, dtype)
        One buffer layout per file.
    depth : int
        Blocks that may wait to be written.
    consumer : callable(buffers, frames), optional
        Called on a third thread, in order, after each block is written (the
        report's analysis runs there, beside the encoding and the kernel).

    Examples
    --------
    >>> w = BlockWriter([out, err], [((n, 2), np.int16), ((n, 2), np.float32)])  # doctest: +SKIP
    >>> bufs = w.buffers()          # fill them, then
    >>> w.submit(bufs, frames)      # they belong to the writer until buffers() hands them back
    >>> w.close()                   # waits, and raises any write error here
    """

    def __init__(self, files, shapes_dtypes, depth=2, consumer=None):
        self._files = list(files)
        self._consumer = consumer
        self._free = queue.Queue()
        self._todo = queue.Queue(maxsize=depth)
        for _ in range(depth + 1):
            self._free.put(tuple(np.empty(s, dtype=d) for s, d in shapes_dtypes))
        if consumer is not None:
            self._free.put(tuple(np.empty(s, dtype=d) for s, d in shapes_dtypes))
        self._error = None
        self._thread = threading.Thread(target=self._run, name="requant-writer", daemon=True)
        self._thread.start()
        self._athread = None
        if consumer is not None:
            self._aq = queue.Queue(maxsize=depth)
            self._athread = threading.Thread(target=self._analyse, name="requant-analysis",
                                             daemon=True)
            self._athread.start()

    def _run(self):
        while True:
            item = self._todo.get()
            if item is _END:
                if self._athread is not None:
                    self._aq.put(_END)
                return
            bufs, n = item
            if self._error is None:
                try:
                    for f, b in zip(self._files, bufs):
                        f.write(b[:n])
                except BaseException as exc:
                    self._error = exc
            if self._athread is not None:
                self._aq.put(item)
            else:
                self._free.put(bufs)

    def _analyse(self):
        while True:
            item = self._aq.get()
            if item is _END:
                return
            bufs, n = item
            if self._error is None:
                try:
                    self._consumer(bufs, n)
                except BaseException as exc:
                    self._error = exc
            self._free.put(bufs)

    def buffers(self):
        """A free tuple of buffers (waits while all are queued for writing)."""
        self._raise()
        return self._free.get()

    def submit(self, bufs, frames):
        """Queue the first ``frames`` rows of each buffer for writing."""
        self._raise()
        self._todo.put((bufs, frames))

    def _raise(self):
        if self._error is not None:
            raise self._error

    def close(self):
        """Wait for every queued write; raise the first write error, if any."""
        if self._thread.is_alive():
            self._todo.put(_END)
            self._thread.join()
        if self._athread is not None:
            self._athread.join()
        self._raise()


def read_blocks(f, block_frames, dtype):
    """Plain, same-thread counterpart of :class:`BlockReader` (for short files)."""
    buf = np.empty((block_frames, f.channels), dtype=dtype)
    start = 0
    while True:
        x = f.read(block_frames, dtype=dtype, out=buf)
        if x.shape[0] == 0:
            return
        yield start, x
        start += x.shape[0]


class SyncWriter:
    """Same-thread counterpart of :class:`BlockWriter` (for short files).

    Starting threads costs more than a file of one block takes to write.
    """

    def __init__(self, files, shapes_dtypes, consumer=None):
        self._files = list(files)
        self._consumer = consumer
        self._bufs = tuple(np.empty(s, dtype=d) for s, d in shapes_dtypes)

    def buffers(self):
        return self._bufs

    def submit(self, bufs, frames):
        for f, b in zip(self._files, bufs):
            f.write(b[:frames])
        if self._consumer is not None:
            self._consumer(bufs, frames)

    def close(self):
        pass
