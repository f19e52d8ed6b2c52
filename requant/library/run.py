"""Run a library batch: plan, convert on an executor, record, summarize.

:func:`run_batch` is the one entry point; see :mod:`requant.library` for the pieces.
"""

from __future__ import annotations

import datetime as _dt
import os
import signal
import threading
import time

from requant.audio_io.writers import write_json_atomic
from requant.errors import OutputError, RequantError
from requant.library.executors.base import BatchReporter, Executor, Reporter, WorkerLost
from requant.library.executors.local import ProcessExecutor, SerialExecutor, default_jobs
from requant.library.index import write_index
from requant.library.manifest import (
    MANIFEST_NAME,
    RUN_STATUS,
    DetailsWriter,
    ManifestWriter,
    read_row,
)
from requant.library.plan import plan_dry_run, plan_run, write_claims
from requant.library.resume import CLASSES, row_class
from requant.library.settings import BatchSettings, settings_id
from requant.library.spool import Refs
from requant.library.state import choose_run_seed, read_state, remove_stale_temps, take_lock
from requant.library.summary import SUMMARY_NAME, RunRecord, Tally, summarize
from requant.library.task import convert_task, now_iso, worker_label
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
    run = _Run(src, dst, settings, prune=prune, reporter=reporter, started=started)
    try:
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
        run.close()
        os.close(lock_fd)


def _run_id(pid):
    """A run's id: its start time (UTC, to the millisecond) and the process id."""
    now = _dt.datetime.now(_dt.UTC)
    return f"{now:%Y%m%dT%H%M%S}.{now.microsecond // 1000:03d}Z-{pid}"


def _rounded(ev):
    """Figures cut to what they mean (keeps a manifest row short)."""
    for key, digits in (("snr_db", 4), ("duration_s", 6), ("seconds", 4)):
        v = ev.get(key)
        if isinstance(v, float) and v == v and abs(v) != float("inf"):
            ev[key] = round(v, digits)
    return ev


def _unchanged(item, ev):
    """True when a worker found a file up to date and nothing about it changed: the
    source's identity and the output's size, time and hash are the recorded ones."""
    expect = item.get("expect_source") or {}
    ident = ev.get("source_identity") or {}
    return (all(ident.get(k) == expect.get(k) for k in ("size", "mtime_ns", "sha256"))
            and ev.get("output_sha256") == item.get("expect_sha256")
            and ev.get("output_stat") == item.get("expect_output_stat"))


class _Run:
    """One batch run, in the steps :func:`run_batch` takes: plan, start, convert, stop, finish.

    It holds what the steps share: the plan (its spools), the executor, the manifest
    and details being written, where each task's row went, and the tally.
    """

    def __init__(self, src, dst, settings, *, prune, reporter, started):
        self.src, self.dst, self.settings, self.prune = src, dst, settings, prune
        self.reporter, self.started = reporter, started
        self.run_id = _run_id(os.getpid())
        self.tally = Tally()
        self.notes = []
        self.interrupted = False
        self.executor = None
        self.own_executor = False
        self._old_sigint = None
        self.plan_ = None
        self.manifest = None
        self.details = None
        self._rows_fd = None
        self.done = 0

    # ------------------------------------------------------------------ plan

    def plan(self, *, overwrite, verify=False):
        """Decide what each file needs, claim the outputs this run may write."""
        t0 = time.perf_counter()
        stale = remove_stale_temps(self.dst)
        self.manifest_path = os.path.join(self.dst, MANIFEST_NAME)
        self.run_seed, self.seed_origin = choose_run_seed(self.settings, self.dst)
        self.sid = settings_id(self.settings, self.run_seed)
        plan = self.plan_ = plan_run(
            self.src, self.dst, self.settings, prune=self.prune, run_seed=self.run_seed,
            sid=self.sid, overwrite=overwrite, verify=verify, spool_dir=self.dst)
        self.task_refs, self.event_refs = Refs(len(plan.tasks)), Refs(len(plan.events))
        self.tally.up_to_date(plan.up_to_date, plan.up_to_date_s)
        self._open_rows()
        for source, offset in plan.earlier_warnings:
            ev = self._row(offset)
            if ev is not None and ev.get("source") == source:
                self.tally.earlier_warning(ev)
        if stale:
            self.notes.append(f"removed {len(stale)} temporary file(s) left by an interrupted run")
        if plan.damage:
            self.notes.append(plan.damage.sentence(self.manifest_path))
        self.notes.extend(plan.notes)
        if len(plan.tasks) or plan.state_stale or \
                read_state(self.dst).get("run_seed") != self.run_seed:
            self._claim()
        self.plan_s = time.perf_counter() - t0

    def _claim(self, keep=None):
        write_claims(self.dst, self.run_seed, self.plan_, keep)

    def _open_rows(self):
        try:
            self._rows_fd = os.open(self.manifest_path, os.O_RDONLY | os.O_CREAT, 0o644)
        except OSError as exc:
            raise OutputError(f"cannot write the manifest {self.manifest_path!r} "
                              f"({exc.strerror or exc}); free some space or fix the "
                              "permissions, then run again") from None

    def _row(self, offset):
        """The manifest row at ``offset`` (None when there is none)."""
        if offset is None or offset < 0:
            return None
        return read_row(self._rows_fd, offset)

    # ------------------------------------------------------------------ start

    def start(self, executor, jobs):
        """Start the executor (before any thread of ours: fork safety), then the reporter."""
        tasks, plan = self.plan_.tasks, self.plan_
        n_workers = min(jobs or default_jobs(), max(1, len(tasks)))
        self.own_executor = executor is None
        if executor is None:
            executor = SerialExecutor() if n_workers <= 1 else ProcessExecutor(n_workers)
        self.executor = executor
        if len(tasks):
            executor.start()
        self.totals = {"files_done": 0, "files_total": len(tasks) + len(plan.events),
                       "bytes_done": 0, "bytes_total": tasks.bytes_total, "audio_s_done": 0.0}
        self.reporter.started({
            "src": self.src, "dst": self.dst, "files": plan.walked,
            "audio_files": len(tasks), "up_to_date": plan.up_to_date,
            "bytes": self.totals["bytes_total"],
            "jobs": executor.workers if len(tasks) else 0,
            "executor": executor.description if len(tasks) else "none",
            "threads_ok": not (len(tasks) and getattr(executor, "forks", False)),
            "run_seed": self.run_seed, "seed_origin": self.seed_origin, "settings_id": self.sid})
        for n in self.notes:
            self.reporter.message("note", n)
        self.manifest = ManifestWriter(self.manifest_path)
        self.details = DetailsWriter(self.dst, self.run_id)
        self.parent_label = worker_label()

    # ------------------------------------------------------------------ convert

    def _write(self, ev):
        """Append one event to the manifest; returns its row's (offset, crc, class, SNR)."""
        ev.setdefault("error", None)
        ev["settings_id"] = self.sid
        ev["run_id"] = self.run_id
        ev["timestamp"] = now_iso()
        ev.setdefault("worker", self.parent_label)
        figures, metadata = ev.pop("figures", None), ev.pop("metadata", None)
        if ev["status"] == "converted" and (figures is not None or metadata is not None):
            self.details.append(ev["source"], figures, metadata)
        offset, crc = self.manifest.append(_rounded(ev))
        if figures is not None:
            ev["figures"] = figures
        if metadata is not None:
            ev["metadata"] = metadata
        return offset, crc, row_class(ev), ev.get("snr_db")

    def _done(self, ev, written, size=0):
        """Count an outcome and report it."""
        self.tally.add(ev, written=written)
        t = self.totals
        t["files_done"] += 1
        t["bytes_done"] += size
        if ev["status"] in ("converted", "skipped") and ev.get("duration_s"):
            t["audio_s_done"] += ev["duration_s"]
        self.reporter.file_done(ev, dict(t))

    def _event(self, m, ev, write, ref):
        """A parent event: written when it changes the manifest."""
        if write:
            ref = self._write(ev)
        self.event_refs.set(m, ref)
        self._done(ev, write)

    @staticmethod
    def event_from(task, res):
        """The manifest event of a task's result (a dict, or the exception it ended in)."""
        if isinstance(res, BaseException):
            return {"source": task["source"], "output": task["output"], "seed": task["seed"],
                    "status": "failed",
                    "error": (str(res) if isinstance(res, (WorkerLost, RequantError)) else
                              f"{task['source_path']!r} failed in its worker with "
                              f"{type(res).__name__} ({res}); the batch went on")}
        return dict(res)

    def _result(self, item, res, draining=False):
        """Record a task's result: written when it changes the manifest, else counted."""
        ev = self.event_from(item, res)
        status = ev.get("status")
        if status not in ("converted", "failed", "skipped"):
            if draining:
                return
            raise KeyboardInterrupt  # a worker was interrupted: the run stops
        prev = item.get("prev")
        write = True
        if status == "skipped" and prev is not None:
            unchanged = _unchanged(item, ev)
            good = self._row(prev[4]) if not unchanged or prev[2] == CLASSES["warn"] else None
            if unchanged:
                write = False
                if good is not None:  # its warnings, from an earlier run, for the summary
                    ev = dict(good, status="skipped", reason="up to date")
                else:
                    ev["duration_s"] = prev[5]
            elif good is not None:
                for key in ("snr_db", "duration_s", "warnings", "warning_kinds", "notes"):
                    if good.get(key):
                        ev.setdefault(key, good[key])
                ev["converted_at"] = good.get("converted_at") or good.get("timestamp")
        elif status == "failed" and prev is not None:
            last = self._row(prev[0])
            write = last is None or any(last.get(k) != ev.get(k)
                                        for k in ("status", "output", "error"))
        ref = self._write(ev) if write else prev[:4]
        self.task_refs.set(item["n"], ref)
        self.done += 1
        self._done(ev, write, item.get("size") or 0)

    def convert(self):
        """Record the planned outcomes, then every file's as it finishes; after Ctrl-C,
        record what the executor gives back while it drains."""
        plan = self.plan_
        try:
            for m, ev, write, ref in plan.events:
                self._event(m, ev, write, ref)
            if len(plan.tasks):
                for item, res in self.executor.imap_unordered(convert_task, plan.tasks,
                                                              tick=self._tick):
                    self._result(item, res)
        except KeyboardInterrupt:
            self.interrupted = True
            if threading.current_thread() is threading.main_thread():
                # further Ctrl-C are ignored until the summary is written (restore_signals)
                self._old_sigint = signal.signal(signal.SIGINT, signal.SIG_IGN)
            if len(plan.tasks):
                for item, res in self.executor.drain():
                    self._result(item, res, draining=True)

    def _tick(self):
        """While waiting for the workers: write the manifest lines that wait, refresh the
        progress."""
        self.manifest.flush()
        tick = getattr(self.reporter, "tick", None)
        if tick is not None:
            tick()

    def stop(self):
        """Close the executor this run started and the details file."""
        if self.details is not None:
            self.details.close()
        if self.own_executor and self.plan_ is not None and len(self.plan_.tasks):
            self.executor.close()

    # ------------------------------------------------------------------ finish

    def _resolve(self, kind, value):
        """The row of a task's or a parent event's entry, or its name while it has none."""
        from requant.library.spool import EVENT

        if kind == EVENT:
            ref = self.event_refs.get(value)
            return ref if ref is not None else self.plan_.events.get(value)[0]["source"]
        ref = self.task_refs.get(value)
        return ref if ref is not None else self.plan_.tasks.payload(value)["source"]

    def finish(self, *, wall_s, profile_path):
        """Write the run's row, the summary and the index; give the summary to the reporter."""
        plan = self.plan_
        summary = summarize(RunRecord(
            src=self.src, dst=self.dst, settings=self.settings, tally=self.tally,
            tasks=len(plan.tasks), done=self.done, excluded=plan.excluded, walked=plan.walked,
            plan_s=self.plan_s,
            started=self.started, wall_s=wall_s, run_seed=self.run_seed,
            seed_origin=self.seed_origin, sid=self.sid, interrupted=self.interrupted,
            executor=self.executor if len(plan.tasks) else None, notes=self.notes,
            profile_path=profile_path, run_id=self.run_id,
            details=self.details.name if self.details.written else None))
        self.manifest.append({"status": RUN_STATUS, "run_id": self.run_id,
                              "settings_id": self.sid, "run_seed": self.run_seed,
                              "timestamp": now_iso(), "interrupted": self.interrupted,
                              "counts": summary["counts"], "rows": summary["manifest_rows"],
                              "wall_s": round(wall_s, 3), "details": summary["details"]})
        self.manifest.close()
        try:
            summary["library"] = write_index(self.dst, summary, plan.entries, self._resolve,
                                             self._rows_fd)
            write_json_atomic(summary, os.path.join(self.dst, SUMMARY_NAME))
        except OSError as exc:
            raise OutputError(f"cannot write the summary in {self.dst!r} "
                              f"({exc.strerror or exc}); the manifest holds every file's "
                              "result; free some space and run again") from None
        if len(plan.tasks) or plan.state_stale:
            self._claim(keep=lambda n: not self.task_refs.done(n))
        self.reporter.finished(summary)
        return summary

    def restore_signals(self):
        """Give Ctrl-C back its handler (it is ignored while an interrupted run drains)."""
        if self._old_sigint is not None:
            signal.signal(signal.SIGINT, self._old_sigint)
            self._old_sigint = None

    def close(self):
        """Close the manifest and delete the plan's spools (safe to call twice)."""
        if self.manifest is not None:
            self.manifest.close()
        if self._rows_fd is not None:
            os.close(self._rows_fd)
            self._rows_fd = None
        if self.plan_ is not None:
            self.plan_.close()
            self.plan_ = None
