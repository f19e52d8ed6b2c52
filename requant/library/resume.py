"""The resume index: what the manifest says about each source, kept on disk with sqlite3.

A plan asks, for every file it walks, about that file's latest row and its latest
*good* row (converted, or up to date: :func:`~requant.library.manifest.is_good`), and
whether an output name was ever written by the batch. Holding every row as Python
objects cost about 12 KB per file; :class:`ResumeIndex` streams the manifest once into
a private, temporary sqlite3 database (on disk, deleted when closed, page cache
bounded), so the plan's memory does not grow with the library. The measurements
behind the choice (against a compact in-memory index of numpy arrays) are in
DEVELOPERS.md and ``benchmarks/bench_resume_index.py``.

Per source the index keeps numbers only: where its latest row and latest good row
start in the manifest (so the rare slow path re-reads that one line), whether the
good row fits the settings of this run (:data:`FITS`), the size and time of the
source and of the output it recorded, and a little for the summary and the index
pages. Sources and outputs are keyed by a 64-bit BLAKE2b of their names; a collision
(about 3e-8 at a million files) can only send a file down the slow path, where the
re-read row is checked by name.
"""

from __future__ import annotations

import hashlib
import os
import sqlite3
from collections import namedtuple

from requant.library.manifest import (
    RUN_STATUS,
    ManifestDamage,
    is_good,
    iter_manifest,
    read_row,
    row_crc,
)
from requant.library.tree import output_name

__all__ = ["ResumeIndex", "Record", "name_key", "index_entry", "FITS", "REASONS", "CLASSES",
           "row_class"]

#: How a good row fits this run: it does (0), or the reason the file is converted again.
FITS = 0
REASONS = {1: "settings changed", 2: "output name changed",
           3: "the source's identity was not recorded"}

#: Classes of a row on the index pages (and their order there).
CLASSES = {"failed": 0, "warn": 1, "ok": 2, "other": 3, "pending": 4}

_BLOCK = 500  # keys per query (sqlite's variable limit is far higher)


def name_key(name):
    """The 64-bit key of a file name (signed, as sqlite stores integers)."""
    raw = name.encode("utf-8", "surrogateescape")
    return int.from_bytes(hashlib.blake2b(raw, digest_size=8).digest(), "little", signed=True)


def row_class(ev):
    """The class of a row on the index pages: failed, warn, ok or other (not audio)."""
    if ev["status"] == "failed":
        return CLASSES["failed"]
    if ev.get("warnings"):
        return CLASSES["warn"]
    if ev.get("output") is None:
        return CLASSES["other"]
    return CLASSES["ok"]


#: One source's entry: ``good`` (offset of the latest good row, -1 if none), ``fits``
#: (:data:`FITS` or a key of :data:`REASONS`), ``src`` and ``out``: (size, mtime_ns) of the
#: source and the output as recorded (None where not), ``duration_s``, and of the latest
#: row: ``last`` (its offset), ``crc``, ``cls`` (:data:`CLASSES`) and ``snr_db``.
Record = namedtuple("Record", ("good", "fits", "src", "out", "duration_s", "last", "crc", "cls",
                               "snr_db"))


def _record(row):
    good, fits, ss, sm, osz, om, dur, last, crc, kls, snr = row
    return Record(good, fits, None if ss is None else (ss, sm),
                  None if osz is None else (osz, om), dur, last, crc, kls, snr)


_SCHEMA = """
CREATE TABLE src (key INTEGER PRIMARY KEY, good INTEGER, fits INTEGER, ssize INTEGER,
                  smtime INTEGER, osize INTEGER, omtime INTEGER, dur REAL, last INTEGER,
                  crc INTEGER, cls INTEGER, snr REAL);
CREATE TABLE outs (key INTEGER PRIMARY KEY);
CREATE TABLE claims (key INTEGER PRIMARY KEY, name TEXT);
"""

# one statement for every row, in file order: a good row replaces everything, any other
# row only what describes the latest row
_UPSERT = """
INSERT INTO src VALUES (?,?,?,?,?,?,?,?,?,?,?,?) ON CONFLICT(key) DO UPDATE SET
  good = CASE WHEN excluded.good >= 0 THEN excluded.good ELSE good END,
  fits = CASE WHEN excluded.good >= 0 THEN excluded.fits ELSE fits END,
  ssize = CASE WHEN excluded.good >= 0 THEN excluded.ssize ELSE ssize END,
  smtime = CASE WHEN excluded.good >= 0 THEN excluded.smtime ELSE smtime END,
  osize = CASE WHEN excluded.good >= 0 THEN excluded.osize ELSE osize END,
  omtime = CASE WHEN excluded.good >= 0 THEN excluded.omtime ELSE omtime END,
  dur = CASE WHEN excluded.good >= 0 THEN excluded.dur ELSE dur END,
  last = excluded.last, crc = excluded.crc, cls = excluded.cls, snr = excluded.snr
"""


def _fits(ev, sid, fmt):
    """How a good row fits this run (:data:`FITS` or a key of :data:`REASONS`)."""
    row_sid = ev.get("settings_id")
    # ids were 64 hex digits before they were cut to 32: the first 32 are the same
    if not isinstance(row_sid, str) or row_sid[:len(sid)] != sid:
        return 1
    if ev["output"] != output_name(ev["source"], fmt)[0]:
        return 2
    ident = ev.get("source_identity")
    if not (isinstance(ident, dict) and isinstance(ident.get("sha256"), str)
            and isinstance(ident.get("mtime_ns"), int)):
        return 3
    return FITS


def _num(v):
    return v if isinstance(v, (int, float)) and not isinstance(v, bool) else None


def index_entry(offset, line, ev, *, sid, fmt):
    """What the index keeps of one manifest row: ``(key, good, fits, source size, source
    mtime_ns, output size, output mtime_ns, duration_s, last, crc, class, SNR)``; the
    good-row fields are -1/None for a row that is not good (:func:`is_good`)."""
    snr = _num(ev.get("snr_db"))
    head = (name_key(ev["source"]),)
    tail = (offset, row_crc(line), row_class(ev), snr)
    if not is_good(ev):
        return head + (-1, None, None, None, None, None, None) + tail
    ident = ev.get("source_identity") if isinstance(ev.get("source_identity"), dict) else {}
    stat = ev.get("output_stat") or (None, None)
    return head + (offset, _fits(ev, sid, fmt), _num(ident.get("size")),
                   _num(ident.get("mtime_ns")), stat[0], stat[1],
                   _num(ev.get("duration_s"))) + tail


class ResumeIndex:
    """The manifest's latest rows per source, for one run's plan (sqlite3, on disk).

    Parameters
    ----------
    manifest_path : str
        ``DST/requant-manifest.jsonl`` (it need not exist).
    sid : str
        This run's settings id (a row fits only with the same id).
    fmt : str
        This run's output format (a row fits only with the output name it gives).

    Notes
    -----
    :meth:`build` reads the manifest once, a line at a time; queries then take a
    block of names at a time. The database is sqlite's private temporary one
    (``sqlite3.connect("")``): it lives in the temporary folder (``TMPDIR``),
    spills to disk beyond a 4 MB page cache and is deleted by :meth:`close`.
    The manifest stays open for :meth:`row`.
    """

    def __init__(self, manifest_path, *, sid, fmt):
        self.path = manifest_path
        self.sid, self.fmt = sid, fmt
        self.rows = 0
        self.damage = ManifestDamage.counted(0, None)
        self._db = sqlite3.connect("", isolation_level=None, check_same_thread=False)
        for pragma in ("journal_mode=OFF", "synchronous=OFF", "cache_size=-4000"):
            self._db.execute(f"PRAGMA {pragma}")
        self._db.executescript(_SCHEMA)
        self._fd = None
        self.claims = 0

    # ----------------------------------------------------------------- building

    def build(self):
        """Read the manifest into the index; returns the :class:`ManifestDamage`."""
        damage = [0, None]
        db = self._db
        db.execute("BEGIN")
        srcs, outs = [], []
        for offset, line, ev in iter_manifest(self.path, damage):
            if ev is None or ev["status"] == RUN_STATUS:
                continue
            srcs.append(self._entry(offset, line, ev))
            if isinstance(ev["output"], str):
                outs.append((name_key(ev["output"]),))
            if len(srcs) >= 4096:
                self._flush(srcs, outs)
        self._flush(srcs, outs)
        db.execute("COMMIT")
        self.damage = ManifestDamage.counted(*damage)
        try:
            self._fd = os.open(self.path, os.O_RDONLY)
        except OSError:
            self._fd = None
        return self.damage

    def _entry(self, offset, line, ev):
        self.rows += 1
        return index_entry(offset, line, ev, sid=self.sid, fmt=self.fmt)

    def _flush(self, srcs, outs):
        if srcs:
            self._db.executemany(_UPSERT, srcs)
            srcs.clear()
        if outs:
            self._db.executemany("INSERT OR IGNORE INTO outs VALUES (?)", outs)
            outs.clear()

    def add_claims(self, names):
        """Take earlier runs' claims: count them as the batch's own outputs, and keep those no
        row records (still claimed, unless a task of this run claims them again: see
        :meth:`reclaim`). Returns how many were recorded already (they lapse)."""
        names = list(names)
        recorded = self.written(names)
        self._db.executemany("INSERT OR IGNORE INTO outs VALUES (?)",
                             ((name_key(n),) for n in names))
        self._db.executemany("INSERT OR IGNORE INTO claims VALUES (?, ?)",
                             ((name_key(n), n) for n in names if n not in recorded))
        self.claims += len(names) - len(recorded)
        return len(recorded)

    def reclaim(self, outputs):
        """This run's tasks claim these outputs afresh: earlier claims of them lapse."""
        if self.claims and outputs:
            for i in range(0, len(outputs), _BLOCK):
                keys = [name_key(o) for o in outputs[i:i + _BLOCK]]
                self._db.execute(f"DELETE FROM claims WHERE key IN ({','.join('?' * len(keys))})",
                                 keys)

    def claimed(self):
        """The earlier claims still standing (names), in the order they were taken."""
        if self.claims:
            for (name,) in self._db.execute("SELECT name FROM claims ORDER BY rowid"):
                yield name

    # ----------------------------------------------------------------- queries

    def lookup(self, sources):
        """``{source: Record}`` for the sources the manifest has rows of."""
        found = {}
        for i in range(0, len(sources), _BLOCK):
            block = sources[i:i + _BLOCK]
            keys = {name_key(s): s for s in block}
            q = ",".join("?" * len(keys))
            for row in self._db.execute(
                    "SELECT key, good, fits, ssize, smtime, osize, omtime, dur, last, crc, cls, "
                    f"snr FROM src WHERE key IN ({q})", list(keys)):
                found[keys[row[0]]] = _record(row[1:])
        return found

    def written(self, outputs):
        """The subset of ``outputs`` (names) that a row or an earlier claim mentions."""
        found = set()
        for i in range(0, len(outputs), _BLOCK):
            keys = {name_key(o): o for o in outputs[i:i + _BLOCK]}
            q = ",".join("?" * len(keys))
            for (k,) in self._db.execute(f"SELECT key FROM outs WHERE key IN ({q})",
                                         list(keys)):
                found.add(keys[k])
        return found

    def row(self, offset, source=None):
        """The event of the manifest line at ``offset`` (checked against ``source``), or
        None."""
        if self._fd is None or offset is None or offset < 0:
            return None
        ev = read_row(self._fd, offset)
        if ev is None or (source is not None and ev.get("source") != source):
            return None
        return ev

    def close(self):
        """Delete the database and close the manifest (safe to call twice)."""
        if self._db is not None:
            self._db.close()
            self._db = None
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False
