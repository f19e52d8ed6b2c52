"""The HTML index of a batch: one row per file, problem files first, sortable.

The page is self-contained (inline style and a small inline script, no
network) and rendered with jinja2 with autoescaping on, so file names and
messages cannot inject markup.
"""

import datetime as _dt
import os
from urllib.parse import quote

__all__ = ["IndexBuilder", "index_row", "render_index", "write_index"]

_TEMPLATE = "batch_index.html.j2"
_ROW_TEMPLATE = "batch_index_row.html.j2"
_CLASSES = {0: "failed", 1: "warn", 2: "ok", 3: "other"}


def _rank(ev):
    if ev["status"] == "failed":
        return 0
    if ev.get("warnings"):
        return 1
    if ev.get("output") is None:
        return 3
    return 2


def _num(v, spec):
    return "" if v is None else format(v, spec)


def index_row(ev):
    """The table row of one manifest event: display strings, not yet escaped.

    Parameters
    ----------
    ev : dict
        A manifest event (see :func:`requant.library.task.convert_task`).

    Returns
    -------
    dict
        ``rank`` (0 failed, 1 with warnings, 2 fine, 3 not audio: the page
        lists rows by rank, then by source), ``status_class`` and one string
        per cell.
    """
    fig = ev.get("figures") or {}
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
    meta = ev.get("metadata") or {}
    kept = (meta.get("copied") or []) + (meta.get("rewritten") or [])
    rank = _rank(ev)
    return {
        "rank": rank,
        "status": label,
        "status_class": _CLASSES[rank],
        "source": ev["source"],
        "output": out,
        "href": quote(os.fsencode(out)) if out else None,
        "duration": _num(ev.get("duration_s"), ".3f"),
        "rate": _num(fig.get("sample_rate"), "d"),
        "channels": _num(fig.get("channels"), "d"),
        "formats": (f"{fig['input_subtype']} → {fig['output_subtype']} "
                    f"{fig['output_format']}") if fig else "",
        "snr": _num(ev.get("snr_db"), ".2f"),
        "snr_pred": _num(fig.get("snr_predicted_db"), ".2f"),
        "err": _num(fig.get("error_power_lsb2"), ".4f"),
        "err_pred": _num(fig.get("error_power_predicted_lsb2"), ".4f"),
        "method": (f"{fig.get('dither_applied')}, {fig.get('shaping')}") if fig else "",
        "kinds": ", ".join(ev.get("warning_kinds") or []),
        "chunks": " ".join(c.strip() for c in kept),
        "dropped": " ".join(c.strip() for c in meta.get("dropped") or []),
        "problem": problem,
        "seconds": _num(ev.get("seconds"), ".3f"),
        "sha": (ev.get("output_sha256") or "")[:12],
    }


def _env():
    import jinja2

    folder = os.path.join(os.path.dirname(os.path.abspath(__file__)), "templates")
    return jinja2.Environment(loader=jinja2.FileSystemLoader(folder), autoescape=True,
                              trim_blocks=True, lstrip_blocks=True,
                              undefined=jinja2.StrictUndefined)


class IndexBuilder:
    """The index page of a batch, built a row at a time as files finish.

    :meth:`add` takes each manifest event. Until :meth:`prepare` has loaded
    the templates it only keeps the event; after that it renders the row's
    cells at once (autoescaped). :func:`~requant.library.run_batch` prepares
    the builder when the first result is back, so with worker processes the
    templates load and the rows render while the workers convert, and the
    page at the end is only sorted and joined.
    """

    def __init__(self):
        self._cells = None
        self._page = None
        self._waiting = []
        self._rows = []

    def prepare(self):
        """Load jinja2 and the templates (idempotent), and render the rows kept so far."""
        if self._cells is not None:
            return
        env = _env()
        self._cells = env.get_template(_ROW_TEMPLATE).module.cells
        self._page = env.get_template(_TEMPLATE)
        waiting, self._waiting = self._waiting, []
        for ev in waiting:
            self.add(ev)

    def add(self, ev):
        """Take one manifest event (a row of the page)."""
        if self._cells is None:
            self._waiting.append(ev)
            return
        row = index_row(ev)
        self._rows.append((row["rank"], row["source"], row["status_class"], self._cells(row)))

    def render(self, summary):
        """The page as a string (HTML5), problem files first.

        Parameters
        ----------
        summary : dict
            The run summary (:func:`requant.library.run_batch`).
        """
        self.prepare()
        c = summary["counts"]
        t = summary["throughput"]

        def fmt(v, spec):
            return "n/a" if v is None else format(v, spec)

        facts = [
            ("converted", str(c.get("converted", 0))),
            ("up to date", str(c.get("up_to_date", 0))),
            ("failed", str(c.get("failed", 0))),
            ("not audio", str(c.get("not_audio", 0))),
            ("with warnings", str(len(summary["warnings"]))),
            ("audio converted", _clock(summary["converted_duration_s"])),
            ("wall time", f"{summary['wall_s']:.1f} s"),
            ("throughput", f"{fmt(t['files_per_s'], '.1f')} files/s, "
                           f"{fmt(t['audio_s_per_s'], '.0f')} audio s/s"),
            ("workers", f"{summary['jobs']} ({summary['executor']})"),
            ("run seed", str(summary["run_seed"])),
            ("settings id", summary["settings_id"][:16]),
        ]
        s = summary["settings"]
        settings_line = (f"{s['bits']} bits, {s['quantizer']}, dither {s['dither']}, shaping "
                         f"{s['shaping']}, format {s['format']}")
        rows = [(cls, cells) for _, _, cls, cells in
                sorted(self._rows, key=lambda r: (r[0], r[1]))]
        name = os.path.basename(summary["dst"].rstrip(os.sep)) or summary["dst"]
        return self._page.render(
            title=f"requant batch: {name}", summary=summary, facts=facts,
            settings_line=settings_line, rows=rows,
            generated=_dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
        )

    def write(self, path, summary):
        """Render the page and write it atomically (temporary file, then rename)."""
        from requant.audio_io.atomic import AtomicOutputs

        html = self.render(summary)
        with AtomicOutputs() as outs:
            tmp = outs.path_for(path)
            with open(tmp, "w", encoding="utf-8", errors="replace") as fh:
                fh.write(html)


def _built(events):
    builder = IndexBuilder()
    for ev in events:
        builder.add(ev)
    return builder


def render_index(events, summary):
    """The index page of ``events`` (manifest events of one run) as a string."""
    return _built(events).render(summary)


def write_index(path, events, summary):
    """Write the index page of ``events`` to ``path`` atomically."""
    _built(events).write(path, summary)


def _clock(seconds):
    seconds = float(seconds or 0.0)
    if seconds < 60:
        return f"{seconds:.1f} s"
    h, rem = divmod(int(round(seconds)), 3600)
    m, sec = divmod(rem, 60)
    return f"{h}:{m:02d}:{sec:02d}" if h else f"{m}:{sec:02d}"
