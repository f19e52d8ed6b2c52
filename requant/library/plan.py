"""Planning a batch: what each file needs, decided a folder at a time; dry runs.

A file is up to date when its latest good row (converted, or found up to date) in the
manifest has this run's settings id and output name, and both the source and the output
still have the size and modification time recorded with it: the plan decides that
alone, from two ``stat`` calls, and the file costs the run nothing else (no row, no
task). When the source's size or time changed, or the output's, or ``verify`` asks, a
worker decides: it hashes the source (a copy that kept the bytes is still up to date)
and the output, and converts again only what really changed. Every other audio file is
converted; everything else is recorded by the batch process itself.

The plan streams: the tree is walked a folder at a time (:func:`~requant.library.tree.
iter_folders`), the manifest is asked through :class:`~requant.library.resume.
ResumeIndex`, and what is decided goes to spools on disk (:mod:`requant.library.spool`).
The outputs a run may write are *claimed* before any work starts (:mod:`requant.
library.state`); an output that exists but was neither claimed nor recorded is somebody
else's file and is refused unless ``overwrite``.
"""

from __future__ import annotations

import os
import stat
from dataclasses import dataclass, field

from requant.audio_io.reader import open_input
from requant.errors import RequantError
from requant.library.manifest import MANIFEST_NAME, RUNS_DIR, ManifestDamage, sha256_file
from requant.library.resume import CLASSES, FITS, REASONS, ResumeIndex
from requant.library.settings import derive_seed, settings_id
from requant.library.spool import EntrySpool, EventSpool, NameSpool, TaskSpool
from requant.library.state import (
    LOCK_NAME,
    STATE_NAME,
    choose_run_seed,
    iter_claims,
    read_state,
    remove_stale_temps,
    take_lock,
    write_state,
)
from requant.library.summary import INDEX_NAME, LIST_CAP, PAGES_DIR, SUMMARY_NAME
from requant.library.task import source_check, task_settings
from requant.library.tree import WalkCount, iter_folders, output_name

__all__ = ["STATE_NAME", "LOCK_NAME", "Plan", "plan_run", "plan_dry_run", "choose_run_seed",
           "take_lock", "remove_stale_temps", "read_state", "write_claims"]


#: Names the batch keeps for itself at the top of DST.
_BOOKKEEPING = frozenset({MANIFEST_NAME, STATE_NAME, LOCK_NAME, SUMMARY_NAME, INDEX_NAME,
                          RUNS_DIR, PAGES_DIR})


def _bookkeeping_clash(rel_out):
    """The sentence for an output that would land on the batch's own files in DST, or None."""
    top = rel_out.split("/", 1)[0]
    if top in _BOOKKEEPING or (top.startswith(".") and top.startswith(LOCK_NAME)):
        return (f"{rel_out!r} would be written where the batch keeps its {top!r} in the "
                "destination; rename that file or folder in the source")
    return None


def _output_stat(path):
    """(size, mtime_ns) of an output that is a regular file, else None; and whether anything
    is there at all."""
    try:
        st = os.lstat(path)
    except OSError:
        return None, False
    if stat.S_ISREG(st.st_mode):
        return (st.st_size, st.st_mtime_ns), True
    return None, True


@dataclass
class Plan:
    """What a run is to do, as :func:`plan_run` decided it.

    Attributes
    ----------
    tasks : TaskSpool
        Files for the workers (to convert, or to check by their hashes).
    events : EventSpool
        Events the batch process records itself.
    entries : EntrySpool
        Every walked entry's row, in walk order, and the index pages.
    walked, excluded : int
        Entries walked; files the patterns left out.
    up_to_date : int
        Files found up to date by the plan alone (no task, no row).
    up_to_date_s : float, s
        Their audio.
    earlier_warnings : list of (str, int)
        Up to :data:`~requant.library.summary.LIST_CAP` of them whose row has warnings:
        (source, offset of the row).
    carried : NameSpool
        Claims of earlier runs the manifest does not record yet (they stay claimed).
    claims : NameSpool
        The tasks' outputs, in walk order (what this run claims).
    state_stale : bool
        The state file needs writing even without tasks (a new seed, claims to drop).
    notes : list of str
    damage : ManifestDamage
    """

    tasks: TaskSpool
    events: EventSpool
    entries: EntrySpool
    carried: NameSpool
    claims: NameSpool
    walked: int = 0
    excluded: int = 0
    up_to_date: int = 0
    up_to_date_s: float = 0.0
    earlier_warnings: list = field(default_factory=list)
    state_stale: bool = False
    notes: list = field(default_factory=list)
    damage: ManifestDamage = None
    dry_items: list | None = None

    def close(self):
        """Delete the spools."""
        for spool in (self.tasks, self.events, self.entries, self.carried, self.claims):
            spool.close()


class _Planner:
    """Decides each folder's entries into a :class:`Plan` (see the module's notes)."""

    def __init__(self, plan, index, *, src, dst, settings, run_seed, overwrite, verify):
        self.plan, self.index = plan, index
        self.src, self.dst, self.settings = src, dst, settings
        self.run_seed, self.overwrite, self.verify = run_seed, overwrite, verify

    def folder(self, reldir, entries):
        """Plan one folder's entries (a folder's outputs can only clash among themselves); their
        records go to the entry spool in the folder's order."""
        plan = self.plan
        plan.walked += len(entries)
        plan.entries.folder(reldir, len(entries))
        recs = self.index.lookup([e["source"] for e in entries])
        by_out = {}
        for e in entries:
            if e["kind"] == "audio":
                e["output"], e["note"] = output_name(e["source"], self.settings.format)
                by_out.setdefault(e["output"], []).append(e["source"])
        decided = []
        for e in entries:
            rec = recs.get(e["source"])
            if e["kind"] == "other":
                decided.append(("event", self._event({"source": e["source"], "output": None,
                                                      "status": "skipped",
                                                      "reason": e["reason"]}, rec)))
            elif e["kind"] == "unreadable-folder":
                decided.append(("event", self._event({"source": e["source"], "output": None,
                                                      "status": "failed", "error": e["reason"]},
                                                     rec)))
            else:
                decided.append(self._audio(e, rec, by_out[e["output"]]))
        asked = [d["output"] for kind, d in decided if kind == "pending" and d["exists"]]
        written = self.index.written(asked) if asked and not self.overwrite else set()
        claimed = []
        for kind, value in decided:
            if kind == "pending":
                output = value["output"]
                kind, value = self._task_or_refusal(value, written)
                if kind == "task":
                    claimed.append(output)
            if kind == "event":
                plan.entries.event(value)
            elif kind == "task":
                plan.entries.task(value)
            else:
                plan.entries.fixed(value.last, value.crc, value.cls, value.snr_db)
        self.index.reclaim(claimed)

    def _event(self, ev, rec):
        """Spool a parent event; it is written unless the manifest's latest row for the file
        says the same. Returns its number."""
        ref, write = None, True
        if rec is not None:
            last = self.index.row(rec.last, ev["source"])
            if last is not None and all(last.get(k) == ev.get(k)
                                        for k in ("status", "output", "reason", "error")):
                ref, write = [rec.last, rec.crc, rec.cls, rec.snr_db], False
        return self.plan.events.add(ev, write=write, ref=ref)

    def _audio(self, e, rec, same_output):
        """Decide an audio file: ``("fixed", rec)`` up to date now, ``("event", m)`` a parent
        failure, or ``("pending", decision)``: a task, once checked against the outputs the
        batch wrote (:meth:`_task_or_refusal`)."""
        source, rel_out = e["source"], e["output"]
        clash = _bookkeeping_clash(rel_out)
        others = [s for s in same_output if s != source] if len(same_output) > 1 else None
        if clash or others:
            src_path = os.path.join(self.src, *source.split("/"))
            error = clash or (f"{src_path!r} and {others[0]!r} would both be written to "
                              f"{rel_out!r}; rename one of them, or choose --format same")
            return "event", self._event({"source": source, "output": rel_out, "status": "failed",
                                         "seed": derive_seed(self.run_seed, source),
                                         "error": error}, rec)
        out_stat, exists = _output_stat(self._dst_path(rel_out))
        same_source = False
        if rec is not None and rec.good >= 0 and rec.fits == FITS:
            same_source = rec.src == (e["size"], e["mtime_ns"])
            if same_source and not self.verify and out_stat is not None and out_stat == rec.out:
                self._up_to_date(source, rel_out, rec)
                return "fixed", rec
        task = {"source": source, "output": rel_out, "seed": derive_seed(self.run_seed, source),
                "size": e["size"], "reason": "new", "note": e["note"], "expect_sha256": None,
                "expect_source": None, "expect_output_stat": None,
                "prev": None if rec is None else [rec.last, rec.crc, rec.cls, rec.snr_db,
                                                  rec.good, rec.duration_s]}
        if rec is not None and rec.good >= 0:
            if rec.fits != FITS:
                task["reason"] = REASONS[rec.fits]
            else:
                good = self.index.row(rec.good, source)
                if good is not None:
                    ident = good["source_identity"]
                    task.update(reason="output missing", expect_sha256=good["output_sha256"],
                                expect_output_stat=list(rec.out) if rec.out else None,
                                expect_source={"size": ident["size"],
                                               "mtime_ns": ident["mtime_ns"],
                                               "sha256": ident["sha256"],
                                               "check": (not same_source) or self.verify})
        return "pending", {"task": task, "exists": exists, "output": rel_out, "rec": rec}

    def _dst_path(self, rel):
        """The absolute path of a name relative to DST."""
        return f"{self.dst}/{rel}" if os.sep == "/" else os.path.join(self.dst, *rel.split("/"))

    def _up_to_date(self, source, rel_out, rec):
        plan = self.plan
        plan.up_to_date += 1
        plan.up_to_date_s += rec.duration_s or 0.0
        if rec.cls == CLASSES["warn"] and len(plan.earlier_warnings) < LIST_CAP:
            plan.earlier_warnings.append((source, rec.last))
        if plan.dry_items is not None:
            plan.dry_items.append({"source": source, "output": rel_out, "action": "skip",
                                   "reason": "up to date"})

    def _task_or_refusal(self, d, written):
        """``("task", n)``, or ``("event", m)`` refusing an output somebody else wrote."""
        task = d["task"]
        if d["exists"] and not (self.overwrite or d["output"] in written):
            out_path = self._dst_path(d["output"])
            return "event", self._event({
                "source": task["source"], "output": d["output"], "status": "failed",
                "seed": task["seed"],
                "error": f"{out_path!r} already exists and was not written by requant batch; "
                         "move it away or pass --overwrite to replace it"}, d["rec"])
        n = self.plan.tasks.add(task)
        self.plan.claims.add(task["output"])
        return "task", n


def _take_claims(dst, index, problems):
    """Earlier runs' claims into the index; returns True when some lapsed (recorded since)."""
    lapsed, block = 0, []
    for name in iter_claims(dst, problems):
        block.append(name)
        if len(block) >= 500:
            lapsed += index.add_claims(block)
            block.clear()
    if block:
        lapsed += index.add_claims(block)
    return lapsed > 0


def plan_run(src, dst, settings, *, prune, run_seed, sid, overwrite, verify=False,
             spool_dir=None, dry=False):
    """Walk SRC and decide every entry (see the module's notes). Returns a :class:`Plan`.

    Parameters
    ----------
    src, dst : str
        Absolute folders.
    settings : BatchSettings
    prune : sequence of str
        Folders not to walk (DST inside SRC).
    run_seed : int
    sid : str
        The settings id (:func:`~requant.library.settings.settings_id`).
    overwrite, verify : bool
    spool_dir : str, optional
        Where the spools go (DST; default: the system's temporary folder).
    dry : bool
        Collect the files found up to date as dry-run items.
    """
    shared = task_settings(settings)
    plan = Plan(tasks=TaskSpool(spool_dir, src, dst, shared), events=EventSpool(spool_dir),
                entries=EntrySpool(spool_dir), carried=NameSpool(spool_dir),
                claims=NameSpool(spool_dir),
                dry_items=[] if dry else None)
    try:
        with ResumeIndex(os.path.join(dst, MANIFEST_NAME), sid=sid,
                         fmt=settings.format) as index:
            plan.damage = index.build()
            problems = []
            plan.state_stale = _take_claims(dst, index, problems) or bool(problems)
            plan.notes.extend(problems)
            planner = _Planner(plan, index, src=src, dst=dst, settings=settings,
                               run_seed=run_seed, overwrite=overwrite, verify=verify)
            count = WalkCount()
            for reldir, entries in iter_folders(src, include=settings.include,
                                                exclude=settings.exclude, prune=prune,
                                                count=count):
                planner.folder(reldir, entries)
            plan.excluded = count.excluded
            for name in index.claimed():
                plan.carried.add(name)
        plan.tasks.seal()
    except BaseException:
        plan.close()
        raise
    return plan


def write_claims(dst, run_seed, plan, keep=None):
    """Write the state: the run seed, the carried claims and the tasks' outputs (all of
    them, or those of the task numbers ``keep(n)`` accepts)."""
    from itertools import chain

    outputs = plan.claims if keep is None else plan.tasks.outputs(keep)
    write_state(dst, run_seed, chain(plan.carried, outputs))


def _dry_task_item(t):
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
    return {"source": t["source"], "output": t["output"], "action": action, "reason": reason}


def plan_dry_run(src, dst, settings, *, prune, overwrite, reporter, verify=False):
    """Say what a run would do; write nothing. Returns the plan as a dict (``items`` with
    ``action`` convert/skip/fail and ``reason``)."""
    run_seed, origin = choose_run_seed(settings, dst)
    if origin == "fresh":  # the real run draws its own
        run_seed = None
    sid = settings_id(settings, run_seed if run_seed is not None else 0)
    plan = plan_run(src, dst, settings, prune=prune, run_seed=run_seed or 0, sid=sid,
                    overwrite=overwrite, verify=verify, dry=True)
    try:
        items = plan.dry_items
        for _, ev, _, _ in plan.events:
            items.append({"source": ev["source"], "output": ev.get("output"),
                          "action": "fail" if ev["status"] == "failed" else "skip",
                          "reason": ev.get("error") or ev.get("reason")})
        for n in range(len(plan.tasks)):
            items.append(_dry_task_item(plan.tasks.item(n)))
        excluded = plan.excluded
    finally:
        plan.close()
    items.sort(key=lambda d: d["source"])
    counts = {k: sum(1 for i in items if i["action"] == k) for k in ("convert", "skip", "fail")}
    result = {"dry_run": True, "src": src, "dst": dst, "items": items, "counts": counts,
              "excluded": excluded, "run_seed": run_seed, "seed_origin": origin,
              "settings": settings.to_dict(), "settings_id": sid if run_seed else None}
    reporter.finished(result)
    return result
