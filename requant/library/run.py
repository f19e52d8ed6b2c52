"""Run a library batch: plan, convert on an executor, record, summarize.

:func:`run_batch` is the one entry point; see :mod:`requant.library` for the pieces.
"""

from __future__ import annotations

import os
import signal
import threading
import time

from requant import __version__
from requant.audio_io.writers import write_json_atomic
from requant.errors import OutputError, RequantError
from requant.library.executors.base import BatchReporter, Executor, Reporter, WorkerLost
from requant.library.executors.local import ProcessExecutor, SerialExecutor, default_jobs
from requant.library.index import IndexBuilder
from requant.library.manifest import MANIFEST_NAME, ManifestWriter, read_manifest
from requant.library.plan import (
    STATE_NAME,
    choose_run_seed,
    plan_dry_run,
    plan_tasks,
    remove_stale_temps,
    take_lock,
)
from requant.library.settings import BatchSettings, settings_id
from requant.library.summary import INDEX_NAME, SUMMARY_NAME, RunRecord, summarize
from requant.library.task import convert_task, now_iso, task_payloads, worker_label
from requant.library.tree import check_folders

__all__ = ["run_batch"]


def run_batch(src: str | os.PathLike, dst: str | os.PathLike,
              settings: BatchSettings | None = None, *, jobs: int | None = None,
              overwrite: bool = False, dry_run: bool = False, reporter: Reporter | None = None,
              executor: Executor | None = None, profile_path: str | None = None,
              verify_sources: bool = False) -> dict:
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
    verify_sources : bool, default False
        Hash every source that was converted before, not only those whose
        size or modification time changed, before deciding it is up to date.

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
        return plan_dry_run(src, dst, settings, prune=prune, overwrite=overwrite,
                            reporter=reporter, verify=verify_sources)
    t_start = time.perf_counter()
    started = now_iso()
    try:
        os.makedirs(dst, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the destination {dst!r} ({exc.strerror or exc}); check "
                          "the path and permissions") from None
    lock_fd = take_lock(dst)
    try:
        run = _Run(src, dst, settings, prune=prune, reporter=reporter, started=started)
        run.plan(overwrite=overwrite, verify=verify_sources)
        run.start(executor, jobs)
        try:
            try:
                run.convert()
            finally:
                run.stop()
            return run.finish(wall_s=time.perf_counter() - t_start, profile_path=profile_path)
        finally:
            run.restore_signals()
    finally:
        os.close(lock_fd)


class _Run:
    """One batch run, in the steps :func:`run_batch` takes: plan, start, convert, stop, finish.

    It holds what the steps share: the plan, the executor, the manifest and index being
    written, the events recorded and the progress totals.
    """

    def __init__(self, src, dst, settings, *, prune, reporter, started):
        self.src, self.dst, self.settings, self.prune = src, dst, settings, prune
        self.reporter, self.started = reporter, started
        self.run_id = f"{started}-{os.getpid()}"
        self.recorded = []
        self.notes = []
        self.interrupted = False
        self.executor = None
        self.own_executor = False
        self._old_sigint = None

    # ------------------------------------------------------------------ plan

    def plan(self, *, overwrite, verify=False):
        """Decide what each file needs, claim the outputs this run may write."""
        stale = remove_stale_temps(self.dst)
        self.manifest_path = os.path.join(self.dst, MANIFEST_NAME)
        events, bad_lines = read_manifest(self.manifest_path)
        self.run_seed, self.seed_origin = choose_run_seed(self.settings, self.dst)
        self.sid = settings_id(self.settings, self.run_seed)
        self.tasks, self.parent_events, self.info = plan_tasks(
            self.src, self.dst, self.settings, prune=self.prune, run_seed=self.run_seed,
            sid=self.sid, overwrite=overwrite, events=events, verify=verify)
        del events
        self._claim(self.info["claims"] | {t["output"] for t in self.tasks})
        # biggest first: long files start early and do not trail at the end
        self.tasks.sort(key=lambda t: (-t["size"], t["source"]))
        self.by_source = {t["source"]: t for t in self.tasks}
        if stale:
            self.notes.append(f"removed {len(stale)} temporary file(s) left by an interrupted run")
        if bad_lines:
            self.notes.append(bad_lines.sentence(self.manifest_path))
        self.notes.extend(self.info["notes"])

    def _claim(self, claims):
        try:
            write_json_atomic({"format": "requant-batch-state", "version": 1,
                               "requant_version": __version__, "run_seed": self.run_seed,
                               "updated": now_iso(), "claimed_outputs": sorted(claims)},
                              os.path.join(self.dst, STATE_NAME))
        except OSError as exc:
            raise OutputError(f"cannot write in the destination {self.dst!r} "
                              f"({exc.strerror or exc}); free some space or choose a writable "
                              "folder") from None

    # ------------------------------------------------------------------ start

    def start(self, executor, jobs):
        """Start the executor (before any thread of ours: fork safety), then the reporter."""
        tasks = self.tasks
        n_workers = min(jobs or default_jobs(), max(1, len(tasks)))
        self.own_executor = executor is None
        if executor is None:
            executor = SerialExecutor() if n_workers <= 1 else ProcessExecutor(n_workers)
        self.executor = executor
        if tasks:
            executor.start()
        self.totals = {"files_done": 0, "files_total": len(tasks) + len(self.parent_events),
                       "bytes_done": 0, "bytes_total": sum(t["size"] for t in tasks),
                       "audio_s_done": 0.0}
        self.reporter.started({
            "src": self.src, "dst": self.dst, "files": self.totals["files_total"],
            "audio_files": len(tasks), "bytes": self.totals["bytes_total"],
            "jobs": executor.workers if tasks else 0,
            "executor": executor.description if tasks else "none",
            "threads_ok": not (tasks and getattr(executor, "forks", False)),
            "run_seed": self.run_seed, "seed_origin": self.seed_origin, "settings_id": self.sid})
        for n in self.notes:
            self.reporter.message("note", n)
        self.manifest = ManifestWriter(self.manifest_path)
        self.index = IndexBuilder()
        self.parent_label = worker_label()

    # ------------------------------------------------------------------ convert

    def record(self, ev, size=0):
        """Append one event to the manifest and the index, and report it."""
        ev.setdefault("error", None)
        ev["settings_id"] = self.sid
        ev["run_id"] = self.run_id
        ev["timestamp"] = now_iso()
        ev.setdefault("worker", self.parent_label)
        self.manifest.append(ev)
        self.recorded.append(ev)
        self.index.add(ev)
        t = self.totals
        t["files_done"] += 1
        t["bytes_done"] += size
        if ev["status"] in ("converted", "skipped") and ev.get("duration_s"):
            t["audio_s_done"] += ev["duration_s"]
        self.reporter.file_done(ev, dict(t))

    @staticmethod
    def event_from(task, res):
        """The manifest event of a task's result (a dict, or the exception it ended in)."""
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

    def convert(self):
        """Record the planned outcomes, then every file's as it finishes; after Ctrl-C,
        record what the executor gives back while it drains."""
        try:
            for ev in self.parent_events:
                self.record(ev)
            for item, res in self.executor.imap_unordered(
                    convert_task, task_payloads(self.tasks),
                    tick=getattr(self.reporter, "tick", None)):
                task = self.by_source[item["source"]]
                ev = self.event_from(task, res)
                if ev.get("status") == "interrupted":
                    raise KeyboardInterrupt
                self.record(ev, task["size"])
                # the workers are busy now: load the index templates while they convert
                self.index.prepare()
        except KeyboardInterrupt:
            self.interrupted = True
            if threading.current_thread() is threading.main_thread():
                # further Ctrl-C are ignored until the summary is written (restore_signals)
                self._old_sigint = signal.signal(signal.SIGINT, signal.SIG_IGN)
            for item, res in self.executor.drain():
                task = self.by_source[item["source"]]
                ev = self.event_from(task, res)
                if ev.get("status") in ("converted", "failed", "skipped"):
                    self.record(ev, task["size"])

    def stop(self):
        """Close the manifest and the executor this run started."""
        self.manifest.close()
        if self.own_executor and self.tasks:
            self.executor.close()

    # ------------------------------------------------------------------ finish

    def finish(self, *, wall_s, profile_path):
        """Write the summary and the index; give the summary to the reporter."""
        summary = summarize(RunRecord(
            src=self.src, dst=self.dst, settings=self.settings, recorded=self.recorded,
            tasks=self.tasks, excluded=self.info["excluded"], started=self.started,
            wall_s=wall_s, run_seed=self.run_seed, seed_origin=self.seed_origin,
            sid=self.sid, interrupted=self.interrupted,
            executor=self.executor if self.tasks else None, notes=self.notes,
            profile_path=profile_path, run_id=self.run_id))
        try:
            write_json_atomic(summary, os.path.join(self.dst, SUMMARY_NAME))
            self.index.write(os.path.join(self.dst, INDEX_NAME), summary)
        except OSError as exc:
            raise OutputError(f"cannot write the summary in {self.dst!r} "
                              f"({exc.strerror or exc}); the manifest holds every file's "
                              "result; free some space and run again") from None
        self.reporter.finished(summary)
        return summary

    def restore_signals(self):
        """Give Ctrl-C back its handler (it is ignored while an interrupted run drains)."""
        if self._old_sigint is not None:
            signal.signal(signal.SIGINT, self._old_sigint)
            self._old_sigint = None
