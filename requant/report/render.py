"""HTML and Markdown renderings of the conversion report, with pictures.

Rendering only: every figure comes from the report dict built by
:mod:`requant.convert` and from the arrays an
:class:`~requant.dsp.analysis.ErrorAnalyzer` keeps after ``finish()``. Nothing
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

Pictures are drawn with a bare :class:`matplotlib.figure.Figure` on the Agg
canvas (no pyplot, no change of the global backend); matplotlib is imported
only inside the functions that draw.

Conventions
-----------
Levels per bin: the noise power in one bin of width ``fs/L`` (``L`` the
Welch segment length), ``10·log10(2·PSD·fs/L)`` dBFS, where ``PSD`` is the
one-sided density in full scale²/Hz. The factor 2 makes a full-scale sine
read 0 dBFS (AES17). The spectrum pictures average this power over
1/:data:`PLOT_BANDS_PER_OCTAVE`-octave bands where bins are denser than
that; a band mean of per-bin powers is still a per-bin level.
"""

import base64
import io
import math
import os
import re
from urllib.parse import quote

import numpy as np

__all__ = ["write_html", "write_markdown", "picture_paths", "render_pictures", "PICTURE_KINDS",
           "PLOT_BANDS_PER_OCTAVE"]

#: Pictures in report order: kind -> file-name suffix of the Markdown PNG.
PICTURE_KINDS = {
    "error_spectrum": "_error_spectrum.png",
    "noise_transfer": "_noise_transfer.png",
    "error_histogram": "_error_histogram.png",
    "quiet_passage": "_quiet_passage.png",
}
#: Bands per octave of the averaging in the spectrum pictures.
PLOT_BANDS_PER_OCTAVE = 48
#: Length of the time view around the quietest passage, seconds.
TIME_VIEW_S = 0.006

_DPI = 96
_COLORS = ("#1f5fa8", "#c0392b", "#2e7d32", "#7b3fa0", "#d9822b", "#00838f", "#6d4c41",
           "#ad1457")
_PRED = "#1a1a1a"
_FREQ_TICKS = (10, 20, 50, 100, 200, 500, 1000, 2000, 5000, 10000, 20000, 50000, 100000,
               200000)
_MINUS_INF = "\u2212\u221e"
_PLUS_INF = "+\u221e"
_NA = "n/a"
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
    stem = os.path.splitext(name)[0]
    return {kind: os.path.join(folder, stem + suffix) for kind, suffix in PICTURE_KINDS.items()}


def write_html(report, analyzer, path, outs):
    """Write the report as one self-contained HTML page.

    Parameters
    ----------
    report : dict
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
    ctx = _context(report, analyzer)
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
    report : dict
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
    ctx = _md_context(_context(report, analyzer))
    ctx["pictures"] = [{
        "title": _Md(_md_text(p["title"])),
        "caption": _Md(_md_text(p["caption"])),
        "link": _Md(quote(os.path.basename(names[p["kind"]]), safe="")),
    } for p in pictures]
    text = _md_env().get_template("report.md.j2").render(**ctx)
    for p in pictures:
        _write_bytes(outs, names[p["kind"]], p["png"])
    _write_text(outs, path, text)


def render_pictures(report, analyzer):
    """Draw the report's pictures as PNG bytes, in report order.

    Parameters
    ----------
    report : dict
    analyzer : requant.dsp.analysis.ErrorAnalyzer or None

    Returns
    -------
    list of dict
        Each with ``kind`` (a key of :data:`PICTURE_KINDS`), ``title``,
        ``caption``, ``alt`` and ``png`` (bytes). Empty without an analyzer.
        With one there are always the error spectrum and the histogram (with
        the prediction alone when the file is too short to measure), plus the
        noise transfer when shaped and the time view when a quiet passage
        was found.
    """
    if analyzer is None or getattr(analyzer, "freqs", None) is None:
        return []
    out = [_plot_error_spectrum(report, analyzer)]
    if np.asarray(analyzer.coeffs).size:
        out.append(_plot_noise_transfer(report, analyzer))
    out.append(_plot_histogram(report, analyzer))
    if getattr(analyzer, "quiet_samples", None) is not None:
        out.append(_plot_quiet_passage(report, analyzer))
    return out


# ------------------------------------------------------------------------------------------
# writing


def _write_text(outs, path, text):
    tmp = outs.path_for(path)
    try:
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
        env.tests["code"] = lambda v: isinstance(v, _Code)
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


# ------------------------------------------------------------------------------------------
# formatting


class _Code(str):
    """A user-supplied name shown literally (HTML <code>, a Markdown code span)."""


def _num(v, fmt=".2f", *, none=_NA, signed=False):
    if v is None:
        return none
    v = float(v)
    if math.isnan(v):
        return _NA
    if math.isinf(v):
        return _PLUS_INF if v > 0 else _MINUS_INF
    m = re.fullmatch(r"\.(\d+)f", fmt)
    if m:
        v = round(v, int(m.group(1))) + 0.0  # no "-0.00"
        if v == 0.0:
            v = 0.0
    return format(v, ("+" if signed else "") + fmt)


def _pct(v):
    if v is None:
        return _NA
    p = 100.0 * float(v)
    if 0.0 < p < 0.01:
        return "< 0.01 %"
    return f"{p:.2f} %"


def _int(v):
    return _NA if v is None else f"{int(v):,}".replace(",", "\u2009")


def _diff_db(m, p):
    if m is None or p is None:
        return ""
    return _num(m - p, signed=True)


def _ratio_db(m, p):
    if not m or not p or m <= 0 or p <= 0:
        return ""
    return _num(10.0 * math.log10(m / p), signed=True)


def _zero_db(power):
    """How to show a dB figure that is None, given the power behind it."""
    if power is None:
        return _NA
    return _MINUS_INF if power == 0 else _NA


def _snr(snr, *, signal_db, error_power):
    if snr is not None:
        return _num(snr)
    if error_power is None:
        return _NA
    if signal_db is None:
        return _NA + " (silent input)"
    return _PLUS_INF if error_power == 0 else _NA


def _dc(v, scale):
    return _NA if v is None else _num(v * scale, ".3f", signed=True)


def _seconds(v):
    return _NA if v is None else f"{v:.3f} s"


# ------------------------------------------------------------------------------------------
# the page's content (shared by both renderings)


def _table(ident, title, head, rows, *, intro=None, numeric=None, fold=False):
    if numeric is None:
        numeric = [False] + [True] * (len(head) - 1)
    return {"id": ident, "title": title, "head": head, "rows": rows, "intro": intro,
            "numeric": numeric, "fold": fold}


def _context(report, analyzer):
    s = report.get("settings", {})
    inp = report.get("input", {})
    out = report.get("output", {})
    m = report.get("measured", {})
    p = report.get("predicted", {})
    an = report.get("analysis") or {}
    bits = s.get("bits")
    scale = 2.0 ** (bits - 1) if bits else 1.0
    have_spectrum = an.get("spectrum") is not None
    passthrough = bool(out.get("passthrough"))
    tables = [
        _main_table(m, p, have_spectrum=have_spectrum),
        _correlated_table(m, an),
        _peaks_table(m, an),
        _channel_noise_table(report, have_spectrum=have_spectrum),
        _channel_levels_table(report, scale),
        _settings_table(report),
        _files_table(report),
    ]
    shaping = _shaping_table(report, passthrough=passthrough)
    if shaping is not None:
        tables.append(shaping)
    method = _method_table(report, analyzer)
    if method is not None:
        tables.append(method)
    bands = _bands_table(report)
    if bands is not None:
        tables.append(bands)
    name = os.path.basename(inp.get("path") or "") or "(unnamed input)"
    return {
        "title_name": _Code(name),
        "input_path": _Code(inp.get("path") or ""),
        "output_path": _Code(out.get("path") or ""),
        "headline": _headline(report),
        "warnings": [str(w) for w in report.get("warnings") or []],
        "notes": [str(n) for n in report.get("notes") or []],
        "tables": tables,
        "version": str(report.get("requant_version") or ""),
        "created": str(report.get("created") or ""),
        "per_bin_rule": ("Spectrum levels are per bin: the noise power in one bin of width "
                         "fs/L (L = Welch segment length), 10·log10(2·PSD·fs/L) dBFS, "
                         "where PSD is the one-sided density in full scale²/Hz; the factor 2 "
                         "makes a full-scale sine read 0 dBFS (AES17)."),
        "no_pictures": ("No pictures: the error was not analysed for this report."
                        if analyzer is None else None),
    }


def _headline(report):
    s = report.get("settings", {})
    if report.get("output", {}).get("passthrough"):
        return (f"{s.get('bits')}-bit output, written unchanged: the input already lay on "
                f"the {s.get('bits')}-bit grid, so no dither or noise shaping was applied.")
    return (f"{s.get('bits')}-bit output, quantizer {s.get('quantizer')}, dither "
            f"{s.get('dither_applied')}, noise shaping {s.get('shaping') or 'none'}.")


def _predicted_weighted(p, key):
    """A predicted weighted figure; −∞ whenever the model predicts no error at all.

    (A pass-through predicts zero error power; its weighted figures must agree.)
    """
    if p.get("error_power_lsb2") == 0:
        return _MINUS_INF
    return _num(p.get(key), none=_NA)


def _main_table(m, p, *, have_spectrum):
    mp, pp = m.get("error_power_lsb2"), p.get("error_power_lsb2")
    w_none_m = _NA if not have_spectrum else _zero_db(mp)
    rows = [
        ["SNR (signal over error power), dB",
         _snr(m.get("snr_db"), signal_db=m.get("signal_rms_dbfs"), error_power=mp),
         _snr(p.get("snr_db"), signal_db=m.get("signal_rms_dbfs"), error_power=pp),
         _diff_db(m.get("snr_db"), p.get("snr_db"))],
        ["error power, LSB²", _num(mp, ".5g"), _num(pp, ".5g"), _ratio_db(mp, pp)],
        ["error RMS, dBFS", _num(m.get("error_rms_dbfs"), none=_zero_db(mp)),
         _num(p.get("error_rms_dbfs"), none=_zero_db(pp)),
         _diff_db(m.get("error_rms_dbfs"), p.get("error_rms_dbfs"))],
        ["A-weighted noise (IEC 61672-1), dBFS",
         _num(m.get("a_weighted_noise_dbfs"), none=w_none_m),
         _predicted_weighted(p, "a_weighted_noise_dbfs"),
         "" if pp == 0 else _diff_db(m.get("a_weighted_noise_dbfs"),
                                     p.get("a_weighted_noise_dbfs"))],
        ["ITU-R BS.468-4 weighted noise, RMS detector (not the standard's quasi-peak), dBFS",
         _num(m.get("itu468_noise_dbfs"), none=w_none_m),
         _predicted_weighted(p, "itu468_noise_dbfs"),
         "" if pp == 0 else _diff_db(m.get("itu468_noise_dbfs"), p.get("itu468_noise_dbfs"))],
        ["error mean, LSB", _num(m.get("error_mean_lsb"), ".4f", signed=True), "", ""],
        ["error peak, dBFS", _num(m.get("error_peak_dbfs"), none=_zero_db(mp)), "", ""],
        ["signal RMS, dBFS", _num(m.get("signal_rms_dbfs"), none=_zero_db(mp)), "", ""],
    ]
    return _table("figures", "Measured and predicted", ["figure", "measured", "predicted",
                                                        "measured − predicted, dB"], rows,
                  intro="All channels together. The prediction is the dither model times the "
                        "noise-shaping filter's gain; weighted figures are normalised to 0 dB "
                        "at 1 kHz.")


def _correlated_table(m, an):
    from requant.dsp.analysis import CORRELATED_WARNING_FRACTION

    q = an.get("quietest_passage") if an else None
    flagged = m.get("signal_correlated")
    verdict = _NA if flagged is None else (
        "yes: the error follows the signal (distortion)" if flagged else
        "no: the error behaves as steady noise")
    rows = [
        ["signal-correlated error", verdict],
        ["share of the error power that follows the signal (larger of whole and quietest)",
         _pct(m.get("correlated_error_fraction"))],
        ["whole signal: explained by a linear function of the input",
         _pct(m.get("correlation_fraction"))],
        ["whole signal: tonal (narrow peaks above the noise floor)",
         _pct(m.get("tonal_fraction"))],
    ]
    if q:
        rows += [
            ["quietest passage: start, length",
             f"{_seconds(q.get('start_s'))}, {_seconds(q.get('duration_s'))}"],
            ["quietest passage: signal RMS, dBFS", _num(q.get("signal_rms_dbfs"),
                                                        none=_MINUS_INF)],
            ["quietest passage: error RMS, dBFS", _num(q.get("error_rms_dbfs"),
                                                       none=_MINUS_INF)],
            ["quietest passage: error power measured / predicted, LSB²",
             f"{_num(q.get('error_power_lsb2'), '.5g')} / "
             f"{_num(q.get('predicted_error_power_lsb2'), '.5g')}"],
            ["quietest passage: error power from the prediction, dB",
             _num(q.get("error_power_deviation_db"), signed=True, none=_MINUS_INF)],
            ["quietest passage: linear share / tonal share",
             f"{_pct(q.get('correlation_fraction'))} / {_pct(q.get('tonal_fraction'))}"],
        ]
    elif an:
        rows.append(["quietest passage", "none found (the file is shorter than one window, "
                                         "or digital silence)"])
    return _table("correlated", "Signal-correlated error", ["figure", "value"], rows,
                  numeric=[False, False],
                  intro=f"A warning is given above {100 * CORRELATED_WARNING_FRACTION:.0f} %. "
                        "With TPDF dither the error does not depend on the signal, so both "
                        "shares stay near zero; undithered requantization of quiet passages "
                        "drives them towards 100 %.")


def _peaks_table(m, an):
    tp = an.get("true_peak") if an else None
    none = _MINUS_INF if tp is not None else _NA
    rows = [
        ["input true peak (ITU-R BS.1770-4), dBTP", _num(m.get("input_true_peak_dbtp"),
                                                          none=none)],
        ["output true peak (ITU-R BS.1770-4), dBTP", _num(m.get("output_true_peak_dbtp"),
                                                           none=none)],
        ["input samples beyond full scale", _int(m.get("over_full_scale_samples"))],
        ["output samples clipped at the end of the range", _int(m.get("clipped_samples"))],
        ["noise-shaping loop overloads", _int(m.get("shaping_overloads"))],
    ]
    return _table("peaks", "Peaks and clipping", ["figure", "value"], rows, numeric=[False, False])


def _channel_noise_table(report, *, have_spectrum):
    rows = []
    for ch in report.get("channels") or []:
        cm, cp = ch.get("measured", {}), ch.get("predicted", {})
        mp, pp = cm.get("error_power_lsb2"), cp.get("error_power_lsb2")
        wn = _NA if not have_spectrum else _zero_db(mp)
        rows.append([
            str(ch.get("channel")),
            _snr(cm.get("snr_db"), signal_db=cm.get("signal_rms_dbfs"), error_power=mp),
            _snr(cp.get("snr_db"), signal_db=cm.get("signal_rms_dbfs"), error_power=pp),
            _num(mp, ".5g"), _num(pp, ".5g"),
            _num(cm.get("a_weighted_noise_dbfs"), none=wn),
            _predicted_weighted(cp, "a_weighted_noise_dbfs"),
            _num(cm.get("itu468_noise_dbfs"), none=wn),
            _predicted_weighted(cp, "itu468_noise_dbfs"),
            _pct(cm.get("correlated_error_fraction")),
        ])
    head = ["channel", "SNR dB", "predicted", "error LSB²", "predicted", "A-wtd dBFS",
            "predicted", "468-wtd dBFS", "predicted", "signal-correlated"]
    return _table("channels", "Per channel: noise", head, rows,
                  intro="468-weighted with an RMS detector (not the standard's quasi-peak).")


def _channel_levels_table(report, scale):
    an = report.get("analysis") or {}
    tp_none = _MINUS_INF if an.get("true_peak") is not None else _NA
    rows = []
    for ch in report.get("channels") or []:
        cm = ch.get("measured", {})
        rows.append([
            str(ch.get("channel")),
            _num(cm.get("signal_rms_dbfs"), none=_zero_db(cm.get("error_power_lsb2"))),
            _num(cm.get("input_true_peak_dbtp"), none=tp_none),
            _num(cm.get("output_true_peak_dbtp"), none=tp_none),
            _dc(cm.get("input_dc_offset"), scale),
            _dc(cm.get("output_dc_offset"), scale),
            _int(cm.get("clipped_samples")),
        ])
    head = ["channel", "signal RMS dBFS", "true peak in dBTP", "true peak out dBTP",
            "DC offset in, LSB", "DC offset out, LSB", "clipped samples"]
    return _table("levels", "Per channel: levels, DC offset, clipping", head, rows,
                  intro="DC offsets (the mean) in LSB of the output word length, "
                        "1 LSB = 2^−(bits−1) of full scale; the JSON report holds them as "
                        "fractions of full scale.")


def _settings_table(report):
    s = report.get("settings", {})
    q = {"round": "round (to nearest, mid-tread)",
         "truncate": "truncate (toward minus infinity)"}.get(s.get("quantizer"),
                                                             str(s.get("quantizer")))
    applied = s.get("dither_applied")
    dither = str(s.get("dither"))
    if applied != s.get("dither"):
        dither += f" asked, {applied} applied"
        if report.get("output", {}).get("passthrough"):
            dither += " (the input already lay on the output grid)"
    coeffs = s.get("shaping_coeffs") or []
    shaping = str(s.get("shaping") or "none")
    if coeffs:
        shaping += f" (order {len(coeffs)})"
    rows = [
        ["word length", f"{s.get('bits')} bits"],
        ["quantizer", q],
        ["dither", dither],
        ["noise shaping", shaping],
        ["seed", str(s.get("seed"))],
        ["block frames", _int(s.get("block_frames"))],
        ["dither forced on on-grid input", "yes" if s.get("force_dither") else "no"],
    ]
    return _table("settings", "Settings", ["setting", "value"], rows,
                  numeric=[False, False])


def _files_table(report):
    inp = report.get("input", {})
    out = report.get("output", {})
    err = report.get("error_signal")
    rate = inp.get("sample_rate")
    rows = [
        ["input", _Code(inp.get("path") or "")],
        ["input format", f"{inp.get('format')} {inp.get('subtype')}, {_int(rate)} Hz, "
                         f"{inp.get('channels')} channel(s)"],
        ["input length", f"{_int(inp.get('frames'))} frames, "
                         f"{_num(inp.get('duration_s'), '.3f')} s"],
        ["output", _Code(out.get("path") or "")],
        ["output format", f"{out.get('format')} {out.get('subtype')}, {out.get('bits')}-bit "
                          f"words, {out.get('container_bits')}-bit container"],
    ]
    if out.get("passthrough"):
        rows.append(["pass-through", "yes: written unchanged"])
    if err:
        rows.append(["error signal", _Code(err.get("path") or "")])
        rows.append(["error signal format", f"{err.get('format')} {err.get('subtype')}"])
    meta = out.get("metadata")
    if isinstance(meta, dict):
        for key, label in (("copied", "metadata chunks copied"),
                           ("rewritten", "metadata chunks rewritten"),
                           ("dropped", "metadata chunks dropped"), ("tags", "text tags")):
            if meta.get(key):
                rows.append([label, " ".join(str(c).strip() for c in meta[key])])
        if meta.get("error"):
            rows.append(["metadata problem", str(meta["error"])])
    return _table("files", "Files", ["file", "value"], rows, numeric=[False, False])


def _shaping_table(report, *, passthrough):
    s = report.get("settings", {})
    coeffs = s.get("shaping_coeffs") or []
    rate = report.get("input", {}).get("sample_rate")
    if not coeffs or not rate:
        return None
    from requant.dsp.shaping import describe

    d = describe(coeffs, rate)
    wg, gc = d["weighted_gain_db"], d["gerzon_craven_bound_db"]
    names = {"a": "A-weighted", "itu468": "ITU-R 468-weighted",
             "threshold": "hearing-threshold-weighted"}
    rows = [
        ["applied", "no: the input was written unchanged" if passthrough else "yes"],
        ["order", str(d["order"])],
        ["total noise power gain Σn², dB", _num(d["noise_gain_db"], signed=True)],
    ]
    for k in ("a", "itu468", "threshold"):
        if k in wg:
            rows.append([f"{names[k]} noise against plain TPDF, dB (lowest possible)",
                         f"{_num(wg[k], signed=True)} ({_num(-gc[k], signed=True)})"
                         if k in gc else _num(wg[k], signed=True)])
    rows += [
        ["mean of 10·log10|NTF|² over 0..fs/2, dB",
         _num(d["gerzon_craven_mean_log_db"], ".3f", signed=True)],
        ["minimum phase", "yes" if d["minimum_phase"] else "no"],
        ["feedback coefficients h", ", ".join(f"{v:.6g}" for v in d["coefficients"])],
    ]
    return _table("shaping", "Noise-shaping filter", ["figure", "value"], rows,
                  numeric=[False, False],
                  intro="NTF(z) = 1 − Σ h_k z^−k. The best possible figure is the bound of "
                        "Gerzon & Craven (1989) for a minimum-phase filter with leading "
                        "coefficient 1.")


def _method_table(report, analyzer):
    an = report.get("analysis") or {}
    meth = an.get("method")
    if not meth:
        return None
    rate = report.get("input", {}).get("sample_rate") or 0
    L = meth.get("segment_frames")
    stride = meth.get("segment_stride") or 1
    rows = [
        ["spectrum estimate", str(meth.get("psd"))],
        ["segment length L", f"{_int(L)} frames"
                             + (f" ({1000.0 * L / rate:.1f} ms)" if L and rate else "")],
        ["overlap", "50 %"],
        ["segments analysed per channel", _int(meth.get("segments_per_channel"))
         + ("" if stride == 1 else f" (every {stride}th, spread over the file)")],
        ["frequency resolution fs/L", f"{_num(meth.get('frequency_resolution_hz'), '.3f')} Hz"],
        ["ITU-R BS.468-4 detector", str(meth.get("itu468_detector"))],
        ["levels per bin", "10·log10(2·PSD·fs/L) dBFS: the noise power in one bin of width "
                           "fs/L (AES17: a full-scale sine reads 0 dBFS)"],
        ["weightings", "A: IEC 61672-1; 468: ITU-R BS.468-4; both 0 dB at 1 kHz"],
        ["error histogram", "from the analysed segments (each sample counted once per "
                            "segment it falls in)"],
    ]
    if analyzer is not None:
        rows.append(["pictures", f"spectra averaged in 1/{PLOT_BANDS_PER_OCTAVE}-octave bands "
                                 "where bins are denser than that"])
    return _table("method", "How the error was analysed", ["item", "value"], rows,
                  numeric=[False, False])


def _bands_table(report):
    sp = (report.get("analysis") or {}).get("spectrum")
    if not sp or not sp.get("band_centers_hz"):
        return None
    nch = len(sp["measured_dbfs_per_bin"][0]) if sp["measured_dbfs_per_bin"] else 0

    def lvl(v):
        return _MINUS_INF if v is None or v <= -399.0 else f"{v:.2f}"

    rows = []
    for fc, meas, pred in zip(sp["band_centers_hz"], sp["measured_dbfs_per_bin"],
                              sp["predicted_dbfs_per_bin"]):
        rows.append([f"{fc:,.0f}".replace(",", "\u2009")] + [lvl(v) for v in meas] + [lvl(pred)])
    head = ["band centre Hz"] + [f"channel {c + 1} dBFS" for c in range(nch)] + ["predicted dBFS"]
    return _table("bands", f"Error spectrum in {sp.get('bands', 'fractional-octave')} bands",
                  head, rows, fold=True,
                  intro="The mean per-bin level in each band (dBFS per bin of width fs/L).")


def _md_context(ctx):
    """The shared context with every string made Markdown-safe."""
    def cell(v):
        return _Md(_md_code(v, table=True) if isinstance(v, _Code) else _md_text(v))

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
        warnings=[_Md(_md_text(w, block=True)) for w in ctx["warnings"]],
        notes=[_Md(_md_text(n, block=True)) for n in ctx["notes"]],
        tables=tables,
        per_bin_rule=_Md(_md_text(ctx["per_bin_rule"], block=True)),
        no_pictures=(None if ctx["no_pictures"] is None
                     else _Md(_md_text(ctx["no_pictures"], block=True))),
    )


# ------------------------------------------------------------------------------------------
# pictures


def _figure(width, height, rows=1, *, sharex=True, height_ratios=None):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=_DPI)
    FigureCanvasAgg(fig)
    kw = {"height_ratios": height_ratios} if height_ratios else None
    axs = fig.subplots(rows, 1, sharex=sharex, squeeze=False, gridspec_kw=kw)[:, 0]
    return fig, list(axs)


def _png(fig):
    buf = io.BytesIO()
    # zlib level 1: a third faster than the default 6 for about 8 % more bytes
    fig.savefig(buf, format="png", dpi=_DPI, facecolor="white",
                metadata={"Software": None}, pil_kwargs={"compress_level": 1})
    return buf.getvalue()


def _hz_label(v, _pos=None):
    if v >= 1000:
        k = v / 1000.0
        return f"{k:g}k"
    return f"{v:g}"


def _freq_axis(ax, lo, hi):
    from matplotlib.ticker import FixedLocator, FuncFormatter, NullLocator

    ax.set_xscale("log")
    ax.xaxis.set_major_locator(FixedLocator([t for t in _FREQ_TICKS if lo <= t <= hi]))
    ax.xaxis.set_major_formatter(FuncFormatter(_hz_label))
    ax.xaxis.set_minor_locator(NullLocator())
    ax.set_xlim(lo, hi)


def _style(ax, *, ylabel=None, xlabel=None):
    from matplotlib.ticker import MaxNLocator

    ax.yaxis.set_major_locator(MaxNLocator(7))
    ax.grid(True, color="#d0d0d0", lw=0.6)
    ax.tick_params(labelsize=8)
    if ylabel:
        ax.set_ylabel(ylabel, fontsize=9)
    if xlabel:
        ax.set_xlabel(xlabel, fontsize=9)


def _legend(ax, loc="best"):
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc=loc, fontsize=7.5, framealpha=0.85)


def _note(ax, text):
    ax.text(0.5, 0.5, text, transform=ax.transAxes, ha="center", va="center", fontsize=9,
            color="#555555", wrap=True)


def _log_bands(freqs, power, per_octave=PLOT_BANDS_PER_OCTAVE):
    """Average ``power`` (last axis = FFT bins) in log-spaced bands.

    Bins 1..L/2-1 only: 0 Hz has no place on a log axis, and the Nyquist
    bin of a one-sided PSD holds half a bin's power. Returns band centre
    frequencies (mean of the bins' frequencies) and the band-mean power.
    """
    f = np.asarray(freqs[1:-1], dtype=np.float64)
    p = np.asarray(power, dtype=np.float64)[..., 1:-1]
    band = np.floor(np.log2(f / f[0]) * per_octave + 1e-9).astype(np.int64)
    starts = np.flatnonzero(np.r_[True, band[1:] != band[:-1]])
    counts = np.diff(np.r_[starts, f.size])
    fc = np.add.reduceat(f, starts) / counts
    pm = np.add.reduceat(p, starts, axis=-1) / counts
    return fc, pm


def _per_bin_db(psd, df):
    p = np.asarray(psd, dtype=np.float64) * (2.0 * df)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(p > 0.0, 10.0 * np.log10(np.where(p > 0.0, p, 1.0)), np.nan)


def _ylim(ax, arrays, *, span=90.0, pad=5.0, min_range=20.0):
    vals = [np.asarray(a, dtype=np.float64).ravel() for a in arrays]
    vals = [v[np.isfinite(v)] for v in vals if v.size]
    vals = np.concatenate(vals) if vals else np.zeros(0)
    if vals.size == 0:
        return
    hi = float(vals.max()) + pad
    lo = max(float(vals.min()) - pad, hi - span)
    if hi - lo < min_range:
        mid = 0.5 * (hi + lo)
        lo, hi = mid - min_range / 2, mid + min_range / 2
    ax.set_ylim(lo, hi)


def _channel_label(c, nch):
    return "measured" if nch == 1 else f"measured, channel {c + 1}"


def _fmt_total(v, power):
    if v is None:
        return _zero_db(power)
    return f"{v:.2f}"


def _plot_error_spectrum(report, an):
    from requant.dsp.weighting import weighting_power

    rate = float(an.rate)
    df = rate / an.L
    freqs = np.asarray(an.freqs, dtype=np.float64)
    passthrough = bool(report.get("output", {}).get("passthrough"))
    m, p = report.get("measured", {}), report.get("predicted", {})
    fig, (ax1, ax2) = _figure(8.0, 6.4, 2)
    lo, hi = freqs[1], rate / 2.0
    wa = weighting_power("a", freqs)
    wi = weighting_power("itu468", freqs)
    pred = None if passthrough else an.predicted_psd(freqs)
    shown1, shown2 = [], []
    psd = an.psd_error
    silent = psd is not None and not np.any(psd[:, 1:-1] > 0)
    if silent:
        for ax in (ax1, ax2):
            _note(ax, "no error: the output equals the input")
    elif psd is not None:
        nch = psd.shape[0]
        for c in range(nch):
            fc, pm = _log_bands(freqs, psd[c])
            y = _per_bin_db(pm, df)
            shown1.append(y)
            ax1.plot(fc, y, color=_COLORS[c % len(_COLORS)], lw=1.0, label=_channel_label(c, nch))
        mean = psd.mean(axis=0)
        for w, color, name, key in ((wa, "#1f5fa8", "A", "a_weighted_noise_dbfs"),
                                    (wi, "#c0392b", "468", "itu468_noise_dbfs")):
            fc, pm = _log_bands(freqs, mean * w)
            y = _per_bin_db(pm, df)
            shown2.append(y)
            total = _fmt_total(m.get(key), m.get("error_power_lsb2"))
            ax2.plot(fc, y, color=color, lw=1.0,
                     label=f"{name}-weighted, measured (total {total} dBFS)")
    else:
        _note(ax1, f"too short to measure: the spectrum needs at least {an.L} frames")
    if pred is not None:
        fc, pm = _log_bands(freqs, pred)
        y = _per_bin_db(pm, df)
        shown1.append(y)
        ax1.plot(fc, y, color=_PRED, lw=1.4, ls="--", label="predicted")
        for w, color, name, key in ((wa, "#1f5fa8", "A", "a_weighted_noise_dbfs"),
                                    (wi, "#c0392b", "468", "itu468_noise_dbfs")):
            fc, pm = _log_bands(freqs, pred * w)
            y = _per_bin_db(pm, df)
            shown2.append(y)
            total = _fmt_total(p.get(key), p.get("error_power_lsb2"))
            ax2.plot(fc, y, color=color, lw=1.4, ls="--",
                     label=f"{name}-weighted, predicted (total {total} dBFS)")
    for ax, shown in ((ax1, shown1), (ax2, shown2)):
        _freq_axis(ax, lo, hi)
        _ylim(ax, shown)
        _style(ax, ylabel="dBFS per bin")
        if not shown:
            ax.set_yticks([])
        _legend(ax, loc="upper left")
    ax1.set_title("Unweighted", fontsize=9.5, loc="left")
    ax2.set_title("Weighted: A (IEC 61672-1) and ITU-R BS.468-4 (RMS detector), "
                  "mean of the channels", fontsize=9.5, loc="left")
    ax2.set_xlabel("frequency, Hz", fontsize=9)
    fig.subplots_adjust(left=0.09, right=0.98, top=0.95, bottom=0.08, hspace=0.22)
    return {
        "kind": "error_spectrum",
        "title": "Error spectrum, measured against the prediction",
        "alt": "Error spectrum per channel in dBFS per bin against frequency, with the "
               "predicted level, unweighted and weighted.",
        "caption": (f"Noise power per bin of width {df:.2f} Hz, 10·log10(2·PSD·fs/L) dBFS, "
                    f"averaged in 1/{PLOT_BANDS_PER_OCTAVE}-octave bands above the bin "
                    "spacing. Solid: measured from the error signal (Welch); dashed: the "
                    "dither model through the noise-shaping filter. In the weighted panel the "
                    "area under each curve gives the weighted total quoted in the legend."),
        "png": _png(fig),
    }


def _plot_noise_transfer(report, an):
    from requant.dsp.analysis import DITHER_POWER_LSB2
    from requant.dsp.shaping import noise_gain_db, ntf_response
    from requant.dsp.weighting import weighting_db

    rate = float(an.rate)
    h = np.asarray(an.coeffs, dtype=np.float64)
    lo, hi = max(10.0, rate / an.L), rate / 2.0
    f = np.geomspace(lo, hi, 600)
    ntf_db = 10.0 * np.log10(np.maximum(np.abs(ntf_response(h, f, rate)) ** 2, 1e-30))
    fig, (ax,) = _figure(8.0, 4.2)
    shown = [ntf_db]
    if an.psd_error is not None:
        flat = 2.0 * DITHER_POWER_LSB2[an.dither] / an.scale ** 2 / rate
        fc, pm = _log_bands(an.freqs, an.psd_error.mean(axis=0) / flat)
        y = _per_bin_db(pm, 0.5)  # 10·log10(ratio)
        sel = fc >= lo
        ax.plot(fc[sel], y[sel], color="#9aa7b4", lw=1.0,
                label="measured: error spectrum ÷ flat dither level")
        shown.append(y[sel])
    ax.plot(f, ntf_db, color=_PRED, lw=1.8, label="|NTF|², the designed shaping")
    ax.plot(f, weighting_db("a", f), color="#1f5fa8", lw=1.0, ls="--",
            label="A-weighting (IEC 61672-1)")
    ax.plot(f, weighting_db("itu468", f), color="#c0392b", lw=1.0, ls="--",
            label="ITU-R BS.468-4 weighting")
    ax.axhline(0.0, color="#888888", lw=0.8)
    _freq_axis(ax, lo, hi)
    top = max(10.0, float(np.nanmax(np.concatenate([np.ravel(v) for v in shown]))) + 5.0)
    ax.set_ylim(max(-60.0, float(np.nanmin(ntf_db)) - 10.0), top)
    _style(ax, ylabel="dB", xlabel="frequency, Hz")
    _legend(ax, loc="upper left")
    ax.set_title(f"order {h.size}, total noise power gain {noise_gain_db(h):+.2f} dB",
                 fontsize=9.5, loc="left")
    fig.subplots_adjust(left=0.09, right=0.98, top=0.92, bottom=0.12)
    return {
        "kind": "noise_transfer",
        "title": "Noise-shaping filter",
        "alt": "The noise transfer function's power in dB against frequency, with the "
               "A and ITU-R 468 weighting curves and the measured ratio.",
        "caption": ("|NTF(f)|² of the error-feedback filter (0 dB = plain dither), with the "
                    "weighting curves it is judged by (0 dB at 1 kHz). The grey line is the "
                    "measured error spectrum divided by the unshaped dither level: it should "
                    "follow the black one."),
        "png": _png(fig),
    }


def _plot_histogram(report, an):
    from requant.dsp.analysis import DITHER_POWER_LSB2, error_pdf

    hist = (report.get("analysis") or {}).get("histogram") or {}
    edges = np.asarray(hist.get("edges_lsb") or an.hist_edges, dtype=np.float64)
    counts = np.asarray(hist.get("counts") or np.zeros(edges.size - 1), dtype=np.float64)
    outside = int(hist.get("outside") or 0)
    total = counts.sum() + outside
    passthrough = bool(report.get("output", {}).get("passthrough"))
    fig, (ax,) = _figure(8.0, 3.8)
    n = np.concatenate(([1.0], -np.asarray(an.coeffs, dtype=np.float64)))
    sigma = math.sqrt(DITHER_POWER_LSB2[an.dither] * float(np.sum(n * n)))
    half = max(4.0 * sigma, 1.5)
    if total > 0:
        width = np.diff(edges)
        dens = counts / (total * width)
        ax.stairs(dens, edges, fill=True, color="#9ec1e6", alpha=0.9,
                  label=f"measured ({_int(total)} samples"
                        + (f", {_int(outside)} outside the range)" if outside else ")"))
        nz = np.flatnonzero(counts)
        if nz.size:
            half = max(half, abs(edges[nz[0]]), abs(edges[nz[-1] + 1]))
    else:
        _note(ax, "too short to measure: no complete analysis segment")
    half = min(half * 1.05, max(abs(edges[0]), abs(edges[-1])))
    if not passthrough:
        x = np.linspace(-half, half, 801)
        pdf = error_pdf(x, quantizer=an.quantizer, dither=an.dither, coeffs=an.coeffs)
        how = ("Gaussian with the predicted mean and variance" if n.size > 1
               else "Lipshitz, Wannamaker & Vanderkooy (1992)")
        ax.plot(x, pdf, color=_PRED, lw=1.4, label=f"theory: {how}")
    ax.set_xlim(-half, half)
    ax.set_ylim(bottom=0.0)
    _style(ax, ylabel="probability density, 1/LSB", xlabel="error (output − input), LSB")
    _legend(ax, loc="upper right")
    fig.subplots_adjust(left=0.09, right=0.98, top=0.95, bottom=0.14)
    return {
        "kind": "error_histogram",
        "title": "Error histogram",
        "alt": "Histogram of the error in LSB with the theoretical probability density.",
        "caption": ("The error of every analysed sample, in LSB of the output word length, "
                    "against the theoretical density for the quantizer, dither and shaping "
                    "used (for a busy signal). Without dither a quiet or simple signal "
                    "piles the error onto a few values."),
        "png": _png(fig),
    }


def _plot_quiet_passage(report, an):
    x, e = an.quiet_samples
    x = np.asarray(x, dtype=np.float64)
    e = np.asarray(e, dtype=np.float64)
    rate = float(an.rate)
    scale = float(an.scale)
    q = (report.get("analysis") or {}).get("quietest_passage") or {}
    start_s = float(q.get("start_s") or 0.0)
    energy = np.sum(x * x, axis=0)
    ch = int(np.argmax(energy))
    n = int(min(x.shape[0], max(32, round(TIME_VIEW_S * rate))))
    # the stretch of the passage where the chosen channel carries most signal
    c2 = np.concatenate(([0.0], np.cumsum(x[:, ch] ** 2)))
    hop = max(1, n // 4)
    starts = np.arange(0, x.shape[0] - n + 1, hop)
    s0 = int(starts[np.argmax(c2[starts + n] - c2[starts])])
    seg = slice(s0, s0 + n)
    t = np.arange(n) * (1000.0 / rate)
    xi = x[seg, ch] * scale
    yo = (x[seg, ch] + e[seg, ch]) * scale
    ee = e[seg, ch] * scale
    fig, (ax1, ax2) = _figure(8.0, 4.8, 2, height_ratios=(3, 2))
    h_out, = ax1.plot(t, yo, color="#e08a7e", lw=1.0, drawstyle="steps-mid",
                      label="output codes")
    h_in, = ax1.plot(t, xi, color="#1f5fa8", lw=1.6, drawstyle="steps-mid", label="input")
    ax2.plot(t, ee, color="#2e7d32", lw=1.0, drawstyle="steps-mid",
             label="error = output − input")
    ax2.axhline(0.0, color="#888888", lw=0.8)
    for ax in (ax1, ax2):
        _style(ax, ylabel="LSB")
        ax.set_xlim(t[0], t[-1])
    ax1.legend(handles=[h_in, h_out], loc="upper right", fontsize=7.5, framealpha=0.85)
    _legend(ax2, loc="upper right")
    from matplotlib.ticker import MaxNLocator

    for ax, v in ((ax1, np.r_[xi, yo]), (ax2, ee)):
        if v.size and np.ptp(v) < 12:
            ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax2.set_xlabel(f"time, ms after {start_s + s0 / rate:.4f} s", fontsize=9)
    lvl = q.get("signal_rms_dbfs")
    level = "digital silence" if lvl is None else f"{lvl:.1f} dBFS RMS"
    ax1.set_title(f"channel {ch + 1}; passage at {start_s:.3f} s, {level}", fontsize=9.5,
                  loc="left")
    fig.subplots_adjust(left=0.09, right=0.98, top=0.93, bottom=0.11, hspace=0.12)
    return {
        "kind": "quiet_passage",
        "title": "Close-up of the quietest passage",
        "alt": "Input, output and error in LSB over a few milliseconds of the quietest "
               "passage.",
        "caption": (f"{1000.0 * n / rate:.1f} ms of the quietest passage, where channel "
                    f"{ch + 1} carries most signal, in LSB of the {an.bits}-bit output. "
                    "With dither the error looks like noise; without it, it repeats the "
                    "shape of the signal."),
        "png": _png(fig),
    }
