"""The manifest: one compact JSON line per change, appended, read back defensively.

``DST/requant-manifest.jsonl`` is appended by the batch process only, each line with
one ``os.write`` on an ``O_APPEND`` descriptor (:class:`ManifestWriter`). The reader
(:func:`iter_manifest`, :func:`read_manifest`) skips lines that do not parse, so a torn
last line from a crash is harmless.

A line records a *change*: a file converted, failed, found up to date with a new
identity (a touched source, a copied output), or a non-audio entry seen for the first
time. A file found up to date with nothing changed writes nothing; the run's own row
(``"status": "run"``, written at its end) counts it. Rows are compact: fields that hold
their default (``error`` null, empty ``warnings``, ``warning_kinds`` and ``notes``, an
``output`` equal to ``source``) are left out and filled back in by the reader, and the
full per-file figures and metadata go to the run's details file
(``DST/requant-runs/RUN_ID.jsonl``, :class:`DetailsWriter`, :func:`read_details`),
which nothing reads to resume.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import time
import zlib

from requant.audio_io.writers import NON_FINITE_WARNING, json_safe
from requant.errors import OutputError

__all__ = ["MANIFEST_NAME", "RUNS_DIR", "RUN_STATUS", "ManifestWriter", "ManifestDamage",
           "DetailsWriter", "iter_manifest", "read_manifest", "read_row", "read_details",
           "sha256_file", "latest_by_source", "escape_name", "unescape_name", "row_crc",
           "is_good"]


MANIFEST_NAME = "requant-manifest.jsonl"

#: The folder in DST that holds each run's details file (``RUN_ID.jsonl``).
RUNS_DIR = "requant-runs"

#: The ``status`` of a run's own row (its counts), written when the run ends.
RUN_STATUS = "run"


_HASH_BLOCK = 1 << 20


def sha256_file(path):
    """Hex SHA-256 of a file's bytes (read whole when small, else in 1 MiB blocks)."""
    with open(path, "rb", buffering=0) as fh:
        head = fh.read(_HASH_BLOCK)
        h = hashlib.sha256(head)
        if len(head) < _HASH_BLOCK:
            return h.hexdigest()
        buf = bytearray(_HASH_BLOCK)
        view = memoryview(buf)
        while True:
            n = fh.readinto(buf)
            if not n:
                break
            h.update(view[:n])
    return h.hexdigest()


def row_crc(line):
    """CRC-32 of a manifest line's bytes (without its newline): with the line's offset, a
    cheap fingerprint of the row the index pages show."""
    return zlib.crc32(line)


#: Fields a manifest event may carry, and the types they must have to be used.
_EVENT_TYPES = {
    "source": str, "status": str, "output": (str, type(None)), "settings_id": str,
    "output_sha256": (str, type(None)), "source_identity": (dict, type(None)),
    "output_stat": (list, type(None)),
    "reason": (str, type(None)), "error": (str, type(None)), "seed": (int, type(None)),
    "warnings": list, "warning_kinds": list, "notes": list, "figures": dict, "metadata": dict,
}
_STATUSES = ("converted", "skipped", "failed")

#: What a compact row leaves out because it holds this default (see :func:`_compact`).
_DEFAULTS = {"error": None, "warnings": [], "warning_kinds": [], "notes": []}


#: Event fields that hold file names (relative paths).
_NAME_FIELDS = ("source", "output")


def escape_name(name):
    """A file name as strict UTF-8 text that :func:`unescape_name` turns back into it.

    Linux names may hold bytes that are not UTF-8; Python carries them as lone
    surrogates, which strict JSON readers refuse. Each such byte is written
    ``\\xNN`` and a backslash ``\\\\``; every other character is kept.
    """
    if not isinstance(name, str) or ("\\" not in name and (name.isascii()
                                                            or not _has_surrogate(name))):
        return name
    out = []
    for ch in name:
        if ch == "\\":
            out.append("\\\\")
        elif 0xDC80 <= ord(ch) <= 0xDCFF:
            out.append(f"\\x{ord(ch) - 0xDC00:02x}")
        else:
            out.append(ch)
    return "".join(out)


def unescape_name(text):
    """The file name :func:`escape_name` wrote as ``text``."""
    if not isinstance(text, str) or "\\" not in text:
        return text
    out, i = [], 0
    while i < len(text):
        ch = text[i]
        if ch == "\\" and text[i + 1:i + 2] == "\\":
            out.append("\\")
            i += 2
        elif ch == "\\" and text[i + 1:i + 2] == "x" and len(text) >= i + 4:
            try:
                out.append(chr(0xDC00 + int(text[i + 2:i + 4], 16)))
                i += 4
                continue
            except ValueError:
                out.append(ch)
                i += 1
        else:
            out.append(ch)
            i += 1
    return "".join(out)


def _has_surrogate(name):
    try:
        name.encode("utf-8")
    except UnicodeEncodeError:  # lone surrogates (and only they) cannot be encoded
        return any(0xDC80 <= ord(c) <= 0xDCFF for c in name)
    return False


def _usable(ev):
    """True when a parsed line is an event (or a run's row) whose known fields have their
    types."""
    if not isinstance(ev, dict):
        return False
    if ev.get("status") == RUN_STATUS:
        return isinstance(ev.get("run_id"), str) and isinstance(ev.get("counts"), dict)
    if ev.get("status") not in _STATUSES or "source" not in ev:
        return False
    types = _EVENT_TYPES
    for key, value in ev.items():
        kind = types.get(key)
        if kind is not None and not isinstance(value, kind):
            return False
    ident = ev.get("source_identity")
    if ident is not None and not (isinstance(ident.get("size"), int)
                                  and isinstance(ident.get("sha256"), str)):
        return False
    stat = ev.get("output_stat")
    if stat is not None and not (len(stat) == 2 and all(type(v) is int for v in stat)):
        return False
    return True


def _normalized(ev):
    """A file event with the fields a compact row left out filled back in, names unescaped."""
    for key in _NAME_FIELDS:
        if key in ev:
            ev[key] = unescape_name(ev[key])
    if "output" not in ev:
        ev["output"] = ev["source"]
    for key, value in _DEFAULTS.items():
        if key not in ev:
            ev[key] = list(value) if isinstance(value, list) else value
    return ev


def is_good(ev):
    """True for a row that vouches for an output: ``converted``, or ``skipped`` as up to
    date (it repeats the output's name, hash and settings id)."""
    return ev["status"] == "converted" or (ev["status"] == "skipped"
                                           and isinstance(ev.get("output"), str)
                                           and isinstance(ev.get("output_sha256"), str))


class ManifestDamage(int):
    """How many manifest lines :func:`read_manifest` left out (an int), and the first one."""

    first_line: int | None = None

    @classmethod
    def of(cls, lines):
        """The damage of these left-out line numbers."""
        damage = cls(len(lines))
        damage.first_line = lines[0] if lines else None
        return damage

    @classmethod
    def counted(cls, count, first_line):
        """The damage of ``count`` left-out lines, the first of them ``first_line``."""
        damage = cls(count)
        damage.first_line = first_line if count else None
        return damage

    def sentence(self, path):
        """A note for the run: what was ignored and the way out."""
        return (f"the manifest {path!r} has {int(self)} unreadable line(s) (first: line "
                f"{self.first_line}; a run was cut off, or the file was edited); they were "
                "ignored, so the files they describe are checked or converted again; to start "
                "afresh, move the manifest aside and run again")


def _open_manifest(path):
    try:
        return open(path, "rb")
    except FileNotFoundError:
        return None
    except IsADirectoryError:
        raise OutputError(f"{os.fspath(path)!r} is a folder where the batch keeps its manifest; "
                          "move it aside and run again") from None
    except OSError as exc:
        raise OutputError(f"the manifest {os.fspath(path)!r} cannot be read "
                          f"({exc.strerror or exc}); fix its permissions, or move it aside and "
                          "run again") from None


def iter_manifest(path, damage=None):
    """Stream a manifest: ``(offset, line, event)`` for every line in file order.

    ``line`` is the line's bytes without its newline and ``offset`` where it
    starts in the file (bytes). ``event`` is the parsed event with its
    left-out fields filled in (a run's row as it is), or None for a line that
    cannot be used (not JSON, nested absurdly deep, a wrong type): such lines
    are counted in ``damage`` (a list: the count, then the first line number)
    and their files treated as not recorded. Blank lines are skipped. Memory
    stays flat: one line at a time.

    Raises
    ------
    OutputError
        If the manifest is a folder or cannot be read: one sentence with the
        way out.
    """
    fh = _open_manifest(path)
    if fh is None:
        return
    offset = 0
    with fh:
        for number, raw in enumerate(fh, 1):
            start, offset = offset, offset + len(raw)
            line = raw.rstrip(b"\n")
            if not line.strip():
                continue
            try:
                ev = json.loads(line)
            except (ValueError, RecursionError):
                ev = None
            if ev is None or not _usable(ev):
                if damage is not None:
                    if not damage[0]:
                        damage[1] = number
                    damage[0] += 1
                yield start, line, None
                continue
            yield start, line, (ev if ev["status"] == RUN_STATUS else _normalized(ev))


def read_manifest(path):
    """Read the file events of a manifest, leaving out lines that cannot be used.

    A line is used when it parses as a JSON object (not nested absurdly deep),
    its ``status`` is ``converted``, ``skipped`` or ``failed``, it has a
    ``source``, and every known field has its type (:data:`_EVENT_TYPES`).
    Anything else, a torn last line after a crash or a line edited by hand,
    is counted and left out; the run then treats its file as not recorded.
    The runs' own rows (``status`` ``run``) are read past. This holds every
    event in memory: the batch itself streams (:func:`iter_manifest`).

    Parameters
    ----------
    path : str

    Returns
    -------
    events : list of dict
        In file order, with the fields a compact row leaves out filled in.
    damage : ManifestDamage
        How many lines were left out (an int) and the first one (``first_line``).

    Raises
    ------
    OutputError
        If the manifest is a folder or cannot be read.
    """
    damage = [0, None]
    events = [ev for _, _, ev in iter_manifest(path, damage)
              if ev is not None and ev["status"] != RUN_STATUS]
    return events, ManifestDamage.counted(*damage)


def read_row(fd, offset):
    """The event of the manifest line at ``offset`` of the open descriptor ``fd``, or None.

    Reads only that line (``os.pread``), so the batch can keep offsets instead
    of rows. None when the bytes there are not a usable line.
    """
    chunks, at = [], offset
    while True:
        data = os.pread(fd, 4096, at)
        if not data:
            break
        cut = data.find(b"\n")
        if cut >= 0:
            chunks.append(data[:cut])
            break
        chunks.append(data)
        at += len(data)
    try:
        ev = json.loads(b"".join(chunks))
    except (ValueError, RecursionError):
        return None
    if not _usable(ev):
        return None
    return ev if ev["status"] == RUN_STATUS else _normalized(ev)


def _compact(event):
    """The row as written: names escaped, fields that hold their default left out."""
    row = {}
    for k, v in event.items():
        if k in _DEFAULTS and v == _DEFAULTS[k]:
            continue
        if k == "output" and isinstance(v, str) and v == event.get("source"):
            continue
        row[k] = escape_name(v) if k in _NAME_FIELDS else v
    return row


class _Appender:
    """Lines appended to a file in whole lines: a few lines per ``os.write``, fsync in
    bounded batches.

    Lines wait in a buffer until ``write_every`` of them (or 256 KiB) are there, the
    oldest is ``write_interval_s`` old, or :meth:`flush` is called; then one
    ``os.write`` appends them all (continued only if the kernel wrote part). A crash
    loses the lines still waiting and leaves at most one torn line; the reader skips
    it. ``fsync_every`` (lines written; None: only at :meth:`close`) and
    ``fsync_interval_s`` bound what a power cut can lose.
    """

    def __init__(self, path, *, fsync_every, fsync_interval_s, write_every=1,
                 write_interval_s=0.5):
        self.path = path
        self._fd = None
        try:
            self._fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        except OSError as exc:
            raise self._error(exc) from None
        self._every = fsync_every
        self._interval = fsync_interval_s
        self._write_every = write_every
        self._write_interval = write_interval_s
        self._waiting, self._waiting_bytes, self._waiting_since = [], 0, None
        self._unsynced = 0
        self._oldest = None
        self.size = os.fstat(self._fd).st_size
        self._written = self.size
        if self.size:
            with open(path, "rb") as fh:
                fh.seek(self.size - 1)
                if fh.read(1) != b"\n":
                    self._write(b"\n")
                    self.size = self._written

    def _error(self, exc):
        return OutputError(f"cannot write the manifest {self.path!r} ({exc.strerror or exc}); "
                           "free some space or fix the permissions, then run again to resume")

    def _write(self, data):
        view = memoryview(data)
        try:
            while view:
                n = os.write(self._fd, view)
                view = view[n:]
        except OSError as exc:
            raise self._error(exc) from None
        self._written += len(data)

    def _line(self, line):
        """Append one line (bytes, no newline); returns its offset in the file."""
        offset = self.size
        self._waiting.append(line + b"\n")
        self._waiting_bytes += len(line) + 1
        self.size += len(line) + 1
        now = time.monotonic()
        if self._waiting_since is None:
            self._waiting_since = now
        if (len(self._waiting) >= self._write_every or self._waiting_bytes >= 1 << 18
                or now - self._waiting_since >= self._write_interval):
            self.flush()
        return offset

    def flush(self):
        """Write the waiting lines (one ``os.write``); fsync when the bounds say so."""
        if self._waiting:
            count = len(self._waiting)
            data = b"".join(self._waiting)
            self._waiting, self._waiting_bytes, self._waiting_since = [], 0, None
            self._write(data)
            self._unsynced += count
            now = time.monotonic()
            if self._oldest is None:
                self._oldest = now
            if (self._every is not None and self._unsynced >= self._every) or \
                    now - self._oldest >= self._interval:
                self.sync()

    def sync(self):
        """Write what waits and fsync the lines written so far."""
        if self._waiting:
            self.flush()
        if self._unsynced:
            try:
                os.fsync(self._fd)
            except OSError as exc:
                raise self._error(exc) from None
            self._unsynced = 0
            self._oldest = None

    def close(self):
        """Write, fsync and close (safe to call twice)."""
        if self._fd is not None:
            try:
                self.sync()
            finally:
                os.close(self._fd)
                self._fd = None


def _dumps(obj):
    return json.dumps(obj, ensure_ascii=False, allow_nan=False,
                      separators=(",", ":")).encode("utf-8")


class ManifestWriter(_Appender):
    """Append events to the manifest: whole lines, a few per ``os.write``, fsync in bounded
    batches.

    Parameters
    ----------
    path : str
    fsync_every : int or None, default 1024
        Flush to disk after this many unsynced lines ...
    fsync_interval_s : float, s, default 1.0
        ... or when the oldest unsynced line is this old, whichever comes
        first; and always on :meth:`close`.
    write_every : int, default 16
        Lines that wait before one ``os.write`` appends them ...
    write_interval_s : float, s, default 0.5
        ... or how long the oldest may wait; :meth:`flush` writes at once.

    Notes
    -----
    The file is opened with ``O_APPEND``; lines are written whole, several
    with one ``os.write`` (continued only if the kernel wrote part), so a
    crash leaves at most one torn last line, which :func:`read_manifest`
    skips. If the file does not end in a newline when opened (a torn line),
    one is written first, so the next event starts on its own line. Waiting
    and batching fsync are safe because a line lost in a crash or power cut
    only makes the next run convert that (claimed) file again, to the same
    bytes. The batch holds the destination's lock, so this is the only writer
    and :meth:`append` knows where each line starts.
    """

    def __init__(self, path, *, fsync_every=1024, fsync_interval_s=1.0, write_every=16,
                 write_interval_s=0.5):
        super().__init__(path, fsync_every=fsync_every, fsync_interval_s=fsync_interval_s,
                         write_every=write_every, write_interval_s=write_interval_s)

    def append(self, event):
        """Write one event as one compact JSON line (:func:`_compact`).

        A non-finite figure becomes null, with a warning of kind
        ``non-finite-figure``, so that one damaged file cannot stop a library.

        Returns
        -------
        offset : int
            Where the line starts in the file (bytes).
        crc : int
            :func:`row_crc` of the line.
        """
        row = _compact(event)
        try:  # the usual case, at the cost of one dumps: finite numbers, UTF-8 text
            line = _dumps(row)
        except (ValueError, TypeError):  # NaN or infinity, a lone surrogate, a numpy number
            row, replaced = json_safe(row)
            if replaced:
                row.setdefault("warnings", []).append(NON_FINITE_WARNING.format(n=replaced))
                kinds = row.setdefault("warning_kinds", [])
                if "non-finite-figure" not in kinds:
                    kinds.append("non-finite-figure")
            line = _dumps(row)
        return self._line(line), row_crc(line)


class DetailsWriter:
    """A run's details file, ``DST/requant-runs/RUN_ID.jsonl``: the full figures and
    metadata of each converted file, one JSON line each (``source``, ``figures``,
    ``metadata``), which the manifest's compact rows leave out.

    Nothing reads it to resume; it may be deleted at any time. It is created with the
    first line, written 256 lines at a time and flushed to disk when the run ends.
    """

    def __init__(self, dst, run_id):
        self.path = os.path.join(dst, RUNS_DIR, f"{run_id}.jsonl")
        self.name = f"{RUNS_DIR}/{run_id}.jsonl"
        self._out = None

    def append(self, source, figures, metadata):
        """Write one converted file's details."""
        if self._out is None:
            try:
                os.makedirs(os.path.dirname(self.path), exist_ok=True)
            except OSError as exc:
                raise OutputError(f"cannot create the folder {os.path.dirname(self.path)!r} "
                                  f"({exc.strerror or exc}); free some space or fix the "
                                  "permissions, then run again to resume") from None
            self._out = _Appender(self.path, fsync_every=None, fsync_interval_s=math.inf,
                                  write_every=256, write_interval_s=math.inf)
        doc = {"source": escape_name(source), "figures": figures, "metadata": metadata}
        try:
            line = _dumps(doc)
        except (ValueError, TypeError):
            line = _dumps(json_safe(doc)[0])
        self._out._line(line)

    @property
    def written(self):
        """True once a line was written."""
        return self._out is not None

    def close(self):
        """fsync and close (safe to call twice)."""
        if self._out is not None:
            self._out.close()


def read_details(dst):
    """Every run's details in DST: ``{(run_id, source): {"figures": ..., "metadata": ...}}``.

    For people and tests (it reads every details file whole); unreadable lines
    are skipped.
    """
    out = {}
    folder = os.path.join(os.fspath(dst), RUNS_DIR)
    try:
        names = sorted(os.listdir(folder))
    except OSError:
        return out
    for name in names:
        if not name.endswith(".jsonl"):
            continue
        run_id = name[:-len(".jsonl")]
        with open(os.path.join(folder, name), "rb") as fh:
            for line in fh:
                try:
                    doc = json.loads(line)
                except (ValueError, RecursionError):
                    continue
                if isinstance(doc, dict) and isinstance(doc.get("source"), str):
                    out[(run_id, unescape_name(doc["source"]))] = {
                        "figures": doc.get("figures"), "metadata": doc.get("metadata")}
    return out


def latest_by_source(events):
    """Per source: the latest event, the latest ``converted`` event, and the latest
    recorded source identity; and every output name the manifest mentions.

    Returns
    -------
    latest, converted, identities : dict of str to dict
    outputs : set of str
    """
    latest, converted, identities, outputs = {}, {}, {}, set()
    for ev in events:
        if ev.get("status") == RUN_STATUS:
            continue
        latest[ev["source"]] = ev
        if ev.get("status") == "converted":
            converted[ev["source"]] = ev
        ident = ev.get("source_identity")
        if ev.get("status") in ("converted", "skipped") and isinstance(ident, dict):
            identities[ev["source"]] = ident
        if isinstance(ev.get("output"), str):
            outputs.add(ev["output"])
    return latest, converted, identities, outputs
