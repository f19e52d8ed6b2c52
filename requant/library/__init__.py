"""Sound-library batch conversion: a mirrored tree, a manifest, resume, all cores.

``run_batch(src, dst, settings)`` (:mod:`.run`) converts every audio file under ``src`` into
the same relative place under ``dst``, each file with :func:`convert_file`
and its own seed, and keeps a record that makes a rerun do nothing twice.

Pieces (each replaceable on its own):

* **Settings.** :func:`resolve_settings` layers library defaults < profile
  (:mod:`.profiles`) < explicit options. :func:`settings_id` hashes the
  settings that affect the output bits, together with the run seed and the
  requant version.
* **Tree walk.** :func:`iter_folders` walks a folder at a time without
  following links: a symbolic link to a folder is listed and not entered (so
  link loops cannot hang the walk), a symbolic link to a file is read like a
  file. Hidden files (names starting with ``.``) are skipped and listed;
  hidden folders (``.git``, ...) are not entered. Order is sorted, so
  nothing depends on the file system's order (:func:`walk_tree`: the whole
  list, sorted by path).
* **Tasks.** :func:`convert_task` is a top-level function taking a plain
  dict and returning a plain dict; it never raises for a bad file (it
  returns ``status: failed`` with the one-line message the user sees). Any
  executor can run it: :class:`SerialExecutor` (in this process),
  :class:`ProcessExecutor` (local worker processes, started once and
  reused), or a cluster executor with the same four methods.
* **Manifest.** ``DST/requant-manifest.jsonl``, one compact JSON line per
  *change* (a file converted, failed, found up to date with a new identity,
  a non-audio entry first seen), and one per run with its counts, appended
  by this process only, whole lines per ``os.write`` on an ``O_APPEND``
  descriptor (:class:`ManifestWriter`). The reader (:func:`iter_manifest`,
  :func:`read_manifest`) skips lines that do not parse, so a torn last line
  from a crash is harmless. Each run's full figures go to
  ``DST/requant-runs/RUN_ID.jsonl`` (:func:`read_details`);
  :func:`compact_manifest` keeps the rows that count.
* **Resume.** A file is up to date when its latest good row (converted, or
  up to date) has the same ``settings_id`` and output name and its source
  and output still have the recorded size and time (else a worker hashes
  them: same bytes, still up to date). The plan streams: the tree a folder
  at a time, the manifest through a temporary sqlite3 index
  (:mod:`.resume`), decisions into spools on disk (:mod:`.spool`), so memory
  does not grow with the library. Before any work starts, the outputs this
  run may write are *claimed* in ``DST/requant-batch.json`` (written
  atomically, with the run seed). An output that exists but was neither
  claimed nor recorded is somebody else's file: it is refused unless
  ``overwrite``. So a run killed between writing an output and recording it
  leaves a claimed output that the next run simply converts again, to the
  same bytes.

Crash safety, in short: every output is written to a temporary file,
flushed to disk and renamed, a chunk of files at a time, before its result
is recorded (in the worker; for the local pool in this process, so that the
workers never wait for the disk: :func:`run_chunk`); stale
``*.requant-part`` temporaries of a killed run are removed at the next
start; manifest lines are whole or ignored; a lost manifest line only costs
one reconversion. A lock
(``DST/.requant-batch.lock``, ``flock``) keeps two batches out of one
destination.

Modules: :mod:`.settings` (layers, settings id, seeds), :mod:`.profiles` (TOML),
:mod:`.tree` (the walk, output names), :mod:`.state` (run seed, claims, the lock),
:mod:`.resume` (the resume index), :mod:`.spool` (what the plan hands on),
:mod:`.plan` (resume decisions, dry runs), :mod:`.task` (one file),
:mod:`.executors` (where files are converted: :mod:`.executors.base`,
:mod:`.executors.local`, :mod:`.executors.cluster`), :mod:`.manifest`,
:mod:`.compact`, :mod:`.summary`, :mod:`.index` (the HTML index pages) and
:mod:`.run` (:func:`run_batch`, which puts them together).
"""

from requant._lazy import lazy_exports

_EXPORTS = {
    **dict.fromkeys(["BatchReporter", "Executor", "Reporter", "WorkerLost", "chunk_items"],
                    "requant.library.executors.base"),
    **dict.fromkeys(["ProcessExecutor", "SerialExecutor", "default_jobs"],
                    "requant.library.executors.local"),
    **dict.fromkeys(["MANIFEST_NAME", "RUNS_DIR", "ManifestWriter", "read_manifest",
                     "iter_manifest", "read_details", "sha256_file"],
                    "requant.library.manifest"),
    **dict.fromkeys(["LOCK_NAME", "STATE_NAME"], "requant.library.state"),
    "compact_manifest": "requant.library.compact",
    "run_batch": "requant.library.run",
    **dict.fromkeys(["DEFAULT_SETTINGS", "BatchSettings", "derive_seed", "resolve_settings",
                     "settings_id"], "requant.library.settings"),
    **dict.fromkeys(["INDEX_NAME", "PAGES_DIR", "SUMMARY_NAME"], "requant.library.summary"),
    "convert_task": "requant.library.task",
    **dict.fromkeys(["AUDIO_EXTENSIONS", "output_name", "walk_tree", "iter_folders"],
                    "requant.library.tree"),
}
__all__ = list(_EXPORTS)
__getattr__, __dir__ = lazy_exports(__name__, _EXPORTS)
