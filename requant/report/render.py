"""HTML and Markdown renderings of the conversion report, with pictures.

Rendering only: the page's content comes from the typed report
(:class:`~requant.report.model.Report`) through :mod:`requant.report.tables`
(the tables and number formatting) and :mod:`requant.report.plots` (the
pictures, from the arrays an :class:`~requant.dsp.analysis.ErrorAnalyzer`
keeps after ``finish()``). This module escapes it and lays it out. Nothing
is measured here.

* :func:`write_html` writes one self-contained page: inline CSS, pictures as
  ``data:image/png;base64`` URIs, no script, no font, no link that leaves the
  page. It is rendered with jinja2 (``autoescape=True``), so every string --
  file names above all -- is escaped.
* :func:`write_markdown` writes Markdown with the pictures as PNG files
  beside it (:func:`picture_paths`), linked by percent-encoded relative
  names. File names are shown as code spans (literal text in every
  CommonMark renderer); all other text is backslash-escaped.

Every file is written to a temporary path handed out by the caller's
:class:`~requant.audio_io.atomic.AtomicOutputs`, after all the content has been
rendered in memory, so a failure leaves nothing behind.
"""

import base64
import os
import re
from urllib.parse import quote

from requant.report.plots import PICTURE_KINDS, PLOT_BANDS_PER_OCTAVE, render_pictures
from requant.report.tables import Code, page_context

__all__ = ["write_html", "write_markdown", "picture_paths", "render_pictures", "PICTURE_KINDS",
           "PLOT_BANDS_PER_OCTAVE"]

_CTRL = re.compile(r"[\x00-\x1f\x7f]")


# ------------------------------------------------------------------------------------------
# public API


def picture_paths(path):
    """The PNG files that :func:`write_markdown` may write beside ``path``.

    Parameters
    ----------
    path : str or os.PathLike
        The Markdown report.

    Returns
    -------
    dict of str
        Picture kind (:data:`PICTURE_KINDS`) -> path ``<stem><suffix>`` in the
        report's folder. Which of them are written depends on the conversion
        (the noise transfer only when shaped, the time view only when a quiet
        passage was found); callers that refuse to overwrite files should
        check all of them.
    """
    path = os.fspath(path)
    folder, name = os.path.split(path)
    # a name that is not valid UTF-8 cannot be written in a link: name the pictures without
    # the bytes that are not
    stem = os.path.splitext(name)[0].encode("utf-8", "surrogateescape").decode("utf-8", "replace")
    stem = stem.replace("\ufffd", "_")
    return {kind: os.path.join(folder, stem + suffix) for kind, suffix in PICTURE_KINDS.items()}


def write_html(report, analyzer, path, outs):
    """Write the report as one self-contained HTML page.

    Parameters
    ----------
    report : requant.report.model.Report
        As returned by :func:`requant.convert.convert_file`.
    analyzer : requant.dsp.analysis.ErrorAnalyzer or None
        After ``finish()``; supplies the arrays behind the pictures. None
        writes the tables only.
    path : str or os.PathLike
        The page to write (``.html``).
    outs : requant.audio_io.atomic.AtomicOutputs
        Hands out the temporary path; the file appears under ``path`` only
        when the caller commits.

    Raises
    ------
    OutputError
        If the temporary file cannot be written.
    """
    path = os.fspath(path)
    pictures = render_pictures(report, analyzer)
    ctx = page_context(report, analyzer, bands_per_octave=PLOT_BANDS_PER_OCTAVE)
    ctx["pictures"] = [
        dict(p, src="data:image/png;base64," + base64.b64encode(p["png"]).decode("ascii"))
        for p in pictures
    ]
    text = _html_env().get_template("report.html.j2").render(**ctx)
    _write_text(outs, path, text)


def write_markdown(report, analyzer, path, outs):
    """Write the report as Markdown, with the pictures as PNG files beside it.

    Parameters
    ----------
    report : requant.report.model.Report
        As returned by :func:`requant.convert.convert_file`.
    analyzer : requant.dsp.analysis.ErrorAnalyzer or None
        After ``finish()``; None writes the tables only (and no PNG).
    path : str or os.PathLike
        The Markdown file (``.md``); the pictures are named by
        :func:`picture_paths`.
    outs : requant.audio_io.atomic.AtomicOutputs
        Hands out every temporary path (the report's and each picture's).

    Raises
    ------
    OutputError
        If a temporary file cannot be written.
    """
    path = os.fspath(path)
    pictures = render_pictures(report, analyzer)
    names = picture_paths(path)
    ctx = _md_context(page_context(report, analyzer, bands_per_octave=PLOT_BANDS_PER_OCTAVE))
    ctx["pictures"] = [{
        "title": _Md(_md_text(p["title"])),
        "caption": _Md(_md_text(p["caption"])),
        "link": _Md(quote(os.path.basename(names[p["kind"]]), safe="")),
    } for p in pictures]
    text = _md_env().get_template("report.md.j2").render(**ctx)
    for p in pictures:
        _write_bytes(outs, names[p["kind"]], p["png"])
    _write_text(outs, path, text)



# ------------------------------------------------------------------------------------------
# writing


def _write_text(outs, path, text):
    tmp = outs.path_for(path)
    try:
        # a file name that is not valid UTF-8 is shown with \xNN escapes: the page stays text
        text = text.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")
        with open(tmp, "w", encoding="utf-8", newline="\n") as fh:
            fh.write(text)
    except OSError as exc:
        raise _output_error(exc, path) from None


def _write_bytes(outs, path, data):
    tmp = outs.path_for(path)
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
    except OSError as exc:
        raise _output_error(exc, path) from None


def _output_error(exc, path):
    from requant.errors import OutputError

    return OutputError(f"writing the report {path!r} failed ({exc.strerror or exc}); "
                       "check the destination's space and permissions")


# ------------------------------------------------------------------------------------------
# templates


_ENVS = {}


def _loader():
    import jinja2

    return jinja2.PackageLoader("requant.report", "templates")


def _html_env():
    if "html" not in _ENVS:
        import jinja2

        env = jinja2.Environment(loader=_loader(), autoescape=True, trim_blocks=True,
                                 lstrip_blocks=True, undefined=jinja2.StrictUndefined)
        env.tests["code"] = lambda v: isinstance(v, Code)
        _ENVS["html"] = env
    return _ENVS["html"]


class _Md(str):
    """Markdown that has already been escaped (or built from escaped parts)."""


def _md_finalize(value):
    # Every {{ }} in the Markdown template goes through here: anything not
    # marked as escaped is escaped, so a forgotten filter cannot leak markup.
    if isinstance(value, _Md):
        return value
    if value is None:
        return ""
    return _md_text(value)


def _md_env():
    if "md" not in _ENVS:
        import jinja2

        _ENVS["md"] = jinja2.Environment(loader=_loader(), autoescape=False, trim_blocks=True,
                                         lstrip_blocks=True, keep_trailing_newline=True,
                                         finalize=_md_finalize, undefined=jinja2.StrictUndefined)
    return _ENVS["md"]


# Characters with a meaning inside a Markdown line (CommonMark, GitHub's
# extensions: tables, strikethrough, math). Any ASCII punctuation may be
# backslash-escaped (CommonMark 0.31, section 2.4).
_MD_INLINE = frozenset("\\`*_{}[]<>|&~$!")


def _md_text(s, *, block=False):
    """Backslash-escape text for Markdown; ``block`` also guards a line start."""
    s = _CTRL.sub("\ufffd", str(s))
    out = "".join("\\" + ch if ch in _MD_INLINE else ch for ch in s)
    if block:  # no indented code block, list, heading or setext underline
        out = out.lstrip()
        m = re.match(r"([-+=#]|\d+[.)])", out)
        if m:
            i = m.end() - 1
            out = out[:i] + "\\" + out[i:]
    return out


def _md_code(s, *, table=False):
    """A code span showing ``s`` literally (a fence longer than any backtick run)."""
    s = _CTRL.sub("\ufffd", str(s))
    if not s:
        return ""
    longest = max((len(r) for r in re.findall(r"`+", s)), default=0)
    fence = "`" * (longest + 1)
    pad = ""
    if s.startswith("`") or s.endswith("`") or (
            s.startswith(" ") and s.endswith(" ") and s.strip()):
        pad = " "
    if table:  # GitHub tables split cells at | even inside code spans
        s = s.replace("|", "\\|")
    return f"{fence}{pad}{s}{pad}{fence}"


def _md_context(ctx):
    """The shared context with every string made Markdown-safe."""
    def cell(v):
        return _Md(_md_code(v, table=True) if isinstance(v, Code) else _md_text(v))

    tables = []
    for t in ctx["tables"]:
        tables.append({
            "title": _Md(_md_text(t["title"])),
            "intro": None if t["intro"] is None else _Md(_md_text(t["intro"], block=True)),
            "head_line": _Md("| " + " | ".join(cell(h) for h in t["head"]) + " |"),
            "rule": _Md("|" + "|".join("---:" if n else "---" for n in t["numeric"]) + "|"),
            "row_lines": [_Md("| " + " | ".join(cell(c) for c in r) + " |") for r in t["rows"]],
        })
    return dict(
        ctx,
        title_name=_Md(_md_code(ctx["title_name"])),
        input_path=_Md(_md_code(ctx["input_path"])),
        output_path=_Md(_md_code(ctx["output_path"])),
        headline=_Md(_md_text(ctx["headline"], block=True)),
        advice=None if ctx["advice"] is None else _Md(_md_text(ctx["advice"], block=True)),
        warnings=[_Md(_md_text(w, block=True)) for w in ctx["warnings"]],
        notes=[_Md(_md_text(n, block=True)) for n in ctx["notes"]],
        tables=tables,
        per_bin_rule=_Md(_md_text(ctx["per_bin_rule"], block=True)),
        no_pictures=(None if ctx["no_pictures"] is None
                     else _Md(_md_text(ctx["no_pictures"], block=True))),
    )
