"""The audit's report: an HTML page or Markdown with pictures, from an audit's result.

Rendering only. The content comes from the result dict of
:func:`requant.audit.run_audit` (its JSON form) and, for the pictures, from
the arrays beside it (:class:`requant.audit.pair.AuditData`): the error
spectrum with the prediction for the identified method and the estimated
noise transfer function, the error's histogram against the identified
density, and the alignment (coarse and full-rate cross-correlation). The
HTML page is rendered by jinja2 with autoescape on, so file names and every
other string are escaped; the Markdown writer escapes as the conversion
report's does (:mod:`requant.report.render`). Pictures are drawn with the
conversion report's helpers (:mod:`requant.report.plots`).
"""

import base64
import os
from urllib.parse import quote

import numpy as np

from requant.report.plots import (
    _COLORS,
    _PRED,
    _figure,
    _freq_axis,
    _legend,
    _log_bands,
    _note,
    _png,
    _style,
    _ylim,
)
from requant.report.render import (
    _html_env,
    _Md,
    _md_code,
    _md_env,
    _md_text,
    _write_bytes,
    _write_text,
)
from requant.report.tables import Code, _num, _table, fmt_int, loudness_rows

__all__ = ["write_audit_report", "write_audit_html", "write_audit_markdown", "picture_paths",
           "audit_pictures", "audit_context", "AUDIT_PICTURES"]

#: Pictures in page order: kind -> file-name suffix of the Markdown PNG.
AUDIT_PICTURES = {
    "audit_spectrum": "_error_spectrum.png",
    "audit_histogram": "_error_histogram.png",
    "audit_alignment": "_alignment.png",
}
_NA = "n/a"


def picture_paths(path):
    """The PNG files :func:`write_audit_markdown` writes beside ``path`` (kind -> path)."""
    path = os.fspath(path)
    folder, name = os.path.split(path)
    stem = os.path.splitext(name)[0]
    return {k: os.path.join(folder, stem + s) for k, s in AUDIT_PICTURES.items()}


# ------------------------------------------------------------------------------------------
# pictures


def _db(p):
    p = np.asarray(p, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(p > 0, 10.0 * np.log10(np.where(p > 0, p, 1.0)), np.nan)


def _plot_spectrum(r, data):
    fig, (ax1, ax2) = _figure(8.0, 6.4, 2, height_ratios=(3, 2))
    rate = float(data.rate)
    f = data.freqs
    lo, hi = (f[1] if f is not None else 10.0), rate / 2.0
    shown = []
    if data.power is None:
        _note(ax1, "no error spectrum: the overlap is too short, or the delivery is exact")
    else:
        fc, pm = _log_bands(f, data.power)
        ax1.plot(fc, _db(pm), color=_COLORS[0], lw=1.0, label="measured error")
        shown.append(_db(pm))
        if data.predicted_power is not None:
            fc, pp = _log_bands(f, data.predicted_power)
            ax1.plot(fc, _db(pp), color=_PRED, lw=1.4, ls="--",
                     label=f"predicted for {r['dither']} dither"
                           + (", estimated NTF" if r["shaped"] else ""))
        v = r["identification"]["innovation_variance_lsb2"]
        if v:
            ax1.axhline(10.0 * np.log10(v), color="#888888", lw=0.8, ls=":",
                        label=f"white error before shaping, {v:.3f} LSB²")
        fc, pr = _log_bands(f, data.ntf_power)
        ax2.plot(fc, _db(pr), color=_COLORS[0], lw=1.0, label="error spectrum ÷ its "
                 "geometric mean")
        bands = r["ntf_db"] or []
        ax2.plot([b["hz"] for b in bands], [b["db"] for b in bands], "o", color=_COLORS[1],
                 ms=4, label="octave bands (ntf_db)")
        if r["ntf"]:
            from requant.dsp.shaping import ntf_response

            g = np.geomspace(max(lo, 10.0), hi, 600)
            h = np.asarray(r["ntf"]["coefficients"])
            ax2.plot(g, _db(np.abs(ntf_response(h, g, rate)) ** 2), color=_PRED, lw=1.2,
                     ls="--", label=f"fitted FIR NTF, {h.size} taps")
        ax2.axhline(0.0, color="#888888", lw=0.8)
        _ylim(ax1, shown, min_range=20.0)
        _ylim(ax2, [_db(pr), [0.0]], min_range=20.0)
    for ax in (ax1, ax2):
        _freq_axis(ax, max(lo, 10.0), hi)
        _legend(ax, loc="upper left")
    _style(ax1, ylabel="dB re 1 LSB²")
    _style(ax2, ylabel="|NTF|², dB", xlabel="frequency, Hz")
    ax1.set_title("Error spectrum (white noise of power σ² reads 10·log10 σ²)", fontsize=9.5,
                  loc="left")
    ax2.set_title("Estimated noise transfer function (Gerzon–Craven: mean log 0 dB)",
                  fontsize=9.5, loc="left")
    fig.subplots_adjust(left=0.09, right=0.98, top=0.95, bottom=0.08, hspace=0.3)
    return {"kind": "audit_spectrum", "title": "Error spectrum and estimated NTF",
            "alt": "The error's spectrum against frequency with the prediction, and the "
                   "estimated noise transfer function.",
            "caption": ("Top: the error's Welch spectrum in LSB² per unit of normalized "
                        "bandwidth, beside the spectrum the identified method predicts. "
                        "Bottom: the same divided by its geometric mean (Kolmogorov–Szegő: the "
                        "power of the white error before shaping), which is |NTF|² for a "
                        "minimum-phase shaper (Gerzon & Craven 1989)."),
            "png": _png(fig)}


def _plot_histogram(r, data):
    fig, (ax,) = _figure(8.0, 3.8)
    h = data.histogram
    if not h:
        _note(ax, "no error samples to show")
    else:
        edges = np.asarray(h["edges"])
        counts = np.asarray(h["counts"], dtype=np.float64)
        total = max(counts.sum(), 1.0)
        ax.stairs(counts / (total * np.diff(edges)), edges, fill=True, color="#9ec1e6",
                  label=("whitened error" if h["whitened"] else "error")
                  + f" ({fmt_int(h['samples'])} samples)")
        if h["pdf"] is not None:
            c = 0.5 * (edges[:-1] + edges[1:])
            ax.plot(c, h["pdf"], color=_PRED, lw=1.4,
                    label=f"{r['dither']} dither, {r['quantizer'] or 'round'}: Lipshitz, "
                          "Wannamaker & Vanderkooy (1992)")
        nz = np.flatnonzero(counts)
        if nz.size:
            half = max(abs(edges[nz[0]]), abs(edges[nz[-1] + 1]), 1.0) * 1.05
            ax.set_xlim(-half, half)
    ax.set_ylim(bottom=0.0)
    _style(ax, ylabel="probability density, 1/LSB", xlabel="error, LSB of the delivery")
    _legend(ax, loc="upper right")
    fig.subplots_adjust(left=0.09, right=0.98, top=0.95, bottom=0.14)
    what = ("the error whitened by the fitted predictor (it stands for the loop error inside "
            "the shaper)" if h and h["whitened"] else "the error")
    return {"kind": "audit_histogram", "title": "Error histogram against the identified density",
            "alt": "Histogram of the error in LSB with the density of the identified method.",
            "caption": (f"The distribution of {what}, from evenly spread stretches of the "
                        "overlap, against the density theory gives for the identified quantizer "
                        "and dither (for a busy signal)."),
            "png": _png(fig)}


def _plot_alignment(r, data):
    fig, (ax1, ax2) = _figure(8.0, 5.0, 2, sharex=False)
    sc, al, rate = data.scan, data.alignment, float(data.rate)
    lags_ms = np.asarray(sc.lags_frames) / rate * 1000.0
    ax1.plot(lags_ms, sc.correlation, color=_COLORS[0], lw=1.0,
             label=f"coarse: mono, sums of {sc.decimation} frames")
    ax1.plot(lags_ms, sc.phat, color=_COLORS[2], lw=1.0,
             label="coarse, phase transform (where the candidates come from)")
    ax1.axvline(al.offset_frames / rate * 1000.0, color=_COLORS[1], lw=1.0,
                label=f"offset {al.offset_frames} frames")
    _style(ax1, ylabel="correlation", xlabel="lag, ms")
    _legend(ax1, loc="lower left")
    ax2.plot(al.fine_lags, al.fine_correlation, ".-", color=_COLORS[0], lw=1.0, ms=3,
             label="full rate, the fitting stretch")
    ax2.axvline(al.offset_frames, color=_COLORS[1], lw=1.0)
    _style(ax2, ylabel="correlation", xlabel="lag, frames")
    _legend(ax2, loc="lower left")
    fig.subplots_adjust(left=0.09, right=0.98, top=0.95, bottom=0.1, hspace=0.45)
    return {"kind": "audit_alignment", "title": "Alignment",
            "alt": "Cross-correlation of the delivery and the master against the lag.",
            "caption": ("Cross-correlation of delivery and master (normalized to its peak): "
                        "over the whole files, decimated, plain and with its cross-spectrum "
                        "whitened (Knapp & Carter 1976), then at the full rate around the peak "
                        f"on {fmt_int(al.window_frames)} frames of loud programme. The offset "
                        "is where the delivery's frame n meets the master's frame "
                        "n − offset."),
            "png": _png(fig)}


def audit_pictures(result, data):
    """The report's pictures as dicts (kind, title, caption, alt, png bytes), page order."""
    if data is None:
        return []
    return [_plot_spectrum(result, data), _plot_histogram(result, data),
            _plot_alignment(result, data)]


# ------------------------------------------------------------------------------------------
# tables


def _yes(v):
    return "yes" if v else "no"


def _db_row(label, m, p):
    diff = "" if m is None or p is None else _num(m - p, signed=True)
    return [label, _num(m), _num(p), diff]


def _ident_rows(r):
    ident = r["identification"]
    where = ", ".join(f"{p['start_s']:.1f}–{p['end_s']:.1f} s" for p in r["signal_correlated_at"])
    return [
        ["word length", f"{r['word_length']} bits"
         + (f" in a {r['container_bits']}-bit container" if r["container_bits"] else "")],
        ["quantizer", r["quantizer"] or "cannot tell (the NTF removes DC)"],
        ["dither", r["dither"]],
        ["noise shaping", "yes" if r["shaped"] else "no (flat)"],
        ["bias", f"{_num(r['bias_lsb'], '.3f', signed=True)} LSB"],
        ["white error before shaping (Kolmogorov–Szegő)",
         f"{_num(ident['innovation_variance_lsb2'], '.4f')} LSB²"],
        ["noise gain of the smooth spectrum", f"{_num(ident['noise_gain_db'])} dB"],
        ["excess kurtosis" + (" (whitened)" if r["shaped"] else ""),
         _num(ident["excess_kurtosis"], ".3f")],
        ["error range", f"{_num(ident['support_lsb'][0], '.3f')} … "
                        f"{_num(ident['support_lsb'][1], '.3f')} LSB"],
        ["signal-correlated", _yes(r["signal_correlated"]) + (f" ({where})" if where else "")],
        ["clipped samples", fmt_int(r["clipped_samples"])],
    ]


def _alignment_rows(r):
    a = r["alignment"]
    return [
        ["offset", f"{a['offset_frames']} frames ({a['offset_s'] * 1000:.2f} ms)"],
        ["gain", f"{_num(a['gain_db'], '.4f', signed=True)} dB"],
        ["polarity", str(a["polarity"])],
        ["overlap measured", f"{fmt_int(a['overlap_frames'])} frames ({a['overlap_s']:.2f} s)"],
        ["master / delivery frames", f"{fmt_int(a['master_frames'])} / "
                                     f"{fmt_int(a['delivered_frames'])}"],
        ["correlation at the offset", _num(a["correlation"], ".6f")],
        ["gain fitted on", f"{fmt_int(a['fit']['samples'])} samples from master frame "
                           f"{fmt_int(a['fit']['master_start_frame'])}"],
    ]


def _ntf_rows(r):
    rows = [[f"{b['hz']:g} Hz", _num(b["db"], signed=True)] for b in (r["ntf_db"] or [])]
    n = r["ntf"]
    if n:
        labels = {"a": "A (IEC 61672-1)", "itu468": "ITU-R BS.468-4 (RMS)",
                  "threshold": "hearing threshold"}
        rows += [[f"weighted gain, {labels[k]}", _num(v, signed=True)]
                 for k, v in n["weighted_gain_db"].items()]
        rows += [["total noise gain Σn²", _num(n["noise_gain_db"], signed=True)],
                 ["Gerzon–Craven mean log of the fitted NTF", _num(n["gerzon_craven_mean_log_db"],
                                                                   ".3f", signed=True)]]
    return rows


def audit_context(result):
    """The page's content (title, verdict, findings, notes, tables), shared by both forms."""
    from requant import __version__

    r = result
    p, m = r["predicted"], r["measured"]
    tables = [
        _table("identification", "What the error says", ["", "identified"], _ident_rows(r),
               numeric=[False, False]),
        _table("noise", "Noise: measured and predicted for the identified method",
               ["", "measured, dBFS", "predicted, dBFS", "difference, dB"],
               [_db_row("error RMS (AES17)", m["error_rms_dbfs"], p["error_rms_dbfs"]),
                _db_row("A-weighted (IEC 61672-1)", m["a_weighted_noise_dbfs"],
                        p["a_weighted_noise_dbfs"]),
                _db_row("ITU-R BS.468-4, RMS", m["itu468_noise_dbfs"], p["itu468_noise_dbfs"])],
               intro="Clipped samples are left out of the measured figures."),
        _table("ntf", "Estimated noise transfer function", ["octave band / figure", "dB"],
               _ntf_rows(r), intro=("Error power per octave band relative to the white error "
                                    "before shaping (the geometric mean of the spectrum); with "
                                    "shaping, the weighted gains of the fitted NTF as "
                                    "'requant shaper show' computes them.")),
        _table("alignment", "Alignment", ["", ""], _alignment_rows(r), numeric=[False, False]),
        _table("files", "Files", ["", "master", "delivery"],
               [[k, Code(str(r["files"]["master"][k])) if k == "path" else
                 str(r["files"]["master"][k]),
                 Code(str(r["files"]["delivered"][k])) if k == "path" else
                 str(r["files"]["delivered"][k])]
                for k in ("path", "format", "subtype", "sample_rate", "channels", "frames")],
               numeric=[False, False, False]),
    ]
    if r.get("loudness"):
        tables.insert(3, _table(
            "loudness", "Loudness over the overlap", ["", ""],
            loudness_rows(r["loudness"], {"master": "master", "delivered": "delivery"}),
            numeric=[False, False],
            intro="The delivery as gain × master + error, measured on the blocks the error "
                  "analysis reads."))
    return {"title_name": os.path.basename(r["delivered"]), "master_path": r["master"],
            "delivered_path": r["delivered"], "verdict": r["verdict"],
            "findings": list(r["findings"]), "notes": list(r["notes"]),
            "passed": r["passed"], "tables": tables, "version": __version__}


# ------------------------------------------------------------------------------------------
# writing


def write_audit_html(result, data, path, outs):
    """Write the audit as one self-contained HTML page (pictures inline, no script)."""
    ctx = audit_context(result)
    ctx["pictures"] = [dict(p, src="data:image/png;base64," + base64.b64encode(p["png"])
                            .decode("ascii")) for p in audit_pictures(result, data)]
    text = _html_env().get_template("audit.html.j2").render(**ctx)
    _write_text(outs, os.fspath(path), text)


def write_audit_markdown(result, data, path, outs):
    """Write the audit as Markdown, with its pictures as PNG files beside it."""
    path = os.fspath(path)
    ctx = audit_context(result)
    names = picture_paths(path)
    pictures = audit_pictures(result, data)

    def cell(v):
        return _Md(_md_code(v, table=True) if isinstance(v, Code) else _md_text(v))

    md = dict(
        title_name=_Md(_md_code(ctx["title_name"])),
        master_path=_Md(_md_code(ctx["master_path"])),
        delivered_path=_Md(_md_code(ctx["delivered_path"])),
        verdict=_Md(_md_text(ctx["verdict"], block=True)),
        findings=[_Md(_md_text(x, block=True)) for x in ctx["findings"]],
        notes=[_Md(_md_text(x, block=True)) for x in ctx["notes"]],
        passed=ctx["passed"], version=ctx["version"],
        tables=[{"title": _Md(_md_text(t["title"])),
                 "intro": None if t["intro"] is None else _Md(_md_text(t["intro"], block=True)),
                 "head_line": _Md("| " + " | ".join(cell(h) or " " for h in t["head"]) + " |"),
                 "rule": _Md("|" + "|".join("---:" if n else "---" for n in t["numeric"]) + "|"),
                 "row_lines": [_Md("| " + " | ".join(cell(c) for c in row) + " |")
                               for row in t["rows"]]} for t in ctx["tables"]],
        pictures=[{"title": _Md(_md_text(p["title"])), "caption": _Md(_md_text(p["caption"])),
                   "link": _Md(quote(os.path.basename(names[p["kind"]]), safe=""))}
                  for p in pictures],
    )
    text = _md_env().get_template("audit.md.j2").render(**md)
    for p in pictures:
        _write_bytes(outs, names[p["kind"]], p["png"])
    _write_text(outs, path, text)


def write_audit_report(result, data, path, outs):
    """HTML for ``.html``/``.htm``, Markdown for ``.md`` (see the two writers)."""
    if os.fspath(path).lower().endswith(".md"):
        write_audit_markdown(result, data, path, outs)
    else:
        write_audit_html(result, data, path, outs)
