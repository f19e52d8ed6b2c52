"""Sound-library batch conversion: a mirrored tree, a manifest, resume, all cores.

``run_batch(src, dst, settings)`` (:mod:`.run`) converts every audio file under ``src`` into
the same relative place under ``dst``, each file with :func:`convert_file`
and its own seed, and keeps a record that makes a rerun do nothing twice.

Pieces (each replaceable on its own):

* **Settings.** :func:`resolve_settings` layers library defaults < profile
  (:mod:`.profiles`) < explicit options. :func:`settings_id` hashes the
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
workers never wait for the disk: :func:`run_chunk`); stale
``*.requant-part`` temporaries of a killed run are removed at the next
start; manifest lines are whole or ignored; a lost manifest line only costs
one reconversion. A lock
(``DST/.requant-batch.lock``, ``flock``) keeps two batches out of one
destination.

Modules: :mod:`.settings` (layers, settings id, seeds), :mod:`.profiles` (TOML),
:mod:`.tree` (the walk, output names), :mod:`.plan` (resume decisions, claims, the
lock, dry runs), :mod:`.task` (one file), :mod:`.executors` (where files are
converted: :mod:`.executors.base`, :mod:`.executors.local`,
:mod:`.executors.cluster`), :mod:`.manifest`, :mod:`.summary`, :mod:`.index` (the
HTML index) and :mod:`.run` (:func:`run_batch`, which puts them together).
"""

from requant._lazy import lazy_exports

_EXPORTS = {
    **dict.fromkeys(["BatchReporter", "Executor", "Reporter", "WorkerLost", "chunk_items"],
                    "requant.library.executors.base"),
    **dict.fromkeys(["ProcessExecutor", "SerialExecutor", "default_jobs"],
                    "requant.library.executors.local"),
    **dict.fromkeys(["MANIFEST_NAME", "ManifestWriter", "read_manifest", "sha256_file"],
                    "requant.library.manifest"),
    **dict.fromkeys(["LOCK_NAME", "STATE_NAME"], "requant.library.plan"),
    "run_batch": "requant.library.run",
    **dict.fromkeys(["DEFAULT_SETTINGS", "BatchSettings", "derive_seed", "resolve_settings",
                     "settings_id"], "requant.library.settings"),
    **dict.fromkeys(["INDEX_NAME", "SUMMARY_NAME"], "requant.library.summary"),
    "convert_task": "requant.library.task",
    **dict.fromkeys(["AUDIO_EXTENSIONS", "output_name", "walk_tree"], "requant.library.tree"),
}
__all__ = list(_EXPORTS)
__getattr__, __dir__ = lazy_exports(__name__, _EXPORTS)
