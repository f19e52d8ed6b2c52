"""``requant batch --compact DST``: rewrite the manifest keeping only the rows that count.

A run that changed nothing writes one row (its own), so a manifest grows with what
changes; over years of deliveries it still collects rows that later rows replaced.
:func:`compact_manifest` keeps, in their order and byte for byte:

- per file, its newest row, and its newest good row (converted or up to date) when an
  older one (a later failure does not lose the output's record);
- per output name, the newest row that names it (so an output the batch once wrote is
  still known as its own, not refused as somebody else's);
- every run's own row.

That is everything a run reads (:mod:`requant.library.resume`), so the next run does
exactly what it would have done without compacting. Unreadable lines are dropped.

Crash safety: the destination is locked as for a run; the new manifest is written to a
temporary file beside the old one, flushed to disk, and renamed over it, so the old
manifest stays whole until the new one is on disk, and a killed compaction leaves the
old manifest and a temporary file the next run removes.
"""

from __future__ import annotations

import os
import sqlite3

from requant.errors import OutputError, UsageError
from requant.library.manifest import MANIFEST_NAME, RUN_STATUS, is_good, iter_manifest
from requant.library.resume import name_key
from requant.library.state import take_lock

__all__ = ["compact_manifest"]

_SCHEMA = """
CREATE TABLE src (key INTEGER PRIMARY KEY, last INTEGER, good INTEGER);
CREATE TABLE outs (key INTEGER PRIMARY KEY, last INTEGER);
CREATE TABLE runs (off INTEGER PRIMARY KEY);
"""
_SRC = """INSERT INTO src VALUES (?, ?, ?) ON CONFLICT(key) DO UPDATE SET last = excluded.last,
          good = CASE WHEN excluded.good >= 0 THEN excluded.good ELSE good END"""
_OUT = "INSERT INTO outs VALUES (?, ?) ON CONFLICT(key) DO UPDATE SET last = excluded.last"
_KEEP = """SELECT last FROM src UNION SELECT good FROM src WHERE good >= 0
           UNION SELECT last FROM outs UNION SELECT off FROM runs ORDER BY 1"""


def _mark(path, db, damage):
    """Pass 1: which rows count. Returns the number of rows read."""
    rows, srcs, outs, runs = 0, [], [], []
    db.execute("BEGIN")
    for offset, _, ev in iter_manifest(path, damage):
        if ev is None:
            continue
        rows += 1
        if ev["status"] == RUN_STATUS:
            runs.append((offset,))
            continue
        srcs.append((name_key(ev["source"]), offset, offset if is_good(ev) else -1))
        if isinstance(ev.get("output"), str):
            outs.append((name_key(ev["output"]), offset))
        if len(srcs) >= 4096:
            db.executemany(_SRC, srcs)
            db.executemany(_OUT, outs)
            srcs.clear()
            outs.clear()
    db.executemany(_SRC, srcs)
    db.executemany(_OUT, outs)
    db.executemany("INSERT INTO runs VALUES (?)", runs)
    db.execute("COMMIT")
    return rows


def compact_manifest(dst):
    """Rewrite ``DST/requant-manifest.jsonl`` keeping the rows that count (module notes).

    Parameters
    ----------
    dst : path
        A batch's destination folder.

    Returns
    -------
    dict
        ``path``, ``rows_before`` (readable rows), ``rows_after``,
        ``unreadable`` (lines dropped), ``bytes_before``, ``bytes_after``.

    Raises
    ------
    UsageError
        DST or its manifest does not exist, or another batch writes there.
    OutputError
        The new manifest cannot be written (the old one is kept).
    """
    from requant.audio_io.atomic import AtomicOutputs

    dst = os.path.abspath(os.fspath(dst))
    path = os.path.join(dst, MANIFEST_NAME)
    if not os.path.isdir(dst):
        raise UsageError(f"{dst!r} is not a folder; give the destination of a batch")
    if not os.path.isfile(path):
        raise UsageError(f"{dst!r} holds no batch manifest ({MANIFEST_NAME}); give the "
                         "destination of a batch")
    lock_fd = take_lock(dst)
    db = sqlite3.connect("", isolation_level=None)
    try:
        for pragma in ("journal_mode=OFF", "synchronous=OFF", "cache_size=-4000"):
            db.execute(f"PRAGMA {pragma}")
        db.executescript(_SCHEMA)
        damage = [0, None]
        bytes_before = os.path.getsize(path)
        before = _mark(path, db, damage)
        keep = (off for (off,) in db.execute(_KEEP))
        want = next(keep, None)
        after, size = 0, 0
        try:
            with AtomicOutputs() as outs:
                tmp = outs.path_for(path)
                with open(tmp, "wb") as fh:
                    for offset, line, _ in iter_manifest(path):
                        if offset == want:
                            fh.write(line + b"\n")
                            after += 1
                            size += len(line) + 1
                            want = next(keep, None)
        except OSError as exc:
            raise OutputError(f"cannot write the compacted manifest in {dst!r} "
                              f"({exc.strerror or exc}); the old one is kept; free some space "
                              "and try again") from None
        return {"path": path, "rows_before": before, "rows_after": after,
                "unreadable": damage[0], "bytes_before": bytes_before, "bytes_after": size}
    finally:
        db.close()
        os.close(lock_fd)
