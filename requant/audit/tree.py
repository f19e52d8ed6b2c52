"""Audit two folder trees: every delivery against its master, on all cores or a cluster.

Files pair by their relative path without the extension (``cue/take.wav`` in
the masters meets ``cue/take.flac`` in the deliveries), found by the batch's
own walk (:func:`requant.library.tree.walk_tree`: sorted, hidden files and
links to folders left out). Each pair is one task, :func:`audit_task`, run by
the batch's executors (:mod:`requant.library.executors`: ``SerialExecutor``
for one job, ``ProcessExecutor`` for local workers, ``DaskExecutor`` for
``--cluster``), so the audit shares their chunking, their handling of lost
workers and their version checks. A task never raises for a bad pair: it
returns a row with the error, and the rest go on.

Rows (the JSON list): ``master`` and ``delivered`` (relative paths, None for
an unmatched file), ``status`` (``passed``, ``findings``, ``failed`` or
``unmatched``), then for audited pairs the keys of
:func:`requant.audit.pair.run_audit` and for the others ``error``.
"""

import os
import posixpath

from requant.errors import InputError, RequantError, UsageError

__all__ = ["pair_trees", "audit_task", "audit_tree", "summarize", "STATUSES"]

#: Values of a row's ``status``.
STATUSES = ("passed", "findings", "failed", "unmatched")


def _audio(root):
    from requant.library.tree import walk_tree

    entries, _ = walk_tree(root)
    return [e["source"] for e in entries if e["kind"] == "audio"]


def _keyed(paths):
    keyed, clashes = {}, {}
    for rel in paths:
        key = posixpath.splitext(rel)[0]
        if key in keyed:
            clashes.setdefault(key, [keyed[key]]).append(rel)
        else:
            keyed[key] = rel
    return keyed, clashes


def pair_trees(master_dir, delivered_dir):
    """Pair the audio files of two trees by relative path without extension.

    Returns
    -------
    pairs : list of (str, str)
        (master, delivered) relative paths, sorted.
    rows : list of dict
        Rows for what cannot be audited: files without a partner
        (``unmatched``) and names that two files share in one tree
        (``failed``).
    """
    for d in (master_dir, delivered_dir):
        if not os.path.isdir(d):
            raise InputError(f"{os.fspath(d)!r} is not a folder; give two folders, or two "
                             "files")
    masters, m_clash = _keyed(_audio(master_dir))
    delivered, d_clash = _keyed(_audio(delivered_dir))
    pairs, rows = [], []
    for key in sorted(set(masters) | set(delivered)):
        if key in m_clash or key in d_clash:
            names = m_clash.get(key) or d_clash.get(key)
            which = "masters" if key in m_clash else "deliveries"
            rows.append({"master": masters.get(key), "delivered": delivered.get(key),
                         "status": "failed",
                         "error": f"the {which} hold {len(names)} files named {key!r} "
                                  f"({', '.join(names)}); keep one per name"})
        elif key not in delivered:
            rows.append({"master": masters[key], "delivered": None, "status": "unmatched",
                         "error": "no delivery of this master"})
        elif key not in masters:
            rows.append({"master": None, "delivered": delivered[key], "status": "unmatched",
                         "error": "no master for this delivery"})
        else:
            pairs.append((masters[key], delivered[key]))
    return pairs, rows


def audit_task(item):
    """Audit one pair; a plain dict in, a row out. Never raises for a bad pair.

    ``item``: ``master``, ``delivered`` (relative), ``master_path``,
    ``delivered_path`` (absolute), ``max_shift_s``.
    """
    from requant.audit.pair import run_audit
    from requant.library.executors.base import WORKER, Terminated

    row = {"master": item["master"], "delivered": item["delivered"]}
    WORKER["in_task"], WORKER["interrupted"] = True, False  # SIGINT in a worker stops it
    try:
        try:
            result, _ = run_audit(item["master_path"], item["delivered_path"],
                                  max_shift_s=item["max_shift_s"])
        finally:
            WORKER["in_task"] = False
    except KeyboardInterrupt:
        if not WORKER["worker"]:
            raise
        row.update(status="interrupted", error="interrupted before it finished")
        return row
    except Terminated:
        os._exit(143)  # the audit writes nothing: there is nothing to clean up
    except RequantError as exc:
        row.update(status="failed", error=str(exc))
        return row
    except Exception as exc:  # a bug or an unforeseen library error: isolate it
        row.update(status="failed", error=f"the audit failed with an unexpected "
                                          f"{type(exc).__name__} ({exc}); the rest went on")
        return row
    result.pop("master", None)
    result.pop("delivered", None)
    row.update(status="passed" if result["passed"] else "findings", **result)
    return row


def summarize(rows):
    """Counts per status, and the pairs: ``pairs``, ``passed``, ``findings``, ``failed``,
    ``unmatched``."""
    counts = {s: 0 for s in STATUSES}
    for r in rows:
        counts[r["status"] if r["status"] in counts else "failed"] += 1
    counts["pairs"] = counts["passed"] + counts["findings"] + counts["failed"]
    return counts


def _executor(jobs, n):
    from requant.library.executors.local import ProcessExecutor, SerialExecutor, default_jobs

    jobs = default_jobs() if jobs is None else int(jobs)
    if jobs < 1:
        raise UsageError(f"jobs={jobs!r} must be at least 1")
    jobs = max(1, min(jobs, n))
    return SerialExecutor() if jobs == 1 else ProcessExecutor(jobs)


def _warm():
    """Load the audit's kernel before workers fork (they inherit it)."""
    import numpy as np

    from requant.dsp import native

    for dt in (np.float32, np.float64):
        native.kernel("residual", m=dt)


def audit_tree(master_dir, delivered_dir, *, max_shift_s=10.0, json_path=None, jobs=None,
               executor=None, overwrite=False, on_row=None):
    """Audit every pair of two trees; write the rows as a JSON list.

    Parameters
    ----------
    master_dir, delivered_dir : path
    max_shift_s : float, s
    json_path : path, optional
        The JSON list of rows (written atomically at the end).
    jobs : int, optional
        Local worker processes (default: every core); ignored with ``executor``.
    executor : requant.library.executors.base.Executor, optional
        E.g. the batch's ``DaskExecutor``; started here if needed, not closed.
    overwrite : bool
    on_row : callable(row, done, total), optional
        Called as each row is known (progress).

    Returns
    -------
    dict
        ``rows`` (sorted by master, then delivery) and ``counts`` (:func:`summarize`).
    """
    from requant.audio_io.atomic import check_outputs
    from requant.audio_io.writers import write_json_atomic

    check_outputs([], [json_path], overwrite=overwrite)
    pairs, rows = pair_trees(master_dir, delivered_dir)
    total = len(pairs) + len(rows)
    for i, r in enumerate(rows):
        if on_row is not None:
            on_row(r, i + 1, total)
    mroot, droot = os.path.abspath(master_dir), os.path.abspath(delivered_dir)
    items = [{"master": m, "delivered": d, "master_path": os.path.join(mroot, *m.split("/")),
              "delivered_path": os.path.join(droot, *d.split("/")),
              "max_shift_s": float(max_shift_s),
              "size": _size(os.path.join(droot, *d.split("/")))} for m, d in pairs]
    items.sort(key=lambda it: -it["size"])  # biggest first, as the batch does
    own = executor is None
    if items:
        _warm()
        ex = _executor(jobs, len(items)) if own else executor
        try:
            ex.start()
            for item, res in ex.imap_unordered(audit_task, items):
                row = res if isinstance(res, dict) else {
                    "master": item["master"], "delivered": item["delivered"],
                    "status": "failed", "error": str(res) or type(res).__name__}
                rows.append(row)
                if on_row is not None:
                    on_row(row, len(rows), total)
        except BaseException:
            for _ in ex.drain():
                pass
            raise
        finally:
            if own:
                ex.close()
    rows.sort(key=lambda r: (r.get("master") or "", r.get("delivered") or ""))
    if json_path is not None:
        write_json_atomic(rows, json_path)
    return {"rows": rows, "counts": summarize(rows)}


def _size(path):
    try:
        return os.path.getsize(path)
    except OSError:
        return 0
