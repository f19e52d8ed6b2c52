"""The manifest: one JSON line per file event, appended, read back defensively.

``DST/requant-manifest.jsonl`` is appended by the batch process only, each line with
one ``os.write`` on an ``O_APPEND`` descriptor (:class:`ManifestWriter`). The reader
(:func:`read_manifest`) skips lines that do not parse, so a torn last line from a
crash is harmless.
"""

import hashlib
import json
import os
import time

from requant.audio_io.writers import NON_FINITE_WARNING, json_safe
from requant.errors import OutputError

__all__ = ["MANIFEST_NAME", "ManifestWriter", "read_manifest", "sha256_file", "latest_by_source"]


MANIFEST_NAME = "requant-manifest.jsonl"


_HASH_BLOCK = 1 << 20


def sha256_file(path):
    """Hex SHA-256 of a file's bytes, read in 1 MiB blocks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        buf = bytearray(_HASH_BLOCK)
        view = memoryview(buf)
        while True:
            n = fh.readinto(buf)
            if not n:
                break
            h.update(view[:n])
    return h.hexdigest()


def read_manifest(path):
    """Read the events of a manifest, skipping lines that do not parse.

    Parameters
    ----------
    path : str

    Returns
    -------
    events : list of dict
        In file order; only JSON objects with a ``source`` and a ``status``.
    bad_lines : int
        Lines skipped (a torn last line after a crash, or damage).
    """
    events, bad = [], 0
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except FileNotFoundError:
        return events, 0
    for line in data.split(b"\n"):
        if not line.strip():
            continue
        try:
            ev = json.loads(line)
        except ValueError:
            bad += 1
            continue
        if isinstance(ev, dict) and isinstance(ev.get("source"), str) and "status" in ev:
            events.append(ev)
        else:
            bad += 1
    return events, bad


class ManifestWriter:
    """Append events to the manifest: one ``os.write`` per line, fsync in bounded batches.

    Parameters
    ----------
    path : str
    fsync_every : int, default 64
        Flush to disk after this many unsynced lines ...
    fsync_interval_s : float, s, default 1.0
        ... or when the oldest unsynced line is this old, whichever comes
        first; and always on :meth:`close`.

    Notes
    -----
    The file is opened with ``O_APPEND``; a line is written with a single
    ``os.write`` (continued only if the kernel wrote part of it), so a crash
    leaves at most one torn last line, which :func:`read_manifest` skips.
    If the file does not end in a newline when opened (a torn line), one is
    written first, so the next event starts on its own line. Batching fsync
    is safe because a line lost in a power cut only makes the next run
    convert that (claimed) file again, to the same bytes.
    """

    def __init__(self, path, *, fsync_every=64, fsync_interval_s=1.0):
        self.path = path
        self._fd = None
        try:
            self._fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        except OSError as exc:
            raise self._error(exc) from None
        self._every = fsync_every
        self._interval = fsync_interval_s
        self._unsynced = 0
        self._oldest = None
        size = os.fstat(self._fd).st_size
        if size:
            with open(path, "rb") as fh:
                fh.seek(size - 1)
                if fh.read(1) != b"\n":
                    self._write(b"\n")

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

    def append(self, event):
        """Write one event as one JSON line (a non-finite figure becomes null, with a warning
        of kind ``non-finite-figure``, so that one damaged file cannot stop a library)."""
        event, replaced = json_safe(event)
        if replaced:
            event.setdefault("warnings", []).append(NON_FINITE_WARNING.format(n=replaced))
            kinds = event.setdefault("warning_kinds", [])
            if "non-finite-figure" not in kinds:
                kinds.append("non-finite-figure")
        try:
            line = json.dumps(event, ensure_ascii=False, allow_nan=False).encode("utf-8")
        except UnicodeEncodeError:  # undecodable file names: keep the escapes
            line = json.dumps(event, ensure_ascii=True, allow_nan=False).encode("ascii")
        self._write(line + b"\n")
        self._unsynced += 1
        now = time.monotonic()
        if self._oldest is None:
            self._oldest = now
        if self._unsynced >= self._every or now - self._oldest >= self._interval:
            self.sync()

    def sync(self):
        """fsync the lines written so far."""
        if self._unsynced:
            try:
                os.fsync(self._fd)
            except OSError as exc:
                raise self._error(exc) from None
            self._unsynced = 0
            self._oldest = None

    def close(self):
        """fsync and close (safe to call twice)."""
        if self._fd is not None:
            try:
                self.sync()
            finally:
                os.close(self._fd)
                self._fd = None


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
        latest[ev["source"]] = ev
        if ev.get("status") == "converted":
            converted[ev["source"]] = ev
        ident = ev.get("source_identity")
        if ev.get("status") in ("converted", "skipped") and isinstance(ident, dict):
            identities[ev["source"]] = ident
        if isinstance(ev.get("output"), str):
            outputs.add(ev["output"])
    return latest, converted, identities, outputs


