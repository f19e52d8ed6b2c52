"""Run a library batch: plan, convert on an executor, record, summarize.

:func:`run_batch` is the one entry point; see :mod:`requant.library` for the pieces.
"""

import os
import signal
import threading
import time

from requant import __version__
from requant.errors import OutputError, RequantError
from requant.library.executors.base import BatchReporter, WorkerLost
from requant.library.executors.local import ProcessExecutor, SerialExecutor, default_jobs
from requant.library.manifest import MANIFEST_NAME, ManifestWriter, read_manifest
from requant.library.plan import (STATE_NAME, choose_run_seed, plan_dry_run, plan_tasks,
                                  remove_stale_temps, take_lock)
from requant.library.settings import BatchSettings, settings_id
from requant.library.summary import INDEX_NAME, SUMMARY_NAME, summarize
from requant.library.task import convert_task, now_iso, task_payloads, worker_label
from requant.library.tree import check_folders

__all__ = ["run_batch"]


def run_batch(src, dst, settings=None, *, jobs=None, overwrite=False, dry_run=False,
              reporter=None, executor=None, profile_path=None):
    """Convert a folder tree of audio files into a mirrored tree.

    Parameters
    ----------
    src, dst : path
        Source and destination folders. ``dst`` is created if needed (not in
        a dry run). It may lie inside ``src`` (it is not walked).
    settings : BatchSettings, optional
        From :func:`~requant.library.settings.resolve_settings` (default: the
        library defaults).
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
    settings = settings if settings is not None else BatchSettings()
    if not isinstance(settings, BatchSettings):
        raise TypeError(f"settings must be a BatchSettings (see resolve_settings), not "
                        f"{type(settings).__name__}")
    src, dst, prune = check_folders(src, dst)
    if dry_run:
        return plan_dry_run(src, dst, settings, prune=prune, overwrite=overwrite, reporter=reporter)
    t_start = time.perf_counter()
    started = now_iso()
    try:
        os.makedirs(dst, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the destination {dst!r} ({exc.strerror or exc}); check "
                          "the path and permissions") from None
    lock_fd = take_lock(dst)
    try:
        return _run_locked(src, dst, settings, prune=prune, jobs=jobs, overwrite=overwrite,
                           reporter=reporter, executor=executor, profile_path=profile_path,
                           t_start=t_start, started=started)
    finally:
        os.close(lock_fd)


def _run_locked(src, dst, settings, *, prune, jobs, overwrite, reporter, executor, profile_path,
                t_start, started):
    from requant.audio_io.writers import write_json_atomic

    stale = remove_stale_temps(dst)
    manifest_path = os.path.join(dst, MANIFEST_NAME)
    events, bad_lines = read_manifest(manifest_path)
    run_seed, seed_origin = choose_run_seed(settings, dst)
    sid = settings_id(settings, run_seed)
    tasks, parent_events, info = plan_tasks(src, dst, settings, prune=prune, run_seed=run_seed,
                                       sid=sid, overwrite=overwrite, events=events)
    del events
    claims = info["claims"] | {t["output"] for t in tasks}
    try:
        write_json_atomic({"format": "requant-batch-state", "version": 1,
                           "requant_version": __version__, "run_seed": run_seed,
                           "updated": now_iso(), "claimed_outputs": sorted(claims)},
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

    from requant.library.index import IndexBuilder

    manifest = ManifestWriter(manifest_path)
    index = IndexBuilder()
    recorded = []
    parent_label = worker_label()

    def record(ev, size=0):
        ev.setdefault("error", None)
        ev["settings_id"] = sid
        ev["run_id"] = run_id
        ev["timestamp"] = now_iso()
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
            for item, res in executor.imap_unordered(convert_task, task_payloads(tasks),
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
        summary = summarize(src, dst, settings, recorded, tasks=tasks, info=info,
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


