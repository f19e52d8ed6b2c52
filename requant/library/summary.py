"""The end of a batch: the summary written to ``DST/requant-summary.json``."""

from __future__ import annotations

from dataclasses import dataclass

from requant import __version__
from requant.library.manifest import MANIFEST_NAME
from requant.library.task import now_iso

__all__ = ["SUMMARY_NAME", "INDEX_NAME", "RunRecord", "summarize"]


SUMMARY_NAME = "requant-summary.json"


INDEX_NAME = "requant-index.html"


@dataclass
class RunRecord:
    """What a finished (or interrupted) run did, for :func:`summarize`.

    Attributes
    ----------
    src, dst : str
    settings : BatchSettings
    recorded : list of dict
        The events recorded in the manifest, in order.
    tasks : list of dict
        The files that were to be converted (or checked).
    excluded : int
        Files left out by the include/exclude patterns.
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
    """

    src: str
    dst: str
    settings: object
    recorded: list
    tasks: list
    excluded: int
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


def summarize(run):
    """The summary of a run (:class:`RunRecord`), as written to ``requant-summary.json``."""
    recorded, tasks = run.recorded, run.tasks
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
    all_notes = list(run.notes)
    if format_notes:
        all_notes.append(f"{format_notes} source(s) in formats requant does not write were "
                         "written as WAV")
    finished = sum(1 for ev in recorded if ev["status"] in ("converted", "failed")
                   or ev.get("reason") == "up to date")
    return {
        "requant_version": __version__,
        "run_id": run.run_id,
        "src": run.src,
        "dst": run.dst,
        "started": run.started,
        "finished": now_iso(),
        "interrupted": run.interrupted,
        "wall_s": run.wall_s,
        "jobs": run.executor.workers if run.executor is not None else 0,
        "executor": run.executor.description if run.executor is not None else "none",
        "profile": run.profile_path,
        "settings": run.settings.to_dict(),
        "settings_id": run.sid,
        "run_seed": run.run_seed,
        "seed_origin": run.seed_origin,
        "counts": {**counts, "up_to_date": up_to_date, "not_audio": len(not_audio),
                   "excluded": run.excluded, "not_started": not_started},
        "audio_duration_s": converted_s + skipped_s,
        "converted_duration_s": converted_s,
        "throughput": {
            "files_per_s": finished / run.wall_s if run.wall_s > 0 else None,
            "converted_per_s": counts["converted"] / run.wall_s if run.wall_s > 0 else None,
            "audio_s_per_s": converted_s / run.wall_s if run.wall_s > 0 else None,
        },
        "warnings": warnings,
        "failures": failures,
        "not_audio": not_audio,
        "notes": all_notes,
        "manifest": MANIFEST_NAME,
        "index": INDEX_NAME,
    }


