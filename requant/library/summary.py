"""The end of a batch: the summary written to ``DST/requant-summary.json``.

A run counts what it does as it goes (:class:`Tally`): counts and durations, and the
lists of failures, warnings and non-audio entries, each kept to its first
:data:`LIST_CAP` entries (the summary says how many there were; the index pages list
them all), so a run's memory does not grow with the library.
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass

from requant import __version__
from requant.library.manifest import MANIFEST_NAME
from requant.library.task import now_iso

__all__ = ["SUMMARY_NAME", "INDEX_NAME", "PAGES_DIR", "LIST_CAP", "Tally", "RunRecord",
           "summarize"]


SUMMARY_NAME = "requant-summary.json"


INDEX_NAME = "requant-index.html"

#: The folder in DST that holds the index's detail pages.
PAGES_DIR = "requant-index"

#: Most entries the summary lists of failures, of files with warnings, of non-audio entries.
LIST_CAP = 1000

#: Files with the lowest SNR the summary names.
WORST = 10


class Tally:
    """What a run did, counted event by event.

    ``add`` takes every outcome of the run, whether it changed the manifest or
    not; :meth:`up_to_date` counts the files the plan found up to date by
    itself.
    """

    def __init__(self):
        self.counts = {"converted": 0, "skipped": 0, "failed": 0, "up_to_date": 0,
                       "not_audio": 0}
        self.totals = {"warnings": 0}
        self.converted_s = 0.0
        self.up_to_date_s = 0.0
        self.warnings, self.failures, self.not_audio = [], [], []
        self.format_notes = 0
        self.rows_written = 0
        self._worst = []  # (-snr, source) of this run's converted files: a max-heap of the lowest

    def up_to_date(self, files, seconds):
        """Files the plan found up to date (no row written)."""
        self.counts["up_to_date"] += files
        self.counts["skipped"] += files
        self.up_to_date_s += seconds

    def earlier_warning(self, ev):
        """An up-to-date file whose row, from an earlier run, has warnings."""
        self._warn(ev, earlier=True)

    def _warn(self, ev, *, earlier):
        self.totals["warnings"] += 1
        if len(self.warnings) < LIST_CAP:
            self.warnings.append({"source": ev["source"], "output": ev.get("output"),
                                  "kinds": ev.get("warning_kinds") or [],
                                  "warnings": ev.get("warnings") or [], "earlier_run": earlier})

    def add(self, ev, *, written):
        """One outcome (``written``: it changed the manifest)."""
        status = ev["status"]
        self.counts[status] = self.counts.get(status, 0) + 1
        self.rows_written += bool(written)
        if status == "skipped" and ev.get("output") is None:
            self.counts["not_audio"] += 1
            if len(self.not_audio) < LIST_CAP:
                self.not_audio.append({"source": ev["source"], "reason": ev.get("reason")})
            return
        if status == "skipped":
            self.counts["up_to_date"] += ev.get("reason") == "up to date"
            self.up_to_date_s += ev.get("duration_s") or 0.0
        elif status == "converted":
            self.converted_s += ev.get("duration_s") or 0.0
            if any(n.startswith("written as WAV") for n in ev.get("notes") or ()):
                self.format_notes += 1
            snr = ev.get("snr_db")
            if isinstance(snr, float):
                item = (-snr, ev["source"])
                if len(self._worst) < WORST:
                    heapq.heappush(self._worst, item)
                elif item > self._worst[0]:
                    heapq.heapreplace(self._worst, item)
        elif status == "failed":
            self.totals["failures"] = self.totals.get("failures", 0) + 1
            if len(self.failures) < LIST_CAP:
                self.failures.append({"source": ev["source"], "output": ev.get("output"),
                                      "error": ev["error"]})
        if ev.get("warnings"):
            self._warn(ev, earlier=status == "skipped")

    def worst(self):
        """This run's converted files with the lowest SNR, lowest first."""
        return [{"source": s, "snr_db": -neg} for neg, s in sorted(self._worst, reverse=True)]


@dataclass
class RunRecord:
    """What a finished (or interrupted) run did, for :func:`summarize`.

    Attributes
    ----------
    src, dst : str
    settings : BatchSettings
    tally : Tally
    tasks : int
        Files that were to be converted (or checked by a worker).
    done : int
        Of those, the ones that came back.
    excluded : int
        Files left out by the include/exclude patterns.
    walked : int
        Entries the walk found.
    plan_s : float, s
        Time spent walking and planning (before any conversion).
    started : str
        ISO 8601 start time.
    wall_s : float, s
    run_seed : int
    seed_origin : {'given', 'previous run', 'fresh'}
    sid : str
        The settings id.
    interrupted : bool
    executor : Executor or None
        None when nothing was to be converted.
    notes : list of str
    profile_path : str or None
    run_id : str
    details : str or None
        The run's details file, relative to DST.
    """

    src: str
    dst: str
    settings: object
    tally: Tally
    tasks: int
    done: int
    excluded: int
    walked: int
    plan_s: float
    started: str
    wall_s: float
    run_seed: int
    seed_origin: str
    sid: str
    interrupted: bool
    executor: object
    notes: list
    profile_path: str | None
    run_id: str
    details: str | None = None


def _sorted(rows):
    return sorted(rows, key=lambda r: r["source"])


def summarize(run):
    """The summary of a run (:class:`RunRecord`), as written to ``requant-summary.json``."""
    t = run.tally
    counts = dict(t.counts)
    all_notes = list(run.notes)
    if t.format_notes:
        all_notes.append(f"{t.format_notes} source(s) in formats requant does not write were "
                         "written as WAV")
    for name, rows, total in (("failures", t.failures, counts["failed"]),
                              ("files with warnings", t.warnings, t.totals["warnings"]),
                              ("non-audio entries", t.not_audio, counts["not_audio"])):
        if total > len(rows):
            all_notes.append(f"the summary lists the first {len(rows)} of {total} {name}; the "
                             "index pages list them all")
    finished = counts["converted"] + counts["failed"] + counts["up_to_date"]
    wall = run.wall_s
    return {
        "requant_version": __version__,
        "run_id": run.run_id,
        "src": run.src,
        "dst": run.dst,
        "started": run.started,
        "finished": now_iso(),
        "interrupted": run.interrupted,
        "wall_s": wall,
        "jobs": run.executor.workers if run.executor is not None else 0,
        "executor": run.executor.description if run.executor is not None else "none",
        "profile": run.profile_path,
        "settings": run.settings.to_dict(),
        "settings_id": run.sid,
        "run_seed": run.run_seed,
        "seed_origin": run.seed_origin,
        "counts": {**counts, "with_warnings": t.totals["warnings"], "excluded": run.excluded,
                   "not_started": run.tasks - run.done},
        "manifest_rows": t.rows_written,
        "plan": {"entries": run.walked, "seconds": run.plan_s,
                 "entries_per_s": run.walked / run.plan_s if run.plan_s > 0 else None},
        "audio_duration_s": t.converted_s + t.up_to_date_s,
        "converted_duration_s": t.converted_s,
        "throughput": {
            "files_per_s": finished / wall if wall > 0 else None,
            "converted_per_s": counts["converted"] / wall if wall > 0 else None,
            "audio_s_per_s": t.converted_s / wall if wall > 0 else None,
        },
        "lowest_snr": t.worst(),
        "warnings": _sorted(t.warnings),
        "failures": _sorted(t.failures),
        "not_audio": _sorted(t.not_audio),
        "notes": all_notes,
        "manifest": MANIFEST_NAME,
        "details": run.details,
        "index": INDEX_NAME,
    }
