"""Writing audio and JSON: outputs, overlapped block writing, and clear write errors.

:class:`BlockWriter` encodes on a thread of its own (libsndfile and our WAV
writer release the GIL), so encoding the previous block overlaps requantizing
this one; :class:`SyncWriter` does the same work inline for files of one block.
"""

import errno
import json
import math
import os
import queue
import re
import threading

import numpy as np

from requant.audio_io.atomic import AtomicOutputs
from requant.audio_io.probe import sndfile_target
from requant.audio_io.wavwrite import RAW_SUBTYPES, WavWriter
from requant.errors import OutputError

__all__ = ["open_output", "wrap_write_error", "write_json_atomic", "json_safe", "BlockWriter",
           "SyncWriter"]

_END = object()


def _write_limits_hit(folder):
    """Name what most likely refused a write ('read-only', 'size limit', 'disk full', None).

    libsndfile reports refused writes as a bare "System error."; look at the
    destination's mount and permissions, the process's file-size limit and the
    destination's free space.
    """
    try:
        st = os.statvfs(folder)
        if st.f_flag & os.ST_RDONLY or not os.access(folder, os.W_OK):
            return "read-only"
    except OSError:
        pass
    try:
        import resource

        soft, _ = resource.getrlimit(resource.RLIMIT_FSIZE)
        if soft != resource.RLIM_INFINITY:
            return "size limit"
    except (ImportError, OSError, ValueError):
        pass
    try:
        st = os.statvfs(folder)
        if st.f_bavail * st.f_frsize < (4 << 20):
            return "disk full"
    except OSError:
        pass
    return None


def wrap_write_error(exc, path):
    """An OS or libsndfile write error as one sentence about ``path`` (the final name: a
    temporary name in the library's message is replaced by it)."""
    path = os.fspath(path)
    code = getattr(exc, "errno", None)
    text = re.sub(r"[^\s'\"]*\.requant-part", os.path.basename(os.fspath(path)), str(exc))
    folder = os.path.dirname(os.path.abspath(path))
    limit = _write_limits_hit(folder) if code is None else None
    if (code in (errno.EACCES, errno.EPERM, errno.EROFS) or "ermission" in text
            or "Read-only" in text or limit == "read-only"):
        return OutputError(f"cannot write in the folder of {path!r} (read-only or no permission); "
                           "choose a writable destination")
    if code == errno.ENOSPC or "No space" in text or limit == "disk full":
        return OutputError(f"the disk is full while writing {path!r}; free some space and run "
                           "again")
    if code == errno.EFBIG or "too large" in text or limit == "size limit":
        return OutputError(f"the file size limit was reached while writing {path!r}; "
                           "free space or raise the limit (ulimit -f)")
    return OutputError(f"writing {path!r} failed ({text.strip() or type(exc).__name__}); "
                       "check the destination")


def open_output(path, rate, nch, subtype, fmt, *, plain, comment=None):
    """An audio output: our own WAV writer where it can (``plain``: no tags
    to write), else libsndfile. ``comment`` (one line of text) is stored as the
    file's comment where the container has one."""
    if plain and fmt == "WAV" and subtype in RAW_SUBTYPES:
        return WavWriter(path, samplerate=rate, channels=nch, subtype=subtype,
                         background_sync=True, comment=comment)
    import soundfile as sf

    target, closefd = sndfile_target(path, "w")
    f = sf.SoundFile(target, "w", samplerate=rate, channels=nch, subtype=subtype, format=fmt,
                     closefd=closefd)
    if comment is not None:
        try:
            f.comment = comment
        except (sf.LibsndfileError, RuntimeError, AttributeError, TypeError):
            pass  # a container without text fields: the report still states it
    return f


#: The sentence added to a document's warnings when some of its figures had no finite value.
NON_FINITE_WARNING = ("{n} figure(s) had no finite value (the input is far beyond full scale or "
                      "damaged) and are written as null")


def json_safe(obj):
    """``obj`` with every non-finite float replaced by None, and how many were replaced.

    JSON has no NaN or infinity; strict readers (and ours, ``allow_nan=False``)
    refuse them. Numbers of numpy types become plain Python numbers. Text that
    holds bytes of a file name that are not UTF-8 (lone surrogates, which strict
    readers refuse too) shows them as ``\\xNN``.
    """
    count = 0

    def clean(v):
        nonlocal count
        if isinstance(v, str):
            try:
                v.encode("utf-8")
                return v
            except UnicodeEncodeError:
                return v.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")
        if isinstance(v, bool) or v is None:
            return v
        if isinstance(v, dict):
            return {k: clean(x) for k, x in v.items()}
        if isinstance(v, (list, tuple)):
            return [clean(x) for x in v]
        if isinstance(v, (float, np.floating)):
            if math.isfinite(v):
                return float(v)
            count += 1
            return None
        if isinstance(v, np.integer):
            return int(v)
        return v

    return clean(obj), count


def write_json_atomic(obj, path, *, warnings_key=None):
    """Write ``obj`` as indented JSON through a temporary file and rename.

    Non-finite numbers become null; with ``warnings_key`` (the name of a list of
    sentences in ``obj``) a sentence saying how many is added to that list.
    """
    doc, replaced = json_safe(obj)
    if replaced and warnings_key is not None and isinstance(doc.get(warnings_key), list):
        doc[warnings_key].append(NON_FINITE_WARNING.format(n=replaced))
    try:
        with AtomicOutputs() as outs:
            tmp = outs.path_for(path)
            with open(tmp, "w", encoding="utf-8") as fh:
                json.dump(doc, fh, indent=2, allow_nan=False)
                fh.write("\n")
    except OSError as exc:
        raise wrap_write_error(exc, path) from None


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
        self.failed_file = None
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
                    for i, (f, b) in enumerate(zip(self._files, bufs)):
                        self.failed_file = i  # which file a write error belongs to
                        f.write(b[:n])
                    self.failed_file = None
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


class SyncWriter:
    """Same-thread counterpart of :class:`BlockWriter` (for short files).

    Starting threads costs more than a file of one block takes to write.
    """

    def __init__(self, files, shapes_dtypes, consumer=None):
        self._files = list(files)
        self._consumer = consumer
        self._bufs = tuple(np.empty(s, dtype=d) for s, d in shapes_dtypes)
        self.failed_file = None

    def buffers(self):
        return self._bufs

    def submit(self, bufs, frames):
        for i, (f, b) in enumerate(zip(self._files, bufs)):
            self.failed_file = i  # which file a write error belongs to
            f.write(b[:frames])
        self.failed_file = None
        if self._consumer is not None:
            self._consumer(bufs, frames)

    def close(self):
        pass


