"""Writing the report: JSON, and (with pictures) HTML and Markdown.

Rendering only: the figures come from the typed report
(:class:`~requant.report.model.Report`, made by :mod:`requant.report.build`);
JSON is its :meth:`~requant.report.model.Report.to_dict`. Every file goes through the caller's
:class:`~requant.audio_io.atomic.AtomicOutputs`, so a failure leaves nothing behind.
"""

import json
import os

from requant.audio_io.writers import NON_FINITE_WARNING, json_safe, wrap_write_error

__all__ = ["write_report"]


def write_report(report, analyzer, path, outs):
    """Write ``report`` to ``path``; the extension picks the form.

    Parameters
    ----------
    report : requant.report.model.Report
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
        doc, replaced = json_safe(report.to_dict())
        if replaced:
            doc["warnings"].append(NON_FINITE_WARNING.format(n=replaced))
        try:
            with open(tmp, "w", encoding="utf-8") as fh:
                json.dump(doc, fh, indent=2, allow_nan=False)
                fh.write("\n")
        except OSError as exc:
            raise wrap_write_error(exc, path) from None
        return
    from requant.report import render as report_render

    if ext in (".html", ".htm"):
        report_render.write_html(report, analyzer, path, outs)
    else:
        report_render.write_markdown(report, analyzer, path, outs)
