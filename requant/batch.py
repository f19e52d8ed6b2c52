"""Sound-library batch conversion: a mirrored tree, a manifest, resume, all cores.

``run_batch(src, dst, settings)`` converts every audio file under ``src`` into
the same relative place under ``dst``, each file with :func:`convert_file`
and its own seed, and keeps a record that makes a rerun do nothing twice.

Pieces (each replaceable on its own):

* **Settings.** :func:`resolve_settings` layers library defaults < profile
  (:mod:`requant.profile`) < explicit options. :func:`settings_id` hashes the
  settings that affect the output bits, together with the run seed and the
  requant version.
* **Tree walk.** :func:`walk_tree` uses :func:`os.walk` with
  ``followlinks=False``: a symbolic link to a folder is listed and not
  entered (so link loops cannot hang the walk), a symbolic link to a file is
  read like a file. Hidden files (names starting with ``.``) are skipped and
  listed; hidden folders (``.git``, ...) are not entered. Order is sorted,
  so nothing depends on the file system's order.
* **Tasks.** :func:`convert_task` is a top-level function taking a plain
  dict and returning a plain dict; it never raises for a bad file (it
  returns ``status: failed`` with the one-line message the user sees). Any
  executor can run it: :class:`SerialExecutor` (in this process),
  :class:`ProcessExecutor` (local worker processes, started once and
  reused), or a cluster executor with the same four methods.
* **Manifest.** ``DST/requant-manifest.jsonl``, one JSON object per file
  event, appended by this process only, each line with one ``os.write`` on
  an ``O_APPEND`` descriptor (:class:`ManifestWriter`). The reader
  (:func:`read_manifest`) skips lines that do not parse, so a torn last
  line from a crash is harmless.
* **Resume.** A file is skipped ("up to date") when its latest ``converted``
  event has the same ``settings_id`` and output name and the output still
  has the recorded SHA-256. Before any work starts, the outputs this run may
  write are *claimed* in ``DST/requant-batch.json`` (written atomically,
  with the run seed). An output that exists but was neither claimed nor
  recorded is somebody else's file: it is refused unless ``overwrite``.
  So a run killed between writing an output and recording it leaves a
  claimed output that the next run simply converts again, to the same bytes.

Crash safety, in short: every output is written to a temporary file,
flushed to disk and renamed, a chunk of files at a time, before its result
is recorded (in the worker; for the local pool in this process, so that the
workers never wait for the disk: :func:`_run_chunk`); stale
``*.requant-part`` temporaries of a killed run are removed at the next
start; manifest lines are whole or ignored; a lost manifest line only costs
one reconversion. A lock
(``DST/.requant-batch.lock``, ``flock``) keeps two batches out of one
destination.
"""

import datetime as _dt
import fnmatch
import hashlib
import json
import os
import posixpath
import signal
import socket
import struct
import sys
import threading
import time

from requant import __version__
from requant.errors import InputError, OutputError, RequantError, UsageError

__all__ = [
    "AUDIO_EXTENSIONS",
    "DEFAULT_SETTINGS",
    "OUTPUT_SETTINGS",
    "MANIFEST_NAME",
    "SUMMARY_NAME",
    "INDEX_NAME",
    "STATE_NAME",
    "BatchReporter",
    "ManifestWriter",
    "SerialExecutor",
    "ProcessExecutor",
    "WorkerLost",
    "resolve_settings",
    "validate_settings",
    "settings_id",
    "derive_seed",
    "output_name",
    "walk_tree",
    "read_manifest",
    "sha256_file",
    "convert_task",
    "run_batch",
    "default_jobs",
]

MANIFEST_NAME = "requant-manifest.jsonl"
SUMMARY_NAME = "requant-summary.json"
INDEX_NAME = "requant-index.html"
STATE_NAME = "requant-batch.json"
LOCK_NAME = ".requant-batch.lock"

#: Extensions (lower case) of files libsndfile reads; everything else is "not audio".
AUDIO_EXTENSIONS = frozenset({
    ".wav", ".wave", ".bwf", ".rf64", ".w64", ".flac", ".aif", ".aiff", ".aifc", ".caf",
    ".au", ".snd", ".ogg", ".oga", ".opus", ".mp3", ".voc", ".paf", ".svx", ".8svx", ".sds",
    ".sd2", ".nist", ".sph", ".avr", ".htk", ".xi", ".wve", ".pvf",
})
#: Source extensions that ``format='same'`` keeps (requant writes these containers).
_KEEP_EXTENSIONS = {".wav": "WAV", ".wave": "WAV", ".flac": "FLAC", ".aif": "AIFF",
                    ".aiff": "AIFF", ".aifc": "AIFF"}
_FORMAT_EXTENSIONS = {"wav": ".wav", "flac": ".flac", "aiff": ".aiff"}

#: Library defaults of the batch settings (the same as :func:`convert_file`'s).
DEFAULT_SETTINGS = {
    "bits": 16,
    "quantizer": "round",
    "dither": "tpdf",
    "shaping": "none",
    "shaping_order": None,
    "shaping_limit_db": None,
    "force_dither": False,
    "format": "same",
    "block_frames": 65536,
    "analyze": False,
}
#: Settings that change the output bits (hashed into ``settings_id``).
OUTPUT_SETTINGS = ("bits", "quantizer", "dither", "shaping", "shaping_order", "shaping_limit_db",
                   "force_dither", "format")
_LIST_SETTINGS = ("include", "exclude")

# Source WAV chunks that are not metadata (see requant.audio_io.riff.copy_metadata).
_NOT_METADATA = frozenset({"fmt ", "data", "fact", "ds64", "JUNK", "junk", "PAD ", "FLLR",
                           "PEAK", "levl"})
_SEED_MAX = 2**63 - 1
_HASH_BLOCK = 1 << 20
_HOST = socket.gethostname()


# --------------------------------------------------------------------------- settings

def default_jobs():
    """Worker processes by default: every core this process may run on."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def resolve_settings(options=None, profile=None):
    """Effective settings: library defaults < profile < options given.

    Parameters
    ----------
    options : dict, optional
        Explicit options (the command line); a value of None, or an empty
        include/exclude list, means "not given".
    profile : dict, optional
        From :func:`requant.profile.load_profile`.

    Returns
    -------
    dict
        Every key of :data:`DEFAULT_SETTINGS`, plus ``include``,
        ``exclude`` (lists) and ``seed`` (int or None). A ``.json`` shaping
        file is made absolute.

    Raises
    ------
    UsageError
        For an unknown key or a value that is not allowed.

    Examples
    --------
    >>> s = resolve_settings({"bits": 12, "dither": None}, {"bits": 8, "dither": "rpdf"})
    >>> s["bits"], s["dither"], s["quantizer"]
    (12, 'rpdf', 'round')
    """
    s = dict(DEFAULT_SETTINGS, include=[], exclude=[], seed=None)
    for layer in (profile or {}, options or {}):
        for key, value in layer.items():
            if key not in s:
                raise UsageError(f"unknown batch setting {key!r}; known settings are "
                                 f"{', '.join(s)}")
            if value is None or (key in _LIST_SETTINGS and not value):
                continue
            s[key] = value
    return validate_settings(s)


def validate_settings(s):
    """Check a full settings dict (see :func:`resolve_settings`); return it, normalized."""
    from requant.convert import resolve_shaping_spec
    from requant.profile import OUTPUT_CHOICES
    from requant.dsp.quantizer import check_settings

    s = dict(s)
    check_settings(s["bits"], s["quantizer"], s["dither"])
    if s["format"] not in OUTPUT_CHOICES:
        raise UsageError(f"format={s['format']!r} is not known: choose one of "
                         f"{', '.join(OUTPUT_CHOICES)}")
    if s["format"] == "flac" and s["bits"] > 24:
        raise UsageError(f"FLAC holds at most 24 bits, not {s['bits']}; choose --format wav or "
                         "aiff, or fewer bits")
    bf = s["block_frames"]
    if isinstance(bf, bool) or not isinstance(bf, int) or bf < 1:
        raise UsageError(f"block_frames={bf!r} must be a positive integer")
    seed = s["seed"]
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, int)
                             or not 0 <= seed <= _SEED_MAX):
        raise UsageError(f"seed={seed!r} must be an integer from 0 to 2**63 - 1")
    for key in ("force_dither", "analyze"):
        if not isinstance(s[key], bool):
            raise UsageError(f"{key}={s[key]!r} must be true or false")
    shaping = str(s["shaping"]).strip()
    if shaping.lower().endswith(".json"):
        shaping = os.path.abspath(shaping)
        from requant.dsp.shaping import load_coefficients

        load_coefficients(shaping)  # readable, valid JSON; the rate is checked per file
    elif shaping == "hearing" and (s["shaping_order"] is not None
                                   or s["shaping_limit_db"] is not None):
        resolve_shaping_spec(shaping, 48000, order=s["shaping_order"],
                             limit_db=s["shaping_limit_db"])
    elif shaping not in ("none", "first-order", "hearing"):
        resolve_shaping_spec(shaping, 48000)
    s["shaping"] = shaping
    for key in _LIST_SETTINGS:
        pats = s[key]
        if isinstance(pats, str) or not all(isinstance(p, str) and p for p in pats):
            raise UsageError(f"{key}={pats!r} must be a list of glob patterns such as '*.wav'")
        s[key] = list(pats)
    return s


def _canonical(obj):
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=True)


def settings_id(settings, run_seed):
    """Hash of everything that decides the output bits.

    Parameters
    ----------
    settings : dict
        Effective settings (:func:`resolve_settings`).
    run_seed : int
        The run seed (each file's seed derives from it).

    Returns
    -------
    str
        Hex SHA-256 of the canonical JSON of the output settings, the run
        seed and the requant version. A ``.json`` shaping file enters by
        the SHA-256 of its content (editing the file changes the id);
        order and limit enter only for the ``hearing`` design.
    """
    d = {k: settings[k] for k in OUTPUT_SETTINGS}
    if d["shaping"] != "hearing":
        d["shaping_order"] = d["shaping_limit_db"] = None
    if str(d["shaping"]).lower().endswith(".json"):
        try:
            d["shaping"] = {"json_sha256": sha256_file(d["shaping"])}
        except OSError:
            d["shaping"] = {"json_path": d["shaping"]}
    d["run_seed"] = int(run_seed)
    d["requant_version"] = __version__
    return hashlib.sha256(_canonical(d).encode("ascii")).hexdigest()


def derive_seed(run_seed, relpath):
    """A file's seed: SHA-256 of (run seed, relative path), cut to 63 bits.

    Parameters
    ----------
    run_seed : int
    relpath : str
        The source's path relative to SRC, with ``/`` separators.

    Returns
    -------
    int, 0..2**63-1
        The same for the same inputs whatever the order, the number of
        workers or the machine.

    Examples
    --------
    >>> derive_seed(1, "a/b.wav") == derive_seed(1, "a/b.wav") != derive_seed(2, "a/b.wav")
    True
    """
    raw = str(int(run_seed)).encode("ascii") + b"\0" + os.fsencode(relpath)
    return int.from_bytes(hashlib.sha256(raw).digest()[:8], "big") >> 1


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


# --------------------------------------------------------------------------- tree

def output_name(relpath, fmt):
    """The output path (relative, ``/`` separators) for a source, and a note.

    ``fmt='same'`` keeps ``.wav``, ``.wave``, ``.flac``, ``.aif``, ``.aiff``
    and ``.aifc`` names unchanged; any other source becomes ``.wav`` (with a
    note saying so). ``wav``, ``flac``, ``aiff`` give that extension.

    Examples
    --------
    >>> output_name("drums/kick.caf", "same")
    ('drums/kick.wav', 'written as WAV: requant does not write .caf files')
    >>> output_name("drums/kick.WAV", "flac")
    ('drums/kick.flac', None)
    """
    stem, ext = posixpath.splitext(relpath)
    if fmt == "same":
        if ext.lower() in _KEEP_EXTENSIONS:
            return relpath, None
        return stem + ".wav", f"written as WAV: requant does not write {ext.lower()} files"
    return stem + _FORMAT_EXTENSIONS[fmt], None


def _matches(rel, patterns):
    name = posixpath.basename(rel)
    for p in patterns:
        if fnmatch.fnmatchcase(rel, p) or ("/" not in p and fnmatch.fnmatchcase(name, p)):
            return True
    return False


def walk_tree(src, *, include=(), exclude=(), prune=()):
    """List the files under ``src``, sorted by relative path.

    Parameters
    ----------
    src : str
        Source folder.
    include, exclude : sequence of str
        fnmatch patterns on the relative path (``/`` separators; ``*`` also
        matches ``/``). A pattern without ``/`` also matches the file name
        alone. With include patterns, only matching files are listed;
        exclude patterns then remove files.
    prune : sequence of str
        Absolute folders not to enter (the destination, when it lies
        inside the source).

    Returns
    -------
    entries : list of dict
        ``source`` (relative, POSIX), ``kind`` (``audio``, ``other``,
        ``unreadable-folder``), ``size`` (bytes), and ``reason`` for the
        others.
    excluded : int
        Files left out by the patterns.
    """
    src = os.path.abspath(src)
    prune = {os.path.normcase(os.path.abspath(p)) for p in prune}
    entries, excluded = [], 0

    def onerror(exc):
        rel = os.path.relpath(getattr(exc, "filename", None) or src, src)
        rel = "." if rel == "." else rel.replace(os.sep, "/")
        entries.append({"source": rel + "/", "kind": "unreadable-folder", "size": 0,
                        "reason": f"the folder {rel!r} cannot be read "
                                  f"({exc.strerror or exc}); check its permissions"})

    for root, dirs, files in os.walk(src, followlinks=False, onerror=onerror):
        reldir = os.path.relpath(root, src)
        reldir = "" if reldir == "." else reldir.replace(os.sep, "/") + "/"
        keep = []
        for d in sorted(dirs):
            full = os.path.join(root, d)
            if os.path.normcase(full) in prune:
                continue
            if os.path.islink(full):
                rel = reldir + d
                if not (include and not _matches(rel, include)) and not _matches(rel, exclude):
                    entries.append({"source": rel + "/", "kind": "other", "size": 0,
                                    "reason": "a link to a folder; links to folders are not "
                                              "followed"})
                continue
            if d.startswith("."):
                continue
            keep.append(d)
        dirs[:] = keep
        for name in sorted(files):
            rel = reldir + name
            if (include and not _matches(rel, include)) or _matches(rel, exclude):
                excluded += 1
                continue
            full = os.path.join(root, name)
            try:
                size = os.stat(full).st_size
            except OSError:
                size = 0
            ext = posixpath.splitext(name)[1].lower()
            if name.startswith("."):
                entries.append({"source": rel, "kind": "other", "size": size,
                                "reason": "a hidden file"})
            elif ext in AUDIO_EXTENSIONS:
                entries.append({"source": rel, "kind": "audio", "size": size, "reason": None})
            else:
                entries.append({"source": rel, "kind": "other", "size": size,
                                "reason": f"not an audio file ({ext or 'no extension'})"})
    entries.sort(key=lambda e: e["source"])
    return entries, excluded


# --------------------------------------------------------------------------- manifest

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
        """Write one event as one JSON line."""
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


# --------------------------------------------------------------------------- the task

_TASK = {"worker": False, "in_task": False, "interrupted": False, "terminating": False,
         "stop": False}


class _Terminated(BaseException):
    """Raised in a worker by SIGTERM (also sent when the batch process dies)."""


def _now():
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="milliseconds")


def _worker_label():
    return f"{_HOST}:{os.getpid()}"


def _is_riff_wave(path):
    try:
        with open(path, "rb") as fh:
            head = fh.read(12)
    except OSError:
        return False
    return len(head) == 12 and head[:4] in (b"RIFF", b"RF64", b"BW64") and head[8:] == b"WAVE"


def _source_tags(path):
    import soundfile as sf

    try:
        with sf.SoundFile(path) as f:
            return {k: v for k, v in f.copy_metadata().items() if v}
    except Exception:  # convert_file reports an unreadable source with its own message
        return {}


def _history_text(settings, dither_applied=None):
    shaping = settings["shaping"]
    if shaping not in ("none", "first-order", "hearing"):
        shaping = "file" if shaping.lower().endswith(".json") else "custom"
    dither = dither_applied or settings["dither"]
    text = f"requant {__version__}; {settings['quantizer']}; dither {dither}; shaping {shaping}"
    return "".join(ch for ch in text if " " <= ch <= "~" and ch != ",")


class _Finalize:
    """convert_file's ``finalize``: carry WAV chunks over, or record what is lost."""

    def __init__(self, source, out_path, settings, tags, source_is_wav):
        self.source = source
        self.out_path = out_path
        self.settings = settings
        self.tags = tags
        self.source_is_wav = source_is_wav

    def __call__(self, tmp_out, out_format, report=None):
        from requant.audio_io import riff  # noqa: F401

        meta = {"copied": [], "rewritten": [], "dropped": [], "tags": sorted(self.tags or {})}
        if not self.source_is_wav:
            return meta
        try:
            chunks = riff.read_chunks(self.source)
        except riff.ChunkError as exc:
            meta["error"] = (f"the WAV chunks of the source could not be read ({exc}); the audio "
                             "was converted without them")
            return meta
        except OSError:
            return meta  # convert_file has just read it; a vanishing file is not our story
        carried = [c.id for c in chunks if c.id not in _NOT_METADATA]
        if out_format not in ("WAV", "RF64"):
            meta["dropped"] = carried
            return meta
        if not carried:
            return meta  # nothing to carry over: keep the file as written (saves a rewrite)
        rate, channels = self._rate_channels(riff, tmp_out)
        applied = None
        if report is not None:  # a convert_file that passes its report to finalize
            applied = report.get("settings", {}).get("dither_applied")
        row = riff.coding_history_row(sample_rate=rate, bits=self.settings["bits"],
                                      channels=channels,
                                      text=_history_text(self.settings, applied))
        try:
            got = riff.copy_metadata(self.source, tmp_out, coding_history_row=row)
        except riff.ChunkError as exc:
            meta["error"] = (f"the WAV chunks of the source could not be copied ({exc}); the "
                             "audio was converted without them")
            return meta
        except OSError as exc:
            raise OutputError(f"copying the WAV chunks into {self.out_path!r} failed "
                              f"({exc.strerror or exc}); check the destination's free space and "
                              "permissions") from None
        meta.update(copied=got["copied"], rewritten=got["rewritten"],
                    dropped=[c for c in got["dropped"] if c not in _NOT_METADATA])
        return meta

    @staticmethod
    def _rate_channels(riff, path):
        # WAVEFORMAT (RIFF 1991): wFormatTag u16, nChannels u16, nSamplesPerSec u32, ...
        fmt = next(c for c in riff.read_chunks(path) if c.id == "fmt ")
        channels, rate = struct.unpack_from("<HI", fmt.read(path, max_bytes=64)[:8], 2)
        return rate, channels


def _classify(report, meta):
    """Warning kinds of a converted file, from its report and metadata record."""
    m = report["measured"]
    kinds = []
    if m.get("clipped_samples") or m.get("over_full_scale_samples"):
        kinds.append("clipping")
    s, out = report["settings"], report["output"]
    if "signal_correlated" in m:  # measured (analyze=True)
        if m["signal_correlated"]:
            kinds.append("correlated-error")
    elif s.get("dither_applied") == "none" and not out.get("passthrough") and out["bits"] < 24:
        kinds.append("correlated-error")  # by rule: undithered requantization
    tp = m.get("output_true_peak_dbtp")
    if tp is not None and tp > 0.0:
        kinds.append("true-peak")
    if m.get("shaping_overloads"):
        kinds.append("shaping-overload")
    if m.get("error_peak_dbfs") is not None and m["error_peak_dbfs"] > -20.0:
        kinds.append("loud-error")
    if meta.get("dropped"):
        kinds.append("metadata-dropped")
    if meta.get("error"):
        kinds.append("metadata-error")
    return kinds


def _figures(report):
    m, p, i, o, s = (report["measured"], report["predicted"], report["input"], report["output"],
                     report["settings"])
    return {
        "sample_rate": i["sample_rate"], "channels": i["channels"], "frames": i["frames"],
        "input_format": i["format"], "input_subtype": i["subtype"],
        "output_format": o["format"], "output_subtype": o["subtype"], "bits": o["bits"],
        "passthrough": o["passthrough"], "dither_applied": s["dither_applied"],
        "shaping": s["shaping"],
        "snr_predicted_db": p.get("snr_db"),
        "error_power_lsb2": m.get("error_power_lsb2"),
        "error_power_predicted_lsb2": p.get("error_power_lsb2"),
        "error_peak_dbfs": m.get("error_peak_dbfs"),
        "signal_rms_dbfs": m.get("signal_rms_dbfs"),
        "clipped_samples": m.get("clipped_samples"),
        "over_full_scale_samples": m.get("over_full_scale_samples"),
        "shaping_overloads": m.get("shaping_overloads"),
        "correlated_error_fraction": m.get("correlated_error_fraction"),
        "a_weighted_noise_dbfs": m.get("a_weighted_noise_dbfs"),
        "a_weighted_noise_predicted_dbfs": p.get("a_weighted_noise_dbfs"),
        "output_true_peak_dbtp": m.get("output_true_peak_dbtp"),
    }


def _convert_one(task):
    from requant.audio_io.atomic import pending_path
    from requant.convert import convert_file
    from requant.audio_io.formats import format_for_path

    src, out = task["source_path"], task["output_path"]
    for path in (src, out):
        try:
            path.encode(sys.getfilesystemencoding())
        except UnicodeEncodeError:
            raise InputError(f"{path!r}: the name is not valid {sys.getfilesystemencoding()}, "
                             "so the audio library cannot open it; rename the file") from None
    expect = task.get("expect_sha256")
    reason = task.get("reason")
    if expect and os.path.isfile(out) and not os.path.islink(out):
        digest = sha256_file(out)
        if digest == expect:
            return {"status": "skipped", "reason": "up to date", "output_sha256": digest}
        reason = "output changed since it was written"
    folder = os.path.dirname(out)
    try:
        if not os.path.isdir(folder):
            os.makedirs(folder, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the folder {folder!r} ({exc.strerror or exc}); check "
                          "that the destination is writable") from None
    if not task["overwrite"] and os.path.lexists(out):
        raise OutputError(f"{out!r} already exists and was not written by requant batch; "
                          "move it away or pass --overwrite to replace it")
    s = task["settings"]
    out_fmt = format_for_path(out)
    is_wav = _is_riff_wave(src)
    tags = {} if (out_fmt == "WAV" and is_wav) else _source_tags(src)
    fin = _Finalize(src, out, s, tags, is_wav)
    report = convert_file(src, out, bits=s["bits"], quantizer=s["quantizer"], dither=s["dither"],
                          shaping=s["shaping"], shaping_order=s["shaping_order"],
                          shaping_limit_db=s["shaping_limit_db"], seed=task["seed"],
                          overwrite=task["overwrite"], force_dither=s["force_dither"],
                          block_frames=s["block_frames"], tags=tags or None, finalize=fin,
                          analyze=s["analyze"])
    meta = report["output"].get("metadata") or {}
    warnings = list(report["warnings"])
    kinds = _classify(report, meta)
    if "correlated-error" in kinds and "signal_correlated" not in report["measured"]:
        warnings.append("Without dither the error follows the signal (signal-correlated error); "
                        "add dither, or measure it with --analyze.")
    if meta.get("dropped") and out_fmt != "WAV":
        warnings.append(f"the WAV chunks {', '.join(repr(c) for c in meta['dropped'])} cannot be "
                        f"stored in {out_fmt} and were dropped; choose --format wav to keep them")
    if meta.get("error"):
        warnings.append(meta["error"])
    notes = list(report["notes"])
    if task.get("note"):
        notes.append(task["note"])
    return {
        "status": "converted",
        "reason": reason,
        "output_sha256": sha256_file(pending_path(out)),  # a CommitGroup may hold it
        "snr_db": report["measured"]["snr_db"],
        "duration_s": report["input"]["duration_s"],
        "warnings": warnings,
        "warning_kinds": kinds,
        "notes": notes,
        "metadata": meta,
        "figures": _figures(report),
    }


def convert_task(task):
    """Convert one file of a batch; never raises for a bad file.

    Parameters
    ----------
    task : dict
        Plain data: ``source``/``output`` (relative, POSIX), ``source_path``
        and ``output_path`` (absolute str), ``seed`` (int), ``settings``
        (dict), ``overwrite`` (bool), ``expect_sha256`` (str or None: skip
        when the output still has this hash), ``reason`` and ``note``
        (str or None).

    Returns
    -------
    dict
        An event: ``source``, ``output``, ``status`` (``converted``,
        ``skipped``, ``failed``, or ``interrupted`` when a worker was asked
        to stop), ``error`` (the one-line message), ``seed``, ``seconds``,
        ``worker`` (host:pid) and, when converted, ``output_sha256``,
        ``snr_db``, ``duration_s``, ``warnings``, ``warning_kinds``,
        ``notes``, ``metadata`` and ``figures``.

    Notes
    -----
    In a worker process (set up by :class:`ProcessExecutor`), SIGINT stops
    the conversion in progress (its temporary files are removed) and the
    event says ``interrupted``; in the calling process KeyboardInterrupt
    propagates as usual.
    """
    t0 = time.perf_counter()
    base = {"source": task["source"], "output": task["output"], "seed": task["seed"]}
    st = _TASK
    st["in_task"], st["interrupted"] = True, False
    try:
        try:
            event = _convert_one(task)
        finally:
            st["in_task"] = False
    except KeyboardInterrupt:
        if not st["worker"]:
            raise
        event = {"status": "interrupted", "error": "interrupted before it finished"}
    except _Terminated:
        os._exit(143)  # convert_file has removed its temporary files on the way out
    except RequantError as exc:
        event = {"status": "failed", "error": str(exc)}
    except MemoryError:
        event = {"status": "failed", "error": f"{task['source_path']!r} ran out of memory; "
                                              "use fewer --jobs"}
    except Exception as exc:  # a bug or an unforeseen library error: isolate it
        event = {"status": "failed",
                 "error": f"{task['source_path']!r} failed with an unexpected "
                          f"{type(exc).__name__} ({exc}); the batch went on; please report "
                          "this with the file"}
    base.update(event)
    base["seconds"] = time.perf_counter() - t0
    base["worker"] = _worker_label()
    return base


# --------------------------------------------------------------------------- executors

class WorkerLost(Exception):
    """A worker process died while running a task (crash, out of memory, killed)."""


class SerialExecutor:
    """Run tasks one by one in this process (``--jobs 1``).

    The executor protocol (what :func:`run_batch` calls): :meth:`start`,
    :meth:`imap_unordered` yielding ``(item, result)`` where the result is
    the task's dict or an exception instance, :meth:`drain` after an
    interrupt, :meth:`close`; attributes ``workers`` and ``description``.
    """

    workers = 1
    description = "this process"
    forks = False
    max_chunk = 16
    chunk_bytes = 64 * 2**20

    def start(self):
        """Nothing to start."""

    def imap_unordered(self, fn, items, tick=None):
        """Yield (item, fn(item)) in order, in chunks whose outputs reach the disk together
        (as a worker's chunk does, see :func:`_run_chunk`)."""
        for chunk in chunk_items(items, per=self.max_chunk, chunk_bytes=self.chunk_bytes):
            yield from zip(chunk, _run_chunk(fn, chunk))

    def drain(self):
        """Nothing runs after an interrupt here."""
        return iter(())

    def close(self):
        """Nothing to stop."""


def _set_parent_death_signal():
    """Ask Linux to send SIGTERM when the parent dies (prctl PR_SET_PDEATHSIG)."""
    if not sys.platform.startswith("linux"):
        return
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, int(signal.SIGTERM), 0, 0, 0)  # 1 = PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass


def _on_sigint(signum, frame):
    _TASK["stop"] = True  # start no further file of this chunk
    if _TASK["in_task"] and not _TASK["interrupted"]:
        _TASK["interrupted"] = True
        raise KeyboardInterrupt


def _on_sigterm(signum, frame):
    if _TASK["in_task"] and not _TASK["terminating"]:
        _TASK["terminating"] = True
        raise _Terminated
    if not _TASK["in_task"]:
        os._exit(143)


def _worker_init():
    """Worker set-up: signal handling, die with the parent, warm the kernel."""
    _TASK["worker"] = True
    signal.signal(signal.SIGINT, _on_sigint)
    signal.signal(signal.SIGTERM, _on_sigterm)
    _set_parent_death_signal()
    if os.getppid() == 1:  # the parent is already gone
        os._exit(143)
    _warm_kernel()


def _warm_kernel():
    """Load what every file needs: the modules of a conversion and the compiled kernel
    most batches use (float32 in, 16-bit codes, unshaped); cheap once loaded. Forked
    workers inherit it all."""
    import numpy as np
    import soundfile  # noqa: F401

    from requant import convert  # noqa: F401
    from requant.audio_io import wavwrite  # noqa: F401
    from requant.audio_io import riff  # noqa: F401
    from requant.dsp.quantizer import Requantizer

    Requantizer(1, bits=16, dither="tpdf", seed=0).process(np.zeros((16, 1), np.float32))


def _ping():
    return os.getpid()


def _run_chunk(fn, items, flush=True):
    """Run ``fn`` on each item in a worker; stop after an interrupt (SIGINT).

    The chunk's outputs wait as temporary files
    (:class:`~requant.audio_io.atomic.CommitGroup`). With ``flush`` they are flushed
    to disk together and renamed into place here, before the results go back
    (:func:`_commit_chunk`), and the results are returned. Without it, this
    returns ``(results, pairs)`` and the caller commits the (temporary, final)
    pairs: the local pool does that in the parent, so its workers never wait
    for the disk. Either way the manifest never names an output that is not
    on disk.
    """
    from requant.audio_io.atomic import CommitGroup

    out = []
    with CommitGroup() as group:
        for item in items:
            if _TASK["stop"]:
                break
            res = fn(item)
            out.append(res)
            if isinstance(res, dict) and res.get("status") == "interrupted":
                break
        pairs = group.detach()
    if not flush:
        return out, pairs
    return _commit_chunk(items, out, pairs)


def _commit_chunk(items, results, pairs):
    """Flush a chunk's outputs to disk, then rename them into place; returns ``results``.

    If that fails, the files it held are reported failed (and nothing
    partial stays: :func:`~requant.audio_io.atomic.commit_pairs`).
    """
    from requant.audio_io.atomic import commit_pairs

    waiting = {os.path.abspath(final) for _, final in pairs}
    try:
        commit_pairs(pairs)
    except OSError as exc:
        from requant.convert import _wrap_write_error

        for item, res in zip(items, results):
            path = item.get("output_path") if isinstance(item, dict) else None
            if path and isinstance(res, dict) and os.path.abspath(path) in waiting:
                res.update(status="failed", error=str(_wrap_write_error(exc, path)),
                           output_sha256=None)
    return results


def chunk_items(items, *, per, chunk_bytes, taper=None):
    """Yield lists of up to ``per`` items, or fewer once their ``size`` reaches ``chunk_bytes``.

    Executors send small files in chunks, so the per-task cost of a process
    pool or a cluster is paid once per chunk; a big file travels alone.
    With ``taper`` (a number of chunks, e.g. 4 per worker), a chunk holds at
    most ``ceil(remaining / taper)`` items, so the chunks shrink towards the
    end of the list and the workers finish together (guided scheduling).
    """
    items = list(items) if taper else items
    left = len(items) if taper else 0
    chunk, size, cap = [], 0, per
    for it in items:
        if not chunk and taper:
            cap = max(1, min(per, -(-left // taper)))
        chunk.append(it)
        size += it.get("size", 0) if isinstance(it, dict) else 0
        if len(chunk) >= cap or size >= chunk_bytes:
            left -= len(chunk)
            yield chunk
            chunk, size = [], 0
    if chunk:
        yield chunk


class ProcessExecutor:
    """Run tasks in local worker processes, started once and reused.

    Parameters
    ----------
    workers : int
        Number of processes.
    start_method : {'fork', 'forkserver', 'spawn'}, optional
        Default 'fork' on Linux (fastest; the workers inherit the loaded
        modules), 'spawn' elsewhere. A forked child inherits locks held by
        other threads, so :meth:`start` must run before this process starts
        any thread: :func:`run_batch` starts the executor before the
        reporter, and asks the reporter not to run a refresh thread (see
        ``BatchReporter.started``). After a worker crash the broken pool is
        shut down (its manager thread joined) before a new one is forked.
        'forkserver' and 'spawn' import the caller's main script in each
        worker, which must then be guarded by ``if __name__ == "__main__"``.
    window : int, optional
        Chunks in flight at once (default 3 per worker): enough to keep the
        workers busy, few enough that an interrupt has little to cancel.
    max_chunk : int, default 16
        Most files per chunk. Small files travel in chunks (fewer round trips
        between processes); a chunk holds at most ``chunk_bytes`` of source
        and about 1/8 of a worker's share of the files, so the load stays
        balanced; files bigger than that travel alone.
    chunk_bytes : int, bytes, default 8 MiB
    drain_timeout_s : float, s, default 20
        After an interrupt, how long to wait for running tasks to stop
        before the workers are terminated.

    Notes
    -----
    Workers ignore SIGINT between tasks; during a task it stops the
    conversion (temporary files removed). SIGTERM, which Linux also sends
    when this process dies (``PR_SET_PDEATHSIG``), makes a worker clean up
    and exit, so a ``kill -9`` of the batch leaves no worker behind. If a
    worker dies, the tasks in flight are run again one at a time in a fresh
    pool; a task that kills its worker alone is reported as
    :class:`WorkerLost`.
    """

    forks = True

    def __init__(self, workers, *, start_method=None, window=None, max_chunk=16,
                 chunk_bytes=8 << 20, drain_timeout_s=20.0, start_timeout_s=120.0):
        self.workers = int(workers)
        if start_method is None:
            start_method = "fork" if sys.platform.startswith("linux") else "spawn"
        self.start_method = start_method
        self.forks = start_method == "fork"
        self.start_timeout_s = start_timeout_s
        self.window = window or max(2, 3 * self.workers)
        self.max_chunk = max_chunk
        self.chunk_bytes = chunk_bytes
        self.drain_timeout_s = drain_timeout_s
        self.description = f"{self.workers} local worker processes"
        self._pool = None
        self._inflight = {}

    def start(self):
        """Create the pool and start the workers (before any thread of ours); idempotent."""
        if self._pool is not None:
            return
        import multiprocessing as mp
        from concurrent.futures import ProcessPoolExecutor

        from concurrent.futures import wait

        ctx = mp.get_context(self.start_method)
        if self.start_method == "fork":
            _warm_kernel()  # once, here: every forked worker inherits the loaded kernel
        if self.start_method == "forkserver":
            ctx.set_forkserver_preload(["requant.batch", "requant.convert", "requant.audio_io.riff"])
        self._pool = ProcessPoolExecutor(self.workers, mp_context=ctx, initializer=_worker_init)
        pings = [self._pool.submit(_ping) for _ in range(self.workers)]
        wait(pings, timeout=self.start_timeout_s)
        for p in pings:
            exc = p.exception(timeout=0) if p.done() else TimeoutError("no answer")
            if exc is not None:
                self._pool.shutdown(wait=False, cancel_futures=True)
                self._pool = None
                raise RequantError(f"the worker processes could not start ({exc}); run with "
                                   "--jobs 1 to convert in this process")

    def _restart(self):
        try:
            self._pool.shutdown(wait=True, cancel_futures=True)  # joins its manager thread
        except Exception:
            pass
        self._pool = None
        self.start()

    def _chunks(self, items):
        """Group items into chunks: small files travel together, big ones alone."""
        items = list(items)
        per = max(1, min(self.max_chunk, len(items) // (self.workers * 8)))
        return chunk_items(items, per=per, chunk_bytes=self.chunk_bytes,
                           taper=self.workers * 4)

    @staticmethod
    def _pairs(chunk, fut):
        """(item, result) pairs of a finished chunk, its outputs committed here (the workers
        leave them temporary: :func:`_run_chunk` with ``flush=False``); items never started
        are left out."""
        exc = fut.exception()
        if exc is not None:
            return [(item, exc) for item in chunk]
        results, pending = fut.result()
        return list(zip(chunk, _commit_chunk(chunk, results, pending)))

    def _collect_broken(self):
        """After a worker death: results of finished chunks, and the items to retry."""
        from concurrent.futures import wait
        from concurrent.futures.process import BrokenProcessPool

        wait(list(self._inflight))
        done, retry = [], []
        for fut, chunk in list(self._inflight.items()):
            if isinstance(fut.exception(), BrokenProcessPool):
                retry.extend(chunk)
            else:
                done.extend(self._pairs(chunk, fut))
        self._inflight = {}
        return done, retry

    def _isolate(self, fn, items):
        """Run items one at a time in a fresh pool; one that kills its worker is WorkerLost."""
        from concurrent.futures.process import BrokenProcessPool

        self._restart()
        for item in items:
            fut = self._pool.submit(_run_chunk, fn, [item], False)
            self._inflight = {fut: [item]}
            try:
                fut.result()
                pairs = self._pairs([item], fut)
            except BrokenProcessPool:
                pairs = [(item, WorkerLost(
                    "the worker process died while converting this file (it crashed or was "
                    "killed, e.g. for lack of memory); check the file, or convert it alone with "
                    "requant convert"))]
                self._restart()
            except Exception as exc:
                pairs = [(item, exc)]
            self._inflight = {}
            yield from pairs

    def imap_unordered(self, fn, items, tick=None):
        """Yield (item, result) as tasks finish; at most ``window`` chunks in flight.

        ``tick`` (optional) is called about twice a second while waiting.
        """
        from concurrent.futures import FIRST_COMPLETED, wait
        from concurrent.futures.process import BrokenProcessPool

        chunks = self._chunks(items)
        more = True
        while True:
            while more and len(self._inflight) < self.window:
                chunk = next(chunks, None)
                if chunk is None:
                    more = False
                    break
                try:
                    fut = self._pool.submit(_run_chunk, fn, chunk, False)
                except BrokenProcessPool:
                    self._restart()
                    fut = self._pool.submit(_run_chunk, fn, chunk, False)
                self._inflight[fut] = chunk
            if not self._inflight:
                return
            done, _ = wait(list(self._inflight), timeout=0.5, return_when=FIRST_COMPLETED)
            if not done:
                if tick is not None:
                    tick()
                continue
            broken = False
            for fut in done:
                if isinstance(fut.exception(), BrokenProcessPool):
                    broken = True
                    continue
                yield from self._pairs(self._inflight.pop(fut), fut)
            if broken:
                finished, retry = self._collect_broken()
                yield from finished
                yield from self._isolate(fn, retry)

    def _signal_workers(self, sig):
        procs = getattr(self._pool, "_processes", None) or {}
        for pid in list(procs):
            try:
                os.kill(pid, sig)
            except OSError:
                pass

    def drain(self):
        """After an interrupt: cancel queued tasks, stop running ones, yield what comes back."""
        from concurrent.futures import FIRST_COMPLETED, wait

        for fut in list(self._inflight):
            if fut.cancel():
                del self._inflight[fut]
        self._signal_workers(signal.SIGINT)
        deadline = time.monotonic() + self.drain_timeout_s
        while self._inflight:
            left = deadline - time.monotonic()
            if left <= 0:
                self._signal_workers(signal.SIGTERM)
                wait(list(self._inflight), timeout=5.0)
                for fut, chunk in list(self._inflight.items()):
                    if fut.done():
                        yield from self._pairs(chunk, fut)
                self._inflight = {}
                break
            done, _ = wait(list(self._inflight), timeout=left, return_when=FIRST_COMPLETED)
            for fut in done:
                yield from self._pairs(self._inflight.pop(fut), fut)

    def close(self):
        """Stop the workers (waits for them)."""
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None


# --------------------------------------------------------------------------- reporting

class BatchReporter:
    """Receives a batch's progress; does nothing. The CLI subclasses it.

    :func:`run_batch` never prints: everything the user sees goes through
    these methods.
    """

    def started(self, info):
        """The run begins. ``info``: files, audio_files, bytes, jobs, executor, run_seed,
        seed_origin, settings_id, src, dst, and ``threads_ok``: False when the
        executor forks worker processes, so the reporter must not start threads
        (refresh in :meth:`file_done` and :meth:`tick` instead)."""

    def tick(self):
        """Called about twice a second while waiting for workers (refresh a display)."""

    def message(self, kind, text):
        """A note ('note') or warning ('warning') not tied to one file."""

    def file_done(self, event, progress):
        """One file event recorded. ``progress``: files_done, files_total, bytes_done,
        bytes_total, audio_s_done."""

    def finished(self, summary):
        """The run ended (also after an interrupt); ``summary`` as written to disk."""


# --------------------------------------------------------------------------- planning

def _check_folders(src, dst):
    src = os.path.abspath(os.fspath(src))
    dst = os.path.abspath(os.fspath(dst))
    if not os.path.exists(src):
        raise InputError(f"the source folder {src!r} does not exist; check the path")
    if not os.path.isdir(src):
        raise UsageError(f"{src!r} is a file, not a folder; use 'requant convert' for one file")
    if os.path.exists(dst) and not os.path.isdir(dst):
        raise UsageError(f"the destination {dst!r} is a file; give a folder")
    rs, rd = os.path.realpath(src), os.path.realpath(dst)
    if rs == rd:
        raise UsageError(f"the destination {dst!r} is the source folder; give a separate "
                         "destination folder")
    if rs.startswith(rd.rstrip(os.sep) + os.sep):
        raise UsageError(f"the source {src!r} lies inside the destination {dst!r}; the outputs "
                         "would land among the sources; choose another destination")
    prune = [dst] if rd.startswith(rs.rstrip(os.sep) + os.sep) else []
    if prune and rd != dst:
        prune.append(rd)
    return src, dst, prune


def _latest_by_source(events):
    latest, converted, outputs = {}, {}, set()
    for ev in events:
        latest[ev["source"]] = ev
        if ev.get("status") == "converted":
            converted[ev["source"]] = ev
        if isinstance(ev.get("output"), str):
            outputs.add(ev["output"])
    return latest, converted, outputs


def _read_state(dst):
    try:
        with open(os.path.join(dst, STATE_NAME), "rb") as fh:
            state = json.loads(fh.read())
        if isinstance(state, dict):
            return state
    except (OSError, ValueError):
        pass
    return {}


def _is_stale_temp(name):
    return name.startswith(".") and (name.endswith(".requant-part")
                                     or (".requant-part." in name and name.endswith(".part")))


def _remove_stale_temps(dst):
    removed = []
    for root, dirs, files in os.walk(dst, followlinks=False):
        for name in files:
            if _is_stale_temp(name):
                try:
                    os.unlink(os.path.join(root, name))
                    removed.append(os.path.relpath(os.path.join(root, name), dst))
                except OSError:
                    pass
    return removed


def _plan(src, dst, settings, *, prune, run_seed, sid, overwrite, events):
    """Decide, per file, what to do. Returns (tasks, parent_events, info)."""
    entries, excluded = walk_tree(src, include=settings["include"], exclude=settings["exclude"],
                                  prune=prune)
    _, converted, seen_outputs = _latest_by_source(events)
    claims = set(_read_state(dst).get("claimed_outputs") or ())
    ours = seen_outputs | claims
    task_settings = {k: settings[k] for k in DEFAULT_SETTINGS if k != "format"}

    audio = [e for e in entries if e["kind"] == "audio"]
    outs = {}
    for e in audio:
        e["output"], e["note"] = output_name(e["source"], settings["format"])
        outs.setdefault(e["output"], []).append(e["source"])
    tasks, parent_events = [], []
    for e in entries:
        if e["kind"] == "other":
            parent_events.append({"source": e["source"], "output": None, "status": "skipped",
                                  "reason": e["reason"]})
            continue
        if e["kind"] == "unreadable-folder":
            parent_events.append({"source": e["source"], "output": None, "status": "failed",
                                  "error": e["reason"]})
            continue
        rel_out = e["output"]
        others = [s for s in outs[rel_out] if s != e["source"]]
        out_path = os.path.join(dst, *rel_out.split("/"))
        src_path = os.path.join(src, *e["source"].split("/"))
        seed = derive_seed(run_seed, e["source"])
        if others:
            parent_events.append({
                "source": e["source"], "output": rel_out, "status": "failed", "seed": seed,
                "error": f"{src_path!r} and {others[0]!r} would both be written to {rel_out!r}; "
                         "rename one of them, or choose --format same"})
            continue
        prev = converted.get(e["source"])
        expect, reason = None, "new"
        if prev is not None:
            if prev.get("settings_id") != sid:
                reason = "settings changed"
            elif prev.get("output") != rel_out:
                reason = "output name changed"
            else:
                expect, reason = prev.get("output_sha256"), "output missing"
        exists = os.path.lexists(out_path)
        mine = overwrite or rel_out in ours
        if exists and not mine:
            parent_events.append({
                "source": e["source"], "output": rel_out, "status": "failed", "seed": seed,
                "error": f"{out_path!r} already exists and was not written by requant batch; "
                         "move it away or pass --overwrite to replace it"})
            continue
        # Every task may replace its output: the output is claimed for this run (STATE_NAME)
        # before any work starts, and a task run again after its worker died (a local pool's
        # retry, a cluster's rescheduling) finds what the lost worker renamed into place.
        tasks.append({"source": e["source"], "output": rel_out, "source_path": src_path,
                      "output_path": out_path, "seed": seed, "settings": task_settings,
                      "overwrite": True, "expect_sha256": expect,
                      "reason": reason, "note": e["note"], "size": e["size"],
                      "previous": prev if expect else None})
    info = {"entries": len(entries), "excluded": excluded, "claims": claims}
    return tasks, parent_events, info


# --------------------------------------------------------------------------- running

def _choose_run_seed(settings, dst):
    from requant.dsp.quantizer import new_seed

    if settings["seed"] is not None:
        return int(settings["seed"]), "given"
    prev = _read_state(dst).get("run_seed")
    if isinstance(prev, int) and not isinstance(prev, bool) and 0 <= prev <= _SEED_MAX:
        return prev, "previous run"
    return new_seed(), "fresh"


def _lock(dst):
    import fcntl

    path = os.path.join(dst, LOCK_NAME)
    try:
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    except OSError as exc:
        raise OutputError(f"cannot write in the destination {dst!r} ({exc.strerror or exc}); "
                          "choose a writable folder") from None
    deadline = time.monotonic() + 3.0  # workers of a killed run may still be cleaning up
    while True:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            return fd
        except OSError:
            if time.monotonic() > deadline:
                os.close(fd)
                raise UsageError(f"another requant batch is writing to {dst!r}; wait for it to "
                                 "finish or choose another destination") from None
            time.sleep(0.05)


def _dry_run(src, dst, settings, *, prune, overwrite, reporter):
    events = read_manifest(os.path.join(dst, MANIFEST_NAME))[0] if os.path.isdir(dst) else []
    run_seed, origin = _choose_run_seed(settings, dst)
    if origin == "fresh":  # the real run draws its own
        run_seed = None
    sid = settings_id(settings, run_seed if run_seed is not None else 0)
    tasks, parent_events, info = _plan(src, dst, settings, prune=prune, run_seed=run_seed or 0,
                                       sid=sid, overwrite=overwrite, events=events)
    from requant.convert import open_input

    items = []
    for ev in parent_events:
        items.append({"source": ev["source"], "output": ev.get("output"),
                      "action": "fail" if ev["status"] == "failed" else "skip",
                      "reason": ev.get("error") or ev.get("reason")})
    for t in tasks:
        action, reason = "convert", t["reason"]
        if t["expect_sha256"] and os.path.isfile(t["output_path"]):
            if sha256_file(t["output_path"]) == t["expect_sha256"]:
                action, reason = "skip", "up to date"
            else:
                reason = "output changed since it was written"
        if action == "convert":
            try:
                open_input(t["source_path"]).close()
            except RequantError as exc:
                action, reason = "fail", str(exc)
        if action == "convert" and t["note"]:
            reason = f"{reason}; {t['note']}"
        items.append({"source": t["source"], "output": t["output"], "action": action,
                      "reason": reason})
    items.sort(key=lambda d: d["source"])
    counts = {k: sum(1 for i in items if i["action"] == k) for k in ("convert", "skip", "fail")}
    result = {"dry_run": True, "src": src, "dst": dst, "items": items, "counts": counts,
              "excluded": info["excluded"], "run_seed": run_seed, "seed_origin": origin,
              "settings": _public_settings(settings), "settings_id": sid if run_seed else None}
    reporter.finished(result)
    return result


def _public_settings(settings):
    return {k: settings[k] for k in list(DEFAULT_SETTINGS) + ["include", "exclude", "seed"]}


def run_batch(src, dst, settings=None, *, jobs=None, overwrite=False, dry_run=False,
              reporter=None, executor=None, profile_path=None):
    """Convert a folder tree of audio files into a mirrored tree.

    Parameters
    ----------
    src, dst : path
        Source and destination folders. ``dst`` is created if needed (not in
        a dry run). It may lie inside ``src`` (it is not walked).
    settings : dict, optional
        From :func:`resolve_settings` (default: library defaults).
    jobs : int, optional
        Worker processes (default: every core); 1 converts in this process.
        Ignored when ``executor`` is given.
    overwrite : bool, default False
        Replace outputs that exist but were not written by requant batch.
    dry_run : bool, default False
        Only say what would be done; nothing is created or written.
    reporter : BatchReporter, optional
        Receives progress (the only way anything reaches the user).
    executor : object, optional
        An executor with the protocol of :class:`SerialExecutor`.
    profile_path : str, optional
        Recorded in the summary.

    Returns
    -------
    dict
        The summary (also written to ``dst/requant-summary.json``), with
        ``interrupted`` True after Ctrl-C; for a dry run, the plan
        (``items`` with ``action`` convert/skip/fail and ``reason``).

    Raises
    ------
    UsageError, InputError, OutputError
        For problems with the folders or settings (nothing is converted).
        Problems with single files never raise: they are recorded.
    """
    reporter = reporter or BatchReporter()
    settings = validate_settings(settings or resolve_settings())
    src, dst, prune = _check_folders(src, dst)
    if dry_run:
        return _dry_run(src, dst, settings, prune=prune, overwrite=overwrite, reporter=reporter)
    t_start = time.perf_counter()
    started = _now()
    try:
        os.makedirs(dst, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the destination {dst!r} ({exc.strerror or exc}); check "
                          "the path and permissions") from None
    lock_fd = _lock(dst)
    try:
        return _run_locked(src, dst, settings, prune=prune, jobs=jobs, overwrite=overwrite,
                           reporter=reporter, executor=executor, profile_path=profile_path,
                           t_start=t_start, started=started)
    finally:
        os.close(lock_fd)


def _run_locked(src, dst, settings, *, prune, jobs, overwrite, reporter, executor, profile_path,
                t_start, started):
    from requant.convert import write_json_atomic

    stale = _remove_stale_temps(dst)
    manifest_path = os.path.join(dst, MANIFEST_NAME)
    events, bad_lines = read_manifest(manifest_path)
    run_seed, seed_origin = _choose_run_seed(settings, dst)
    sid = settings_id(settings, run_seed)
    tasks, parent_events, info = _plan(src, dst, settings, prune=prune, run_seed=run_seed,
                                       sid=sid, overwrite=overwrite, events=events)
    del events
    claims = info["claims"] | {t["output"] for t in tasks}
    try:
        write_json_atomic({"format": "requant-batch-state", "version": 1,
                           "requant_version": __version__, "run_seed": run_seed,
                           "updated": _now(), "claimed_outputs": sorted(claims)},
                          os.path.join(dst, STATE_NAME))
    except OSError as exc:
        raise OutputError(f"cannot write in the destination {dst!r} ({exc.strerror or exc}); "
                          "free some space or choose a writable folder") from None
    # biggest first: long files start early and do not trail at the end
    tasks.sort(key=lambda t: (-t["size"], t["source"]))
    notes = []
    if stale:
        notes.append(f"removed {len(stale)} temporary file(s) left by an interrupted run")
    if bad_lines:
        notes.append(f"the manifest had {bad_lines} unreadable line(s) (a run was cut off); they "
                     "were ignored")

    run_id = f"{started}-{os.getpid()}"
    n_workers = min(jobs or default_jobs(), max(1, len(tasks)))
    own_executor = executor is None
    if executor is None:
        executor = SerialExecutor() if n_workers <= 1 else ProcessExecutor(n_workers)
    if tasks:
        executor.start()  # before the reporter may start a progress thread (fork safety)

    totals = {"files_done": 0, "files_total": len(tasks) + len(parent_events), "bytes_done": 0,
              "bytes_total": sum(t["size"] for t in tasks), "audio_s_done": 0.0}
    reporter.started({"src": src, "dst": dst, "files": totals["files_total"],
                      "audio_files": len(tasks), "bytes": totals["bytes_total"],
                      "jobs": executor.workers if tasks else 0,
                      "executor": executor.description if tasks else "none",
                      "threads_ok": not (tasks and getattr(executor, "forks", False)),
                      "run_seed": run_seed, "seed_origin": seed_origin, "settings_id": sid})
    for n in notes:
        reporter.message("note", n)

    from requant.batch_index import IndexBuilder

    manifest = ManifestWriter(manifest_path)
    index = IndexBuilder()
    recorded = []
    parent_label = _worker_label()

    def record(ev, size=0):
        ev.setdefault("error", None)
        ev["settings_id"] = sid
        ev["run_id"] = run_id
        ev["timestamp"] = _now()
        ev.setdefault("worker", parent_label)
        manifest.append(ev)
        recorded.append(ev)
        index.add(ev)
        totals["files_done"] += 1
        totals["bytes_done"] += size
        if ev["status"] in ("converted", "skipped") and ev.get("duration_s"):
            totals["audio_s_done"] += ev["duration_s"]
        reporter.file_done(ev, dict(totals))

    def from_result(task, res):
        if isinstance(res, BaseException):
            ev = {"source": task["source"], "output": task["output"], "seed": task["seed"],
                  "status": "failed",
                  "error": (str(res) if isinstance(res, (WorkerLost, RequantError)) else
                            f"{task['source_path']!r} failed in its worker with "
                            f"{type(res).__name__} ({res}); the batch went on")}
        else:
            ev = dict(res)
        if ev.get("status") == "skipped" and task.get("previous"):
            prev = task["previous"]
            for key in ("snr_db", "duration_s", "warnings", "warning_kinds", "metadata",
                        "figures"):
                if key in prev:
                    ev.setdefault(key, prev[key])
            ev["converted_at"] = prev.get("timestamp")
        return ev

    by_source = {t["source"]: t for t in tasks}
    interrupted = False
    old_sigint = None
    try:
        try:
            for ev in parent_events:
                record(ev)
            for item, res in executor.imap_unordered(convert_task, _strip(tasks),
                                                     tick=getattr(reporter, "tick", None)):
                task = by_source[item["source"]]
                ev = from_result(task, res)
                if ev.get("status") == "interrupted":
                    raise KeyboardInterrupt
                record(ev, task["size"])
                # the workers are busy now: load the index templates while they convert
                index.prepare()
        except KeyboardInterrupt:
            interrupted = True
            if threading.current_thread() is threading.main_thread():
                old_sigint = signal.signal(signal.SIGINT, signal.SIG_IGN)
            for item, res in executor.drain():
                task = by_source[item["source"]]
                ev = from_result(task, res)
                if ev.get("status") in ("converted", "failed", "skipped"):
                    record(ev, task["size"])
        finally:
            manifest.close()
            if own_executor and tasks:
                executor.close()
        summary = _summary(src, dst, settings, recorded, tasks=tasks, info=info,
                           started=started, wall_s=time.perf_counter() - t_start,
                           run_seed=run_seed, seed_origin=seed_origin, sid=sid,
                           interrupted=interrupted, executor=executor if tasks else None,
                           notes=notes, profile_path=profile_path, run_id=run_id)
        try:
            write_json_atomic(summary, os.path.join(dst, SUMMARY_NAME))
            index.write(os.path.join(dst, INDEX_NAME), summary)
        except OSError as exc:
            raise OutputError(f"cannot write the summary in {dst!r} ({exc.strerror or exc}); the "
                              "manifest holds every file's result; free some space and run "
                              "again") from None
    finally:
        if old_sigint is not None:
            signal.signal(signal.SIGINT, old_sigint)
    reporter.finished(summary)
    return summary


_TASK_KEYS = ("source", "output", "source_path", "output_path", "seed", "settings", "overwrite",
              "expect_sha256", "reason", "note", "size")


def _strip(tasks):
    """Only the plain data a worker needs (no previous event)."""
    for t in tasks:
        yield {k: t[k] for k in _TASK_KEYS}


def _summary(src, dst, settings, recorded, *, tasks, info, started, wall_s, run_seed,
             seed_origin, sid, interrupted, executor, notes, profile_path, run_id):
    counts = {"converted": 0, "skipped": 0, "failed": 0}
    for ev in recorded:
        counts[ev["status"]] = counts.get(ev["status"], 0) + 1
    up_to_date = sum(1 for ev in recorded if ev.get("reason") == "up to date")
    converted_s = sum(ev.get("duration_s") or 0.0 for ev in recorded
                      if ev["status"] == "converted")
    skipped_s = sum(ev.get("duration_s") or 0.0 for ev in recorded
                    if ev.get("reason") == "up to date")
    seen = {ev["source"] for ev in recorded}
    not_started = sum(1 for t in tasks if t["source"] not in seen)
    recorded = sorted(recorded, key=lambda ev: ev["source"])
    warnings = [{"source": ev["source"], "output": ev.get("output"),
                 "kinds": ev.get("warning_kinds") or [], "warnings": ev.get("warnings") or [],
                 "earlier_run": ev["status"] == "skipped"}
                for ev in recorded if ev.get("warnings")]
    failures = [{"source": ev["source"], "output": ev.get("output"), "error": ev["error"]}
                for ev in recorded if ev["status"] == "failed"]
    not_audio = [{"source": ev["source"], "reason": ev.get("reason")}
                 for ev in recorded if ev["status"] == "skipped" and ev.get("output") is None]
    format_notes = sum(1 for ev in recorded if ev["status"] == "converted"
                       and any(n.startswith("written as WAV") for n in ev.get("notes") or ()))
    all_notes = list(notes)
    if format_notes:
        all_notes.append(f"{format_notes} source(s) in formats requant does not write were "
                         "written as WAV")
    finished = sum(1 for ev in recorded if ev["status"] in ("converted", "failed")
                   or ev.get("reason") == "up to date")
    return {
        "requant_version": __version__,
        "run_id": run_id,
        "src": src,
        "dst": dst,
        "started": started,
        "finished": _now(),
        "interrupted": interrupted,
        "wall_s": wall_s,
        "jobs": executor.workers if executor is not None else 0,
        "executor": executor.description if executor is not None else "none",
        "profile": profile_path,
        "settings": _public_settings(settings),
        "settings_id": sid,
        "run_seed": run_seed,
        "seed_origin": seed_origin,
        "counts": {**counts, "up_to_date": up_to_date, "not_audio": len(not_audio),
                   "excluded": info["excluded"], "not_started": not_started},
        "audio_duration_s": converted_s + skipped_s,
        "converted_duration_s": converted_s,
        "throughput": {
            "files_per_s": finished / wall_s if wall_s > 0 else None,
            "converted_per_s": counts["converted"] / wall_s if wall_s > 0 else None,
            "audio_s_per_s": converted_s / wall_s if wall_s > 0 else None,
        },
        "warnings": warnings,
        "failures": failures,
        "not_audio": not_audio,
        "notes": all_notes,
        "manifest": MANIFEST_NAME,
        "index": INDEX_NAME,
    }
