"""Writing the report: JSON, and (with pictures) HTML and Markdown.

Rendering only: the figures come from :mod:`requant.convert` and
:mod:`requant.dsp.analysis`. Every file goes through the caller's
:class:`~requant.audio_io.atomic.AtomicOutputs`, so a failure leaves nothing behind.
"""

import json
import os

__all__ = ["write_report", "json_ready"]


def json_ready(report):
    """The report without in-memory extras (keys starting with '_')."""
    return {k: v for k, v in report.items() if not k.startswith("_")}


def write_report(report, analyzer, path, outs):
    """Write ``report`` to ``path``; the extension picks the form.

    Parameters
    ----------
    report : dict
    analyzer : requant.dsp.analysis.ErrorAnalyzer or None
        Supplies the arrays behind the pictures (HTML, Markdown).
    path : path
        ``.json``, ``.html``/``.htm`` or ``.md``.
    outs : requant.audio_io.atomic.AtomicOutputs
        Hands out the temporary paths.
    """
    path = os.fspath(path)
    ext = os.path.splitext(path)[1].lower()
    if ext == ".json":
        tmp = outs.path_for(path)
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(json_ready(report), fh, indent=2, allow_nan=False)
            fh.write("\n")
        return
    from requant.report import render as report_render

    if ext in (".html", ".htm"):
        report_render.write_html(report, analyzer, path, outs)
    else:
        report_render.write_markdown(report, analyzer, path, outs)
