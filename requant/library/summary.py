"""The end of a batch: the summary written to ``DST/requant-summary.json``."""

from requant import __version__
from requant.library.manifest import MANIFEST_NAME
from requant.library.task import now_iso

__all__ = ["SUMMARY_NAME", "INDEX_NAME", "summarize"]


SUMMARY_NAME = "requant-summary.json"


INDEX_NAME = "requant-index.html"


def summarize(src, dst, settings, recorded, *, tasks, info, started, wall_s, run_seed,
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
        "finished": now_iso(),
        "interrupted": interrupted,
        "wall_s": wall_s,
        "jobs": executor.workers if executor is not None else 0,
        "executor": executor.description if executor is not None else "none",
        "profile": profile_path,
        "settings": settings.to_dict(),
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


