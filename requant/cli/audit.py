"""``requant audit``: a delivery against its master, or two folder trees; parsing and printing.

The work is :func:`requant.audit.audit_pair` and :func:`requant.audit.audit_tree`,
imported inside the command so that ``requant --help`` stays fast.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Annotated

import typer

from requant.cli.common import Cluster, ClusterTimeout, Jobs, Overwrite, Quiet, cluster_executor

__all__ = ["audit", "format_result", "format_counts"]

_LIST_LIMIT = 10


def _fmt(v, spec=".1f"):
    return "n/a" if v is None else format(v, spec)


def _show(name):
    return name if name.isprintable() else repr(name)


def format_result(r):
    """A pair's result as a few lines of text (the verdict first)."""
    a, m, p = r["alignment"], r["measured"], r["predicted"]
    lines = [r["verdict"]]
    lines.append(f"  alignment: offset {a['offset_frames']} frames, gain {a['gain_db']:+.3f} dB, "
                 f"polarity {a['polarity']:+d}; {a['overlap_frames']} frames measured")
    how = f"{r['quantizer'] or 'round or truncate'}, dither {r['dither']}, " + (
        f"shaped ({r['ntf']['noise_gain_db']:+.1f} dB)" if r["ntf"] else "flat")
    lines.append(f"  method: {r['word_length']}-bit, {how}; bias {r['bias_lsb']:+.3f} LSB; "
                 f"{r['clipped_samples']} clipped")
    lines.append(f"  noise, measured / predicted (dBFS): RMS {_fmt(m['error_rms_dbfs'])} / "
                 f"{_fmt(p['error_rms_dbfs'])}, A {_fmt(m['a_weighted_noise_dbfs'])} / "
                 f"{_fmt(p['a_weighted_noise_dbfs'])}, ITU-R 468 "
                 f"{_fmt(m['itu468_noise_dbfs'])} / {_fmt(p['itu468_noise_dbfs'])}")
    if r["ntf_db"] and r["shaped"]:
        lines.append("  estimated NTF (dB): " + ", ".join(
            f"{b['hz']:g} Hz {b['db']:+.1f}" for b in r["ntf_db"]))
    if r["ntf"]:
        w = r["ntf"]["weighted_gain_db"]
        lines.append(f"  its weighted gains against flat dither: A {w['a']:+.2f} dB, ITU-R 468 "
                     f"{w['itu468']:+.2f} dB, hearing threshold {w['threshold']:+.2f} dB")
    lines += [f"finding: {f}" for f in r["findings"]]
    lines += [f"note: {n}" for n in r["notes"]]
    return "\n".join(lines)


def format_counts(c):
    """The tree summary in one line."""
    return (f"pairs {c['pairs']}: passed {c['passed']}, with findings {c['findings']}, failed "
            f"{c['failed']}; unmatched files {c['unmatched']}")


def audit(
    master: Annotated[Path, typer.Argument(
        help="The master (a longer word length, or float), or a folder of masters.")],
    delivered: Annotated[Path, typer.Argument(
        help="The delivery (fixed point, same rate and channels), or a folder of deliveries "
             "paired with the masters by relative path without extension.")],
    json_path: Annotated[Path | None, typer.Option(
        "--json", help="Write the result as JSON (for folders: a list, one row per pair).")
    ] = None,
    report: Annotated[list[Path] | None, typer.Option(
        "--report", help="Write the report of one pair: .html (one self-contained page) or "
                         ".md (pictures beside it); repeat for both.")] = None,
    max_shift: Annotated[float, typer.Option(
        "--max-shift", min=0.001, max=600.0,
        help="Largest offset between delivery and master looked for, seconds.")] = 10.0,
    jobs: Jobs = None,
    cluster: Cluster = None,
    cluster_timeout: ClusterTimeout = 10.0,
    overwrite: Overwrite = False,
    quiet: Quiet = False,
):
    """Tell how a delivery was made, from it and its master alone, and whether it was made well.

    Prints the verdict (word length, dither, shaping, noise against the
    prediction) and the findings. Exit code 0 when the audit ran (findings
    or not), 1 when a pair of a folder audit failed, 2 for bad input.
    """
    from requant.errors import UsageError

    if master.is_dir() or delivered.is_dir():
        if not (master.is_dir() and delivered.is_dir()):
            raise UsageError(f"give two files or two folders, not a file and a folder "
                             f"({str(master)!r}, {str(delivered)!r})")
        if report:
            raise UsageError("--report writes the page of one pair; for folders use --json "
                             "(one row per pair)")
        _audit_tree(master, delivered, json_path, max_shift, jobs, cluster, cluster_timeout,
                    overwrite, quiet)
        return
    if jobs is not None or cluster is not None:
        raise UsageError("--jobs and --cluster spread folder audits over workers; one pair "
                         "runs here, leave them out")
    from requant.audit import audit_pair

    r = audit_pair(master, delivered, max_shift_s=max_shift, json_path=json_path,
                   report_paths=tuple(report or ()), overwrite=overwrite)
    if quiet:
        for f in r["findings"]:
            print(f"finding: {f}", file=sys.stderr)
        return
    print(format_result(r))
    for path in [json_path, *(report or ())]:
        if path is not None:
            print(f"wrote {path}")


def _audit_tree(master, delivered, json_path, max_shift, jobs, cluster, timeout, overwrite,
                quiet):
    from requant.audit import audit_tree

    executor = cluster_executor(cluster, jobs, timeout)

    def on_row(row, done, total):
        if row["status"] == "failed":
            name = row.get("delivered") or row.get("master") or "?"
            print(f"failed: {_show(name)}: {row['error']}", file=sys.stderr)
        elif not quiet and row["status"] in ("passed", "findings"):
            print(f"[{done}/{total}] {_show(row['delivered'])}: {row['verdict']}", flush=True)

    try:
        out = audit_tree(master, delivered, max_shift_s=max_shift, json_path=json_path,
                         jobs=jobs, executor=executor, overwrite=overwrite, on_row=on_row)
    finally:
        if executor is not None:
            executor.close()
    rows, counts = out["rows"], out["counts"]
    unmatched = [f"{_show(r['master'] or r['delivered'])}: {r['error']}" for r in rows
                 if r["status"] == "unmatched"]
    if not quiet:
        for title, status in (("with findings", "findings"),):
            listed = [f"{_show(r['delivered'])}: {'; '.join(r['findings'])}" for r in rows
                      if r["status"] == status]
            _print_list(title, listed)
        _print_list("unmatched", unmatched)
        print(format_counts(counts))
        if json_path is not None:
            print(f"wrote {json_path}")
    if counts["failed"]:
        raise typer.Exit(code=1)


def _print_list(title, rows):
    if not rows:
        return
    print(f"{title} ({len(rows)}):")
    for line in rows[:_LIST_LIMIT]:
        print(f"  {line}")
    if len(rows) > _LIST_LIMIT:
        print(f"  ... and {len(rows) - _LIST_LIMIT} more (see the JSON)")
