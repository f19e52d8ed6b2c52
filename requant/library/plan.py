"""Planning a batch: what each file needs, the run seed, claims, the lock, dry runs.

A file is skipped ("up to date") when its latest ``converted`` event has the same
``settings_id`` and output name and the output still has the recorded SHA-256. Before
any work starts, the outputs this run may write are *claimed* in
``DST/requant-batch.json`` (written atomically, with the run seed). An output that
exists but was neither claimed nor recorded is somebody else's file: it is refused
unless ``overwrite``. So a run killed between writing an output and recording it
leaves a claimed output that the next run converts again, to the same bytes.
"""

import json
import os
import time

from requant.audio_io.atomic import is_stale_temp
from requant.audio_io.reader import open_input
from requant.dsp.quantizer import new_seed
from requant.errors import OutputError, RequantError, UsageError
from requant.library.manifest import MANIFEST_NAME, latest_by_source, read_manifest, sha256_file
from requant.library.settings import derive_seed, settings_id
from requant.library.summary import INDEX_NAME, SUMMARY_NAME
from requant.library.task import source_check, task_settings
from requant.library.tree import output_name, walk_tree
from requant.recipe import SEED_MAX

__all__ = ["STATE_NAME", "LOCK_NAME", "plan_tasks", "plan_dry_run", "choose_run_seed", "take_lock",
           "remove_stale_temps", "read_state"]


STATE_NAME = "requant-batch.json"


LOCK_NAME = ".requant-batch.lock"


#: Names the batch keeps for itself at the top of DST.
_BOOKKEEPING = frozenset({MANIFEST_NAME, STATE_NAME, LOCK_NAME, SUMMARY_NAME, INDEX_NAME})


def read_state(dst, problems=None):
    """The batch state in DST (run seed, claimed outputs), with only fields of the right type.

    A missing file is an empty state. A damaged one (not JSON, nested absurdly
    deep, a folder, fields of the wrong type) is read as far as it is usable,
    and a sentence naming it and the way out goes to ``problems``. Losing the
    claims is safe: outputs not in the manifest are then refused, not replaced.
    """
    path = os.path.join(dst, STATE_NAME)
    try:
        with open(path, "rb") as fh:
            state = json.loads(fh.read())
    except FileNotFoundError:
        return {}
    except (OSError, ValueError, RecursionError) as exc:
        _state_problem(problems, path, getattr(exc, "strerror", None) or "not valid JSON")
        return {}
    if not isinstance(state, dict):
        _state_problem(problems, path, "not a JSON object")
        return {}
    clean = {}
    seed = state.get("run_seed")
    if isinstance(seed, int) and not isinstance(seed, bool) and 0 <= seed <= SEED_MAX:
        clean["run_seed"] = seed
    elif seed is not None:
        _state_problem(problems, path, f"run_seed is {seed!r}")
    claims = state.get("claimed_outputs")
    if isinstance(claims, list) and all(isinstance(c, str) for c in claims):
        clean["claimed_outputs"] = claims
    elif claims is not None:
        _state_problem(problems, path, "claimed_outputs is not a list of names")
    return clean


def _state_problem(problems, path, what):
    if problems is not None and not problems:
        problems.append(f"the batch state {path!r} is damaged ({what}); what it held was "
                        "ignored (a new run seed may be drawn, and outputs not in the manifest "
                        "are refused rather than replaced); move it aside to silence this")


def _is_stale_temp(name):
    return name.startswith(".") and (name.endswith(".requant-part")
                                     or (".requant-part." in name and name.endswith(".part")))


def remove_stale_temps(dst):
    removed = []
    for root, _dirs, files in os.walk(dst, followlinks=False):
        for name in files:
            if _is_stale_temp(name) and is_stale_temp(os.path.join(root, name)):
                try:
                    os.unlink(os.path.join(root, name))
                    removed.append(os.path.relpath(os.path.join(root, name), dst))
                except OSError:
                    pass
    return removed


def _bookkeeping_clash(rel_out):
    """The sentence for an output that would land on the batch's own files in DST, or None."""
    top = rel_out.split("/", 1)[0]
    if top in _BOOKKEEPING or (top.startswith(".") and top.startswith(LOCK_NAME)):
        return (f"{rel_out!r} would be written where the batch keeps its {top!r} in the "
                "destination; rename that file or folder in the source")
    return None


def _resume_decision(prev, ident, entry, *, sid, rel_out, verify):
    """Why a file is converted again, or what a worker must check before skipping it.

    Returns ``(reason, expect_output_sha256, expect_source)``: with an
    expected output hash the worker skips the file when the output still has
    it and, with an expected source identity, when the source still has the
    recorded content (it hashes the source only if its size or time changed,
    or when ``verify`` asks for every source).
    """
    if prev is None:
        return "new", None, None
    if prev.get("settings_id") != sid:
        return "settings changed", None, None
    if prev.get("output") != rel_out:
        return "output name changed", None, None
    if not isinstance(ident, dict) or not isinstance(ident.get("sha256"), str):
        return "the source's identity was not recorded", None, None
    stat_same = (ident.get("size") == entry["size"]
                 and ident.get("mtime_ns") == entry.get("mtime_ns"))
    expect_source = dict(ident, check=(not stat_same) or verify)
    return "output missing", prev.get("output_sha256"), expect_source


def plan_tasks(src, dst, settings, *, prune, run_seed, sid, overwrite, events, verify=False):
    """Decide, per file, what to do. Returns (tasks, parent_events, info).

    A file converted before is skipped only when the settings id, the output
    name, the output's hash and the source's identity (size, modification
    time, and, when those changed or ``verify`` is set, the SHA-256 of its
    bytes) all still match.
    """
    entries, excluded = walk_tree(src, include=settings.include, exclude=settings.exclude,
                                  prune=prune)
    _, converted, identities, seen_outputs = latest_by_source(events)
    problems = []
    claims = set(read_state(dst, problems).get("claimed_outputs") or ())
    ours = seen_outputs | claims
    shared = task_settings(settings)

    audio = [e for e in entries if e["kind"] == "audio"]
    outs = {}
    for e in audio:
        e["output"], e["note"] = output_name(e["source"], settings.format)
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
        clash = _bookkeeping_clash(rel_out)
        if clash:
            parent_events.append({"source": e["source"], "output": rel_out, "status": "failed",
                                  "seed": seed, "error": clash})
            continue
        if others:
            parent_events.append({
                "source": e["source"], "output": rel_out, "status": "failed", "seed": seed,
                "error": f"{src_path!r} and {others[0]!r} would both be written to {rel_out!r}; "
                         "rename one of them, or choose --format same"})
            continue
        prev = converted.get(e["source"])
        reason, expect, expect_source = _resume_decision(
            prev, identities.get(e["source"]), e, sid=sid, rel_out=rel_out, verify=verify)
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
                      "output_path": out_path, "seed": seed, "settings": shared,
                      "overwrite": True, "expect_sha256": expect,
                      "expect_source": expect_source,
                      "reason": reason, "note": e["note"], "size": e["size"],
                      "previous": prev if expect else None})
    info = {"entries": len(entries), "excluded": excluded, "claims": claims, "notes": problems}
    return tasks, parent_events, info


def choose_run_seed(settings, dst):
    if settings.recipe.seed is not None:
        return settings.recipe.seed, "given"
    prev = read_state(dst).get("run_seed")
    if isinstance(prev, int) and not isinstance(prev, bool) and 0 <= prev <= SEED_MAX:
        return prev, "previous run"
    return new_seed(), "fresh"


def take_lock(dst):
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


def plan_dry_run(src, dst, settings, *, prune, overwrite, reporter, verify=False):
    events = read_manifest(os.path.join(dst, MANIFEST_NAME))[0] if os.path.isdir(dst) else []
    run_seed, origin = choose_run_seed(settings, dst)
    if origin == "fresh":  # the real run draws its own
        run_seed = None
    sid = settings_id(settings, run_seed if run_seed is not None else 0)
    tasks, parent_events, info = plan_tasks(src, dst, settings, prune=prune,
                                            run_seed=run_seed or 0, sid=sid,
                                            overwrite=overwrite, events=events, verify=verify)

    items = []
    for ev in parent_events:
        items.append({"source": ev["source"], "output": ev.get("output"),
                      "action": "fail" if ev["status"] == "failed" else "skip",
                      "reason": ev.get("error") or ev.get("reason")})
    for t in tasks:
        action, reason = "convert", t["reason"]
        source_changed = source_check(t) if t["expect_sha256"] else None
        if source_changed:
            reason = source_changed
        elif t["expect_sha256"] and os.path.isfile(t["output_path"]):
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
              "settings": settings.to_dict(), "settings_id": sid if run_seed else None}
    reporter.finished(result)
    return result


