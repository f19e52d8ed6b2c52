"""The manifest: one JSON line per file event, appended, read back defensively.

``DST/requant-manifest.jsonl`` is appended by the batch process only, each line with
one ``os.write`` on an ``O_APPEND`` descriptor (:class:`ManifestWriter`). The reader
(:func:`read_manifest`) skips lines that do not parse, so a torn last line from a
crash is harmless.
"""

from __future__ import annotations

import hashlib
import json
import os
import time

from requant.audio_io.writers import NON_FINITE_WARNING, json_safe
from requant.errors import OutputError

__all__ = ["MANIFEST_NAME", "ManifestWriter", "ManifestDamage", "read_manifest", "sha256_file",
           "latest_by_source", "escape_name", "unescape_name"]


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


#: Fields a manifest event may carry, and the types they must have to be used.
_EVENT_TYPES = {
    "source": str, "status": str, "output": (str, type(None)), "settings_id": str,
    "output_sha256": (str, type(None)), "source_identity": (dict, type(None)),
    "reason": (str, type(None)), "error": (str, type(None)), "seed": (int, type(None)),
    "warnings": list, "warning_kinds": list, "figures": dict, "metadata": dict,
}
_STATUSES = ("converted", "skipped", "failed")


#: Event fields that hold file names (relative paths).
_NAME_FIELDS = ("source", "output")


def escape_name(name):
    """A file name as strict UTF-8 text that :func:`unescape_name` turns back into it.

    Linux names may hold bytes that are not UTF-8; Python carries them as lone
    surrogates, which strict JSON readers refuse. Each such byte is written
    ``\\xNN`` and a backslash ``\\\\``; every other character is kept.
    """
    if not isinstance(name, str) or ("\\" not in name and not _has_surrogate(name)):
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
    return any(0xDC80 <= ord(c) <= 0xDCFF for c in name)


def _usable(ev):
    """True when a parsed line is an event whose known fields have their types."""
    if not isinstance(ev, dict) or ev.get("status") not in _STATUSES:
        return False
    for key, kind in _EVENT_TYPES.items():
        if key in ev and not isinstance(ev[key], kind):
            return False
    if "source" not in ev:
        return False
    ident = ev.get("source_identity")
    if ident is not None and not (isinstance(ident.get("size"), int)
                                  and isinstance(ident.get("sha256"), str)):
        return False
    return True


class ManifestDamage(int):
    """How many manifest lines :func:`read_manifest` left out (an int), and the first one."""

    first_line: int | None = None

    @classmethod
    def of(cls, lines):
        """The damage of these left-out line numbers."""
        damage = cls(len(lines))
        damage.first_line = lines[0] if lines else None
        return damage

    def sentence(self, path):
        """A note for the run: what was ignored and the way out."""
        return (f"the manifest {path!r} has {int(self)} unreadable line(s) (first: line "
                f"{self.first_line}; a run was cut off, or the file was edited); they were "
                "ignored, so the files they describe are checked or converted again; to start "
                "afresh, move the manifest aside and run again")


def read_manifest(path):
    """Read the events of a manifest, leaving out lines that cannot be used.

    A line is used when it parses as a JSON object (not nested absurdly deep),
    its ``status`` is ``converted``, ``skipped`` or ``failed``, it has a
    ``source``, and every known field has its type (:data:`_EVENT_TYPES`).
    Anything else, a torn last line after a crash or a line edited by hand,
    is counted and left out; the run then treats its file as not recorded.

    Parameters
    ----------
    path : str

    Returns
    -------
    events : list of dict
        In file order.
    damage : ManifestDamage
        How many lines were left out (an int) and the first one (``first_line``).

    Raises
    ------
    OutputError
        If the manifest is a folder or cannot be read: one sentence with the
        way out.
    """
    events, left_out = [], []
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except FileNotFoundError:
        return events, ManifestDamage.of(left_out)
    except IsADirectoryError:
        raise OutputError(f"{os.fspath(path)!r} is a folder where the batch keeps its manifest; "
                          "move it aside and run again") from None
    except OSError as exc:
        raise OutputError(f"the manifest {os.fspath(path)!r} cannot be read "
                          f"({exc.strerror or exc}); fix its permissions, or move it aside and "
                          "run again") from None
    for number, line in enumerate(data.split(b"\n"), 1):
        if not line.strip():
            continue
        try:
            ev = json.loads(line)
        except (ValueError, RecursionError):
            left_out.append(number)
            continue
        if _usable(ev):
            for key in _NAME_FIELDS:
                if key in ev:
                    ev[key] = unescape_name(ev[key])
            events.append(ev)
        else:
            left_out.append(number)
    return events, ManifestDamage.of(left_out)


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
        event = {k: (escape_name(v) if k in _NAME_FIELDS else v) for k, v in event.items()}
        try:  # the usual case, at the cost of one dumps: finite numbers, UTF-8 text
            line = json.dumps(event, ensure_ascii=False, allow_nan=False).encode("utf-8")
        except (ValueError, TypeError):  # NaN or infinity, a lone surrogate, a numpy number
            event, replaced = json_safe(event)
            if replaced:
                event.setdefault("warnings", []).append(NON_FINITE_WARNING.format(n=replaced))
                kinds = event.setdefault("warning_kinds", [])
                if "non-finite-figure" not in kinds:
                    kinds.append("non-finite-figure")
            line = json.dumps(event, ensure_ascii=False, allow_nan=False).encode("utf-8")
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


