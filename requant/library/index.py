"""The HTML index of a batch: a summary page and detail pages, none of them big.

``DST/requant-index.html`` is the summary: this run's counts, the library as the run
leaves it (files failed, with warnings, fine, not audio), the failures and warnings
(the first :data:`SHOWN` of each), the files with the lowest SNR, and a table of the
detail pages. The detail pages, ``DST/requant-index/p-XXXXXXXXXXXXXXXX.html``, hold
one row per file in walk order, whole folders on a page and at most
:data:`~requant.library.spool.PAGE_ROWS` rows (about half a megabyte), so nothing the
browser loads grows with the library.

A detail page is named by a fingerprint of the rows it shows (where each row starts in
the manifest, and its CRC-32): a page whose rows did not change is already on disk and
is not written again, so a rerun that changed nothing writes only the summary page.
Pages no longer named are removed. Everything is rendered with jinja2 autoescaping, or
escaped with markupsafe where rows are built in Python (a row costs microseconds, not
a template call), so file names and messages cannot inject markup. The pages are
self-contained (inline style and a small sorting script, no network).
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import heapq
import os
from urllib.parse import quote

from requant.library.manifest import read_row
from requant.library.resume import CLASSES
from requant.library.spool import FIXED
from requant.library.summary import INDEX_NAME, PAGES_DIR

__all__ = ["index_row", "row_html", "write_index", "SHOWN", "PAGE_FORMAT"]

_TEMPLATE = "batch_index.html.j2"
_PAGE_TEMPLATE = "batch_page.html.j2"
_NAMES = {v: k for k, v in CLASSES.items()}

#: Failures and warnings the summary page names (the detail pages hold them all).
SHOWN = 100

#: Part of every page's fingerprint: a new page layout gives every page a new name.
PAGE_FORMAT = b"requant-index-page/1"

_WORST = 10


def _num(v, spec):
    return "" if v is None else format(v, spec)


def index_row(ev):
    """The cells of one manifest event's row: display strings, not yet escaped.

    Parameters
    ----------
    ev : dict
        A manifest event (see :func:`requant.library.task.convert_task`).

    Returns
    -------
    dict
        ``status`` (the label), ``source``, ``output``, ``href`` (the output,
        URL-quoted, relative to DST), ``duration``, ``snr``, ``kinds``,
        ``problem``, ``seconds``, ``when`` (the date it was converted) and
        ``sha`` (the output hash's first 12 digits).
    """
    status = ev["status"]
    if status == "skipped" and ev.get("output") is not None:
        label = ev.get("reason") or "skipped"
    elif status == "skipped":
        label = "not audio"
    else:
        label = status
    problem = ev.get("error") or "; ".join(ev.get("warnings") or [])
    if not problem and status == "skipped":
        problem = ev.get("reason") if ev.get("output") is None else ""
    out = ev.get("output")
    when = ev.get("converted_at") or (ev.get("timestamp") if status == "converted" else None)
    return {
        "status": label,
        "source": ev["source"],
        "output": out,
        "href": quote(os.fsencode(out)) if out else None,
        "duration": _num(ev.get("duration_s"), ".3f"),
        "snr": _num(ev.get("snr_db"), ".2f"),
        "kinds": ", ".join(ev.get("warning_kinds") or []),
        "problem": problem,
        "seconds": _num(ev.get("seconds"), ".3f"),
        "when": when[:16].replace("T", " ") if isinstance(when, str) else "",
        "sha": (ev.get("output_sha256") or "")[:12],
    }


def row_html(number, ev, cls, *, up="../"):
    """One table row of a detail page (escaped HTML, a ``str``).

    Parameters
    ----------
    number : int
        The row's number on its page.
    ev : dict or str
        The manifest event, or the file's name when it has no row yet (not started).
    cls : int
        Its class (:data:`~requant.library.resume.CLASSES`).
    up : str
        From the page to DST (links to the outputs).
    """
    from markupsafe import escape

    if isinstance(ev, str):
        return (f'<tr class="pending"><td class="n">{number}</td><td class="status">not '
                f'started</td><td>{escape(ev)}</td><td class="n"></td><td class="n"></td>'
                "<td></td><td class=\"n\"></td><td></td></tr>\n")
    r = index_row(ev)
    name = escape(r["source"])
    if r["href"] and cls != CLASSES["failed"]:
        name = f'<a href="{escape(up + r["href"])}">{name}</a>'
    if r["output"] and r["output"] != r["source"]:
        name = f"{name}<br><small>&rarr; {escape(r['output'])}</small>"
    problem = escape(r["problem"])
    if r["kinds"]:
        problem = f"<strong>{escape(r['kinds'])}</strong>: {problem}"
    return (f'<tr class="{_NAMES[cls]}"><td class="n">{number}</td><td class="status">'
            f'{escape(r["status"])}</td><td>{name}</td><td class="n">{r["duration"]}</td>'
            f'<td class="n">{r["snr"]}</td><td class="problem">{problem}</td>'
            f'<td class="n" title="output SHA-256 {escape(r["sha"])}">{r["seconds"]}</td>'
            f"<td>{escape(r['when'])}</td></tr>\n")


def _env():
    import jinja2

    folder = os.path.join(os.path.dirname(os.path.abspath(__file__)), "templates")
    return jinja2.Environment(loader=jinja2.FileSystemLoader(folder), autoescape=True,
                              trim_blocks=True, lstrip_blocks=True,
                              undefined=jinja2.StrictUndefined)


class _Library:
    """The library as the run leaves it, gathered page by page (lists capped)."""

    def __init__(self, fd):
        self.fd = fd
        self.counts = {"files": 0, "failed": 0, "with_warnings": 0, "ok": 0, "not_audio": 0,
                       "not_started": 0}
        self.failures, self.warnings = [], []
        self._worst = []  # (-snr, offset, page name)

    def add(self, ref, page_name):
        self.counts["files"] += 1
        if isinstance(ref, str):
            self.counts["not_started"] += 1
            return
        offset, _, cls, snr = ref
        key = {0: "failed", 1: "with_warnings", 2: "ok", 3: "not_audio"}[cls]
        self.counts[key] += 1
        shown = self.failures if cls == CLASSES["failed"] else (
            self.warnings if cls == CLASSES["warn"] else None)
        if shown is not None and len(shown) < SHOWN:
            ev = read_row(self.fd, offset)
            if ev is not None:
                shown.append({"source": ev["source"], "page": page_name,
                              "text": ev.get("error") or "; ".join(ev.get("warnings") or []),
                              "kinds": ", ".join(ev.get("warning_kinds") or [])})
        if snr is not None:
            item = (-snr, offset, page_name)
            if len(self._worst) < _WORST:
                heapq.heappush(self._worst, item)
            elif item > self._worst[0]:
                heapq.heapreplace(self._worst, item)

    def worst(self):
        rows = []
        for neg, offset, page in sorted(self._worst, reverse=True):
            ev = read_row(self.fd, offset)
            if ev is not None:
                rows.append({"source": ev["source"], "snr": f"{-neg:.2f}", "page": page})
        return rows


def _fingerprint(refs):
    h = hashlib.blake2b(PAGE_FORMAT, digest_size=8)
    for ref in refs:
        h.update(b"\0" + (os.fsencode(ref) if isinstance(ref, str)
                          else f"{ref[0]}:{ref[1]}".encode("ascii")))
    return h.hexdigest()


def _write_text(path, text):
    from requant.audio_io.atomic import AtomicOutputs

    with AtomicOutputs() as outs:
        tmp = outs.path_for(path)
        with open(tmp, "w", encoding="utf-8", errors="surrogateescape") as fh:
            fh.write(text)


def _render_page(template, fd, page, refs, name):
    from markupsafe import Markup

    rows = []
    for i, ref in enumerate(refs, 1):
        ev = ref if isinstance(ref, str) else read_row(fd, ref[0])
        cls = CLASSES["pending"] if isinstance(ref, str) else ref[2]
        rows.append(row_html(i, ev if ev is not None else "(unreadable row)", cls))
    return template.render(first=page.first_folder or "./", last=page.last_folder or "./",
                           rows=Markup("".join(rows)), summary_href="../" + INDEX_NAME,
                           name=name)


def write_index(dst, summary, entries, resolve, fd):
    """Write the detail pages that changed, remove those no longer named, write the summary
    page.

    Parameters
    ----------
    dst : str
    summary : dict
        The run's summary (:func:`~requant.library.summary.summarize`).
    entries : EntrySpool
        Every walked entry's record, and the pages.
    resolve : callable(kind, number) -> ref or str
        The row of a task's or a parent event's entry: ``(offset, crc, class, snr)``,
        or its file name when it has none (not started).
    fd : int
        The manifest, open for reading.

    Returns
    -------
    dict
        The library's counts (``files``, ``failed``, ``with_warnings``, ``ok``,
        ``not_audio``, ``not_started``) and ``pages``.
    """
    from requant.audio_io.atomic import CommitGroup

    env = _env()
    page_t = env.get_template(_PAGE_TEMPLATE)
    folder = os.path.join(dst, PAGES_DIR)
    os.makedirs(folder, exist_ok=True)
    lib = _Library(fd)
    table, keep = [], set()
    with CommitGroup() as group:
        for number, page in enumerate(entries.pages, 1):
            refs = [(value, crc, cls, snr) if kind == FIXED else resolve(kind, value)
                    for kind, cls, snr, crc, value in entries.records(page)]
            name = f"p-{_fingerprint(refs)}.html"
            keep.add(name)
            counts = [0, 0, 0, 0, 0]
            for ref in refs:
                counts[CLASSES["pending"] if isinstance(ref, str) else ref[2]] += 1
                lib.add(ref, name)
            table.append({"number": number, "href": f"{PAGES_DIR}/{name}",
                          "first": page.first_folder or "./", "last": page.last_folder or "./",
                          "files": len(refs), "failed": counts[0], "warn": counts[1]})
            path = os.path.join(folder, name)
            if not os.path.exists(path):
                _write_text(path, _render_page(page_t, fd, page, refs, name))
        group.flush()
    for old in os.listdir(folder):
        if old.startswith("p-") and old.endswith(".html") and old not in keep:
            try:
                os.unlink(os.path.join(folder, old))
            except OSError:
                pass
    library = dict(lib.counts, pages=len(table))
    _write_text(os.path.join(dst, INDEX_NAME),
                render_summary(env, summary, library, table, lib))
    return library


def render_summary(env, summary, library, table, lib):
    """The summary page as a string (HTML5)."""
    c = summary["counts"]
    t = summary["throughput"]

    def fmt(v, spec):
        return "n/a" if v is None else format(v, spec)

    facts = [
        ("converted", str(c.get("converted", 0))),
        ("up to date", str(c.get("up_to_date", 0))),
        ("failed", str(c.get("failed", 0))),
        ("not audio", str(c.get("not_audio", 0))),
        ("with warnings", str(c.get("with_warnings", 0))),
        ("not started", str(c.get("not_started", 0))),
        ("manifest rows written", str(summary.get("manifest_rows", 0))),
        ("audio converted", _clock(summary["converted_duration_s"])),
        ("wall time", f"{summary['wall_s']:.1f} s"),
        ("throughput", f"{fmt(t['files_per_s'], '.1f')} files/s, "
                       f"{fmt(t['audio_s_per_s'], '.0f')} audio s/s"),
        ("workers", f"{summary['jobs']} ({summary['executor']})"),
        ("run seed", str(summary["run_seed"])),
        ("settings id", summary["settings_id"][:16]),
    ]
    shelf = [("files", library["files"]), ("failed", library["failed"]),
             ("with warnings", library["with_warnings"]), ("fine", library["ok"]),
             ("not audio", library["not_audio"]), ("not started", library["not_started"]),
             ("detail pages", library["pages"])]
    s = summary["settings"]
    settings_line = (f"{s['bits']} bits, {s['quantizer']}, dither {s['dither']}, shaping "
                     f"{s['shaping']}, format {s['format']}")
    name = os.path.basename(summary["dst"].rstrip(os.sep)) or summary["dst"]
    return env.get_template(_TEMPLATE).render(
        title=f"requant batch: {name}", summary=summary, facts=facts, shelf=shelf,
        settings_line=settings_line, failures=lib.failures, warnings=lib.warnings,
        shown=SHOWN, worst=lib.worst(), pages=table, pages_dir=PAGES_DIR + "/",
        generated=_dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"))


def _clock(seconds):
    seconds = float(seconds or 0.0)
    if seconds < 60:
        return f"{seconds:.1f} s"
    h, rem = divmod(int(round(seconds)), 3600)
    m, sec = divmod(rem, 60)
    return f"{h}:{m:02d}:{sec:02d}" if h else f"{m}:{sec:02d}"
