"""What a plan hands to the run without holding it in memory: tasks, events and page rows.

A plan walks the tree a folder at a time and writes what it decides to unnamed
temporary files in DST (``O_TMPFILE``: nothing to clean up after a crash): the tasks
(:class:`TaskSpool`, one JSON line each, read back biggest first), the events the batch
process records itself (:class:`EventSpool`), and one fixed-size record per walked entry
in walk order, grouped into the index pages (:class:`EntrySpool`). Memory per task is a
few numbers (where its line starts, its size); per entry, nothing.
"""

from __future__ import annotations

import array
import hashlib
import json
import math
import os
import struct
import tempfile
from dataclasses import dataclass

__all__ = ["TaskSpool", "EventSpool", "EntrySpool", "NameSpool", "Refs", "Page", "PAGE_ROWS",
           "FIXED", "TASK", "EVENT"]

#: Rows per index page at most (a page of this many rows is about half a megabyte).
PAGE_ROWS = 1000

#: Kinds of entry record: a manifest row already written, a task's, a parent event's.
FIXED, TASK, EVENT = 0, 1, 2

_RECORD = struct.Struct("<bbxxfI4xq")  # kind, class, SNR, crc, offset or index


class _Spool:
    """An unnamed temporary file: appended through a buffer, read with ``pread``."""

    def __init__(self, folder):
        self._fh = tempfile.TemporaryFile(dir=folder)
        self.size = 0

    def append(self, data):
        """Append bytes; returns where they start."""
        at = self.size
        self._fh.write(data)
        self.size += len(data)
        return at

    def read(self, offset, length):
        """``length`` bytes from ``offset`` (flushes the buffer first)."""
        self._fh.flush()
        return os.pread(self._fh.fileno(), length, offset)

    def close(self):
        self._fh.close()


def _line(obj):
    return json.dumps(obj, separators=(",", ":")).encode("ascii") + b"\n"


class TaskSpool:
    """The tasks of a plan, on disk: added in walk order, read back biggest first.

    Parameters
    ----------
    folder : str or None
        Where the temporary file goes (DST; None: the system's temporary folder).
    src, dst : str
        Absolute roots: each task's ``source_path``/``output_path`` are made from
        them when it is read back, not stored.
    shared : dict
        The settings every task carries (:func:`~requant.library.task.task_settings`),
        one object for all, so a chunk pickles it once.

    Notes
    -----
    ``len()`` and iteration make it a sized iterable that the executors chunk
    without a list (:func:`~requant.library.executors.base.chunk_items`). Items
    carry ``n``, their number in walk order (:meth:`item`).
    """

    def __init__(self, folder, src, dst, shared):
        self._spool = _Spool(folder)
        self.src, self.dst, self.shared = src, dst, shared
        self._starts = array.array("q")
        self._sizes = array.array("q")
        self.bytes_total = 0
        self._order = None

    def add(self, task):
        """Spool one task (plain data, without paths or settings); returns its number."""
        self._starts.append(self._spool.append(_line(task)))
        self._sizes.append(int(task.get("size") or 0))
        self.bytes_total += int(task.get("size") or 0)
        return len(self._starts) - 1

    def seal(self):
        """Done adding: order the tasks biggest first (ties in walk order)."""
        self._starts.append(self._spool.size)
        if len(self._sizes):
            import numpy as np

            sizes = np.frombuffer(self._sizes, dtype=np.int64)
            self._order = np.argsort(-sizes, kind="stable")
        else:
            self._order = ()

    def __len__(self):
        return len(self._sizes)

    def __iter__(self):
        for n in self._order:
            yield self.item(int(n))

    def payload(self, n):
        """Task ``n`` as it was spooled."""
        start, end = self._starts[n], self._starts[n + 1]
        return json.loads(self._spool.read(start, end - start))

    def item(self, n):
        """Task ``n`` as an executor gets it: with ``n``, paths, settings and ``overwrite``."""
        t = self.payload(n)
        t["n"] = n
        t["source_path"] = os.path.join(self.src, *t["source"].split("/"))
        t["output_path"] = os.path.join(self.dst, *t["output"].split("/"))
        t["settings"] = self.shared
        # every task may replace its output: it is claimed for this run before any work
        # starts, and a task run again after its worker died finds what that worker renamed
        t["overwrite"] = True
        return t

    def outputs(self, keep):
        """The output names of the task numbers ``keep(n)`` accepts, in walk order."""
        for n in range(len(self)):
            if keep(n):
                yield self.payload(n)["output"]

    def close(self):
        self._spool.close()


class EventSpool:
    """Events the batch process records itself (files that are not audio, names that
    clash, ...), in walk order, each with whether it changes the manifest."""

    def __init__(self, folder):
        self._spool = _Spool(folder)
        self._starts = array.array("q")

    def add(self, event, *, write, ref=None):
        """Spool an event; ``write`` False when the manifest's latest row for its file says
        the same (``ref``: that row's (offset, crc, class, SNR)). Returns its number."""
        self._starts.append(self._spool.append(_line({"ev": event, "write": write,
                                                      "ref": ref})))
        return len(self._starts) - 1

    def __len__(self):
        return len(self._starts)

    def get(self, m):
        """``(event, write, ref)`` of event ``m``."""
        end = self._starts[m + 1] if m + 1 < len(self._starts) else self._spool.size
        doc = json.loads(self._spool.read(self._starts[m], end - self._starts[m]))
        return doc["ev"], doc["write"], doc["ref"]

    def __iter__(self):
        for m in range(len(self)):
            yield (m, *self.get(m))

    def close(self):
        self._spool.close()


@dataclass
class Page:
    """One index page: entries ``first`` .. ``first + count - 1`` in walk order, from the
    folder ``first_folder`` to ``last_folder``."""

    first: int
    count: int
    first_folder: str
    last_folder: str


def _cut_before(folder):
    """A page may start at this folder (about one folder in four, chosen by name, so the
    cuts stay where they are when files come and go elsewhere)."""
    return hashlib.blake2b(folder.encode("utf-8", "surrogateescape"),
                           digest_size=1).digest()[0] % 4 == 0


class EntrySpool:
    """One record per walked entry, in walk order, and the pages they fall into.

    A record says where the entry's row is: a manifest row already written
    (:data:`FIXED`: its offset, crc, class and SNR), or the result of a task or of a
    parent event still to come (:data:`TASK`, :data:`EVENT`: its number). Pages hold
    whole folders, up to :data:`PAGE_ROWS` rows (a bigger folder spans pages); a page
    of at least a quarter of that ends before a folder :func:`_cut_before` picks, so
    a file added in one folder changes few pages.
    """

    def __init__(self, folder):
        self._spool = _Spool(folder)
        self.count = 0
        self.pages = []
        self._page = None
        self._folder = ""

    def folder(self, name, n):
        """The next ``n`` entries belong to the folder ``name``."""
        if n == 0:
            return
        page = self._page
        if page is not None and (page.count + n > PAGE_ROWS
                                 or (page.count >= PAGE_ROWS // 4 and _cut_before(name))):
            self._page = page = None
        if page is None:
            self._open(name)
        self._folder = self._page.last_folder = name

    def _open(self, name):
        self._page = Page(first=self.count, count=0, first_folder=name, last_folder=name)
        self.pages.append(self._page)

    def _add(self, kind, cls, snr, crc, value):
        if self._page is None or self._page.count >= PAGE_ROWS:
            self._open(self._folder)
        self._spool.append(_RECORD.pack(kind, cls, math.nan if snr is None else snr, crc,
                                        value))
        self._page.count += 1
        self.count += 1

    def fixed(self, offset, crc, cls, snr):
        """An entry whose latest row is already in the manifest."""
        self._add(FIXED, cls, snr, crc, offset)

    def task(self, n):
        """An entry whose row is task ``n``'s result."""
        self._add(TASK, 0, None, 0, n)

    def event(self, m):
        """An entry whose row is parent event ``m``'s."""
        self._add(EVENT, 0, None, 0, m)

    def records(self, page):
        """The records of a page: ``(kind, class, snr or None, crc, offset or number)``."""
        data = self._spool.read(page.first * _RECORD.size, page.count * _RECORD.size)
        for kind, cls, snr, crc, value in _RECORD.iter_unpack(data):
            yield kind, cls, (None if math.isnan(snr) else snr), crc, value

    def close(self):
        self._spool.close()


class NameSpool:
    """File names on disk, in the order added (the claims a run carries forward)."""

    def __init__(self, folder):
        self._spool = _Spool(folder)
        self.count = 0

    def add(self, name):
        self._spool.append(_line(name))
        self.count += 1

    def __len__(self):
        return self.count

    def __iter__(self):
        at, rest = 0, b""
        while at < self._spool.size:
            block = self._spool.read(at, min(1 << 20, self._spool.size - at))
            at += len(block)
            lines = (rest + block).split(b"\n")
            rest = lines.pop()
            for line in lines:
                yield json.loads(line)

    def close(self):
        self._spool.close()


class Refs:
    """Where each of ``n`` tasks' (or events') rows ended up: ``(offset, crc, class, SNR)``,
    or None while it has none. Four arrays: 17 bytes a task."""

    def __init__(self, n):
        self._off = array.array("q", [-1]) * n
        self._crc = array.array("I", [0]) * n
        self._cls = array.array("b", [0]) * n
        self._snr = array.array("f", [math.nan]) * n

    def set(self, i, ref):
        off, crc, cls, snr = ref
        self._off[i], self._crc[i], self._cls[i] = off, crc, cls
        self._snr[i] = math.nan if snr is None else snr

    def get(self, i):
        if self._off[i] < 0:
            return None
        snr = self._snr[i]
        return self._off[i], self._crc[i], self._cls[i], (None if math.isnan(snr) else snr)

    def done(self, i):
        """True once item ``i`` has a row."""
        return self._off[i] >= 0
