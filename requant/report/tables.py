"""The report's tables, as plain rows of text, and the number formatting they use.

Shared by both renderings (:mod:`requant.report.render`): :func:`page_context`
reads the typed report (:class:`~requant.report.model.Report`) and returns
the page's content (title, headline, warnings, notes, tables); the HTML and
Markdown writers only escape and lay it out. Nothing is measured here.
"""

import math
import os
import re

__all__ = ["page_context", "Code", "fmt_int", "fmt_zero_db", "loudness_rows"]

_MINUS_INF = "\u2212\u221e"
_PLUS_INF = "+\u221e"
_NA = "n/a"
#: An undefined loudness: no 400 ms block (or 3 s window) above the gates.
_BELOW_GATE = "n/a (below the gates or too short)"


# ------------------------------------------------------------------------------------------
# formatting


class Code(str):
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


def fmt_int(v):
    """A count with thin-space thousands separators; 'n/a' for None."""
    return _NA if v is None else f"{int(v):,}".replace(",", "\u2009")


def _diff_db(m, p):
    if m is None or p is None:
        return ""
    return _num(m - p, signed=True)


def _ratio_db(m, p):
    if not m or not p or m <= 0 or p <= 0:
        return ""
    return _num(10.0 * math.log10(m / p), signed=True)


def fmt_zero_db(power):
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


def page_context(report, analyzer, *, bands_per_octave):
    """The page's content, shared by the HTML and the Markdown rendering.

    Parameters
    ----------
    report : requant.report.model.Report
    analyzer : requant.dsp.analysis.ErrorAnalyzer or None
        Only whether there is one matters here (pictures or not).
    bands_per_octave : int
        The pictures' spectral averaging
        (:data:`requant.report.plots.PLOT_BANDS_PER_OCTAVE`), stated in the
        method table when there are pictures.

    Returns
    -------
    dict
        ``title_name``, ``input_path``, ``output_path`` (:class:`Code`),
        ``headline``, ``advice`` (the "which method for this file" paragraph, or
        None), ``warnings``, ``notes``, ``tables`` (each a dict with
        ``id``, ``title``, ``head``, ``rows``, ``intro``, ``numeric``,
        ``fold``), ``version``, ``created``, ``per_bin_rule`` and
        ``no_pictures``: plain text, not yet escaped.
    """
    m, p, an = report.measured, report.predicted, report.analysis
    bits = report.settings.bits
    scale = 2.0 ** (bits - 1) if bits else 1.0
    have_spectrum = an is not None and an.spectrum is not None
    from requant.report.advice import flat_tpdf_figures, report_advice

    tables = [
        _main_table(m, p, have_spectrum=have_spectrum, flat=flat_tpdf_figures(report), bits=bits),
        *([] if report.coverage is None else [_coverage_table(report.coverage, bits=bits)]),
        _correlated_table(m, an),
        _peaks_table(m, an),
        _channel_noise_table(report, have_spectrum=have_spectrum),
        _channel_levels_table(report, scale),
        _settings_table(report),
        _files_table(report),
    ]
    optional = (_shaping_table(report, passthrough=bool(report.output.passthrough)),
                _method_table(report, analyzer, bands_per_octave), _bands_table(report))
    tables += [t for t in optional if t is not None]
    name = os.path.basename(report.input.path or "") or "(unnamed input)"
    return {
        "title_name": Code(name),
        "input_path": Code(report.input.path or ""),
        "output_path": Code(report.output.path or ""),
        "headline": _headline(report),
        "advice": report_advice(report),
        "warnings": [str(w) for w in report.warnings],
        "notes": [str(n) for n in report.notes],
        "tables": tables,
        "version": str(report.requant_version or ""),
        "created": str(report.created or ""),
        "per_bin_rule": ("Spectrum levels are per bin: the noise power in one bin of width "
                         "fs/L (L = Welch segment length), 10·log10(2·PSD·fs/L) dBFS, "
                         "where PSD is the one-sided density in full scale²/Hz; the factor 2 "
                         "makes a full-scale sine read 0 dBFS (AES17)."),
        "no_pictures": ("No pictures: the error was not analysed for this report."
                        if analyzer is None else None),
    }


def _headline(report):
    from requant.report.advice import threshold_comparison, threshold_figures

    s = report.settings
    if report.output.passthrough:
        return (f"{s.bits}-bit output, written unchanged: the input already lay on "
                f"the {s.bits}-bit grid, so no dither or noise shaping was applied.")
    line = (f"{s.bits}-bit output, quantizer {s.quantizer}, dither "
            f"{s.dither_applied}, noise shaping {s.shaping or 'none'}.")
    th = threshold_figures(report)
    if th is not None:
        method, flat, measured = th
        line += (" Hearing-threshold-weighted noise (what the ear hears of it): "
                 + threshold_comparison(method, flat, bits=s.bits, predicted=not measured)
                 + ".")
    return line


def _predicted_weighted(p, value):
    """A predicted weighted figure; −∞ whenever the model predicts no error at all.

    (A pass-through predicts zero error power; its weighted figures must agree.)
    """
    if p.error_power_lsb2 == 0:
        return _MINUS_INF
    return _num(value, none=_NA)


def _main_table(m, p, *, have_spectrum, flat=None, bits=None):
    mp, pp = m.error_power_lsb2, p.error_power_lsb2
    w_none_m = _NA if not have_spectrum else fmt_zero_db(mp)

    def weighted(label, key):
        mv, pv = getattr(m, key), getattr(p, key)
        return [label, _num(mv, none=w_none_m), _predicted_weighted(p, pv),
                "" if pp == 0 else _diff_db(mv, pv)]

    rows = [
        weighted("hearing-threshold-weighted noise (Terhardt 1979; what the hearing shaper "
                 "lowers), dBFS", "threshold_weighted_noise_dbfs"),
        ["SNR (signal over error power), dB",
         _snr(m.snr_db, signal_db=m.signal_rms_dbfs, error_power=mp),
         _snr(p.snr_db, signal_db=m.signal_rms_dbfs, error_power=pp),
         _diff_db(m.snr_db, p.snr_db)],
        ["error power, LSB²", _num(mp, ".5g"), _num(pp, ".5g"), _ratio_db(mp, pp)],
        ["error RMS, dBFS", _num(m.error_rms_dbfs, none=fmt_zero_db(mp)),
         _num(p.error_rms_dbfs, none=fmt_zero_db(pp)),
         _diff_db(m.error_rms_dbfs, p.error_rms_dbfs)],
        weighted("A-weighted noise (IEC 61672-1), dBFS", "a_weighted_noise_dbfs"),
        weighted("ITU-R BS.468-4 weighted noise, RMS detector (not the standard's quasi-peak), "
                 "dBFS", "itu468_noise_dbfs"),
        ["error mean, LSB", _num(m.error_mean_lsb, ".4f", signed=True), "", ""],
        ["error peak, dBFS", _num(m.error_peak_dbfs, none=fmt_zero_db(mp)), "", ""],
        ["signal RMS, dBFS", _num(m.signal_rms_dbfs, none=fmt_zero_db(mp)), "", ""],
    ]
    head = ["figure", "measured", "predicted", "measured − predicted, dB"]
    intro = ("All channels together. The prediction is the dither model times the "
             "noise-shaping filter's gain; weighted figures are normalised to 0 dB at 1 kHz.")
    if flat is not None:
        keys = ["threshold_weighted_noise_dbfs", "snr_db", "error_power_lsb2", "error_rms_dbfs",
                "a_weighted_noise_dbfs", "itu468_noise_dbfs"]
        for row, key in zip(rows, keys):
            row.append(_num(flat[key], ".5g" if key == "error_power_lsb2" else ".2f"))
        for row in rows[len(keys):]:
            row.append("")
        head.append(f"flat TPDF at {bits} bits, predicted")
        intro += (" The last column is what plain TPDF dither at the same word length would "
                  "give on the same samples. Noise shaping makes the SNR and the A-weighted "
                  "figure worse (A-weighting is no hearing-threshold model) while it lowers "
                  "the hearing-threshold-weighted one, the figure that says what is heard.")
    return _table("figures", "Measured and predicted", head, rows, intro=intro)


def _coverage_table(cov, *, bits):
    """Which samples the prediction covers, and measured against predicted over them."""
    rows = [["samples in the file, all channels", fmt_int(cov.samples), "", ""],
            ["kept digitally silent (exact zeros, no error)", fmt_int(cov.silent_samples), "",
             ""],
            [f"clipped at the ends of the {bits}-bit range", fmt_int(cov.clipped_samples)
             + ("" if not cov.clipped_beyond_model_samples else
                f" ({fmt_int(cov.clipped_beyond_model_samples)} with an error dither cannot "
                "make, left out below)"), "", ""]]
    if cov.unchanged_samples is not None:
        rows.append([f"already on the {bits}-bit grid, passed unchanged (no dither, no error)",
                     fmt_int(cov.unchanged_samples), "", ""])
    share = f" ({100.0 * cov.covered_samples / cov.samples:.2f} %)" if cov.samples else ""
    rows.append(["covered by the prediction", fmt_int(cov.covered_samples) + share, "", ""])
    m, p = cov.measured or {}, cov.predicted or {}
    if cov.covered_samples:
        mp, pp = m.get("error_power_lsb2"), p.get("error_power_lsb2")
        rows.append(["over them: error power, LSB²", _num(mp, ".5g"), _num(pp, ".5g"),
                     _ratio_db(mp, pp)])
        for key, label in (("a_weighted_noise_dbfs", "A-weighted noise"),
                           ("itu468_noise_dbfs", "ITU-R 468-weighted noise (RMS)"),
                           ("threshold_weighted_noise_dbfs", "hearing-threshold-weighted noise")):
            rows.append([f"over them: {label}, dBFS", _num(m.get(key)), _num(p.get(key)),
                         _diff_db(m.get(key), p.get(key))])
    return _table("coverage", "What the prediction covers",
                  ["samples and figures", "measured", "predicted", "measured − predicted, dB"],
                  rows,
                  intro="The dither model predicts the error of the samples that were "
                        "requantized. Silent and unchanged samples have no error, clipped ones "
                        "the clipping's: the figures over the covered samples compare like "
                        "with like, and a note says how far the whole file's are off.")


def _correlated_table(m, an):
    from requant.dsp.analysis import CORRELATED_WARNING_FRACTION

    q = an.quietest_passage if an is not None else None
    flagged = m.signal_correlated
    verdict = _NA if flagged is None else (
        "no: the error behaves as steady noise" if not flagged else
        "yes: no dither, and a passage within about 6 dB of 1 LSB RMS: its error is a "
        "function of the signal" if m.signal_correlated_reason == "quiet-undithered" else
        "yes: the error follows the signal (distortion)")
    rows = [
        ["signal-correlated error", verdict],
        ["share of the error power that follows the signal (larger of whole and quietest)",
         _pct(m.correlated_error_fraction)],
        ["whole signal: explained by a linear function of the input",
         _pct(m.correlation_fraction)],
        ["whole signal: tonal (narrow peaks above the noise floor)",
         _pct(m.tonal_fraction)],
    ]
    if q:
        rows += _quiet_rows(q)
    elif an is not None:
        rows.append(["quietest passage", "none found (the file is shorter than one window, "
                                         "or digital silence)"])
    return _table("correlated", "Signal-correlated error", ["figure", "value"], rows,
                  numeric=[False, False],
                  intro=f"A warning is given above {100 * CORRELATED_WARNING_FRACTION:.0f} %. "
                        "With TPDF dither the error does not depend on the signal, so both "
                        "shares stay near zero; undithered requantization of quiet passages "
                        "drives them towards 100 %.")


def _quiet_rows(q):
    """The quietest passage's rows of the signal-correlated table (``q`` from the analysis)."""
    return [
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


def loudness_rows(loud, names):
    """Table rows of a ``loudness`` section: integrated loudness and range of two signals.

    ``names`` maps the section's prefixes to row labels, e.g. ``{"input": "input"}``.
    """
    if not loud:
        return []
    rows = []
    for key, label in names.items():
        rows.append([f"{label} integrated loudness (ITU-R BS.1770-4), LUFS",
                     _num(loud.get(f"{key}_integrated_lufs"), none=_BELOW_GATE)])
    for key, label in names.items():
        rows.append([f"{label} loudness range (EBU Tech 3342), LU",
                     _num(loud.get(f"{key}_range_lu"), none=_BELOW_GATE)])
    return rows


def _peaks_table(m, an):
    tp = an.true_peak if an is not None else None
    none = _MINUS_INF if tp is not None else _NA
    rows = [
        ["input true peak (ITU-R BS.1770-4; the sample peak where that is higher), dBTP",
         _num(m.input_true_peak_dbtp, none=none)],
        ["output true peak (ITU-R BS.1770-4; the sample peak where that is higher), dBTP",
         _num(m.output_true_peak_dbtp, none=none)],
        *loudness_rows(an.loudness if an is not None else None,
                       {"input": "input", "output": "output"}),
        ["input samples beyond full scale", fmt_int(m.over_full_scale_samples)],
        ["output samples clipped at the end of the range", fmt_int(m.clipped_samples)],
        ["noise-shaping loop overloads", fmt_int(m.shaping_overloads)],
    ]
    return _table("peaks", "Peaks, loudness and clipping", ["figure", "value"], rows,
                  numeric=[False, False])


def _channel_noise_table(report, *, have_spectrum):
    rows = []
    for ch in report.channels:
        cm, cp = ch.measured, ch.predicted
        mp, pp = cm.error_power_lsb2, cp.error_power_lsb2
        wn = _NA if not have_spectrum else fmt_zero_db(mp)
        rows.append([
            str(ch.channel),
            _snr(cm.snr_db, signal_db=cm.signal_rms_dbfs, error_power=mp),
            _snr(cp.snr_db, signal_db=cm.signal_rms_dbfs, error_power=pp),
            _num(mp, ".5g"), _num(pp, ".5g"),
            _num(cm.a_weighted_noise_dbfs, none=wn),
            _predicted_weighted(cp, cp.a_weighted_noise_dbfs),
            _num(cm.itu468_noise_dbfs, none=wn),
            _predicted_weighted(cp, cp.itu468_noise_dbfs),
            _pct(cm.correlated_error_fraction),
        ])
    head = ["channel", "SNR dB", "predicted", "error LSB²", "predicted", "A-wtd dBFS",
            "predicted", "468-wtd dBFS", "predicted", "signal-correlated"]
    return _table("channels", "Per channel: noise", head, rows,
                  intro="468-weighted with an RMS detector (not the standard's quasi-peak).")


def _channel_levels_table(report, scale):
    an = report.analysis
    tp_none = _MINUS_INF if an is not None and an.true_peak is not None else _NA
    rows = []
    for ch in report.channels:
        cm = ch.measured
        rows.append([
            str(ch.channel),
            _num(cm.signal_rms_dbfs, none=fmt_zero_db(cm.error_power_lsb2)),
            _num(cm.input_true_peak_dbtp, none=tp_none),
            _num(cm.output_true_peak_dbtp, none=tp_none),
            _dc(cm.input_dc_offset, scale),
            _dc(cm.output_dc_offset, scale),
            fmt_int(cm.clipped_samples),
        ])
    head = ["channel", "signal RMS dBFS", "true peak in dBTP", "true peak out dBTP",
            "DC offset in, LSB", "DC offset out, LSB", "clipped samples"]
    return _table("levels", "Per channel: levels, DC offset, clipping", head, rows,
                  intro="DC offsets (the mean) in LSB of the output word length, "
                        "1 LSB = 2^−(bits−1) of full scale; the JSON report holds them as "
                        "fractions of full scale.")


def _settings_table(report):
    s = report.settings
    q = {"round": "round (to nearest, mid-tread)",
         "truncate": "truncate (toward minus infinity)"}.get(s.quantizer, str(s.quantizer))
    dither = str(s.dither)
    if s.dither_applied != s.dither:
        dither += f" asked, {s.dither_applied} applied"
        if report.output.passthrough:
            dither += " (the input already lay on the output grid)"
    shaping = str(s.shaping or "none")
    if s.shaping_coeffs:
        shaping += f" (order {len(s.shaping_coeffs)})"
    rows = [
        ["word length", f"{s.bits} bits"],
        ["quantizer", q],
        ["dither", dither],
        ["noise shaping", shaping],
        ["seed", str(s.seed)],
        ["block frames", fmt_int(s.block_frames)],
        ["dither forced on on-grid input", "yes" if s.force_dither else "no"],
    ]
    return _table("settings", "Settings", ["setting", "value"], rows,
                  numeric=[False, False])


def _files_table(report):
    inp, out, err = report.input, report.output, report.error_signal
    rows = [
        ["input", Code(inp.path or "")],
        ["input format", f"{inp.format} {inp.subtype}, {fmt_int(inp.sample_rate)} Hz, "
                         f"{inp.channels} channel(s)"],
        ["input length", f"{fmt_int(inp.frames)} frames, {_num(inp.duration_s, '.3f')} s"],
        ["output", Code(out.path or "")],
        ["output format", f"{out.format} {out.subtype}, {out.bits}-bit "
                          f"words, {out.container_bits}-bit container"],
    ]
    prep = report.preparation
    if prep is not None:
        rows.append(["output rate and channels", f"{fmt_int(prep['rate_out'])} Hz, "
                                                 f"{prep['channels_out']} channel(s)"])
        rows += _preparation_rows(prep)
    if out.passthrough:
        rows.append(["pass-through", "yes: written unchanged"])
    if err is not None:
        rows.append(["error signal", Code(err.path or "")])
        rows.append(["error signal format", f"{err.format} {err.subtype}"])
        g = err.gain
        rows.append(["error signal gain", "none: the exact error" if g.rule == "exact" else
                     f"{g.gain_db:+.1f} dB ({g.rule}), hard-limited at {g.cap_dbfs:.0f} dBFS "
                     f"peak, {fmt_int(g.limited_samples)} sample(s) limited"])
    meta = out.metadata
    if meta is not None:
        for key, label in (("copied", "metadata chunks copied"),
                           ("rewritten", "metadata chunks rewritten"),
                           ("dropped", "metadata chunks dropped"), ("tags", "text tags")):
            if getattr(meta, key):
                rows.append([label, " ".join(str(c).strip() for c in getattr(meta, key))])
        if meta.error:
            rows.append(["metadata problem", str(meta.error)])
    return _table("files", "Files", ["file", "value"], rows, numeric=[False, False])


def _preparation_rows(prep):
    """The stages before the quantizer: channels, rate (with the filter's figures), gain."""
    rows = []
    if prep["channels_out"] != prep["channels_in"]:
        rows.append(["channels", f"{prep['channels_in']} -> {prep['channels_out']}"
                     + (f" ({prep['downmix']} downmix)" if prep["downmix"] else " (copied)")])
    rf = prep.get("rate_filter")
    if rf:
        rows.append(["rate conversion", f"{fmt_int(prep['rate_in'])} -> "
                     f"{fmt_int(prep['rate_out'])} Hz, exact ratio {rf['up']}/{rf['down']}"])
        rows.append(["rate filter", (
            f"linear-phase Kaiser-windowed sinc, {fmt_int(rf['total_taps'])} taps "
            f"(beta {rf['kaiser_beta']:.3f}); passband to {rf['passband_edge_hz']:.0f} Hz, "
            f"ripple ±{rf['passband_ripple_db']:.1e} dB; stopband from "
            f"{rf['stopband_edge_hz']:.0f} Hz, rejection {rf['stopband_rejection_db']:.1f} dB; "
            "delay compensated")])
    if prep["gain_db"] or prep["ceiling_dbtp"] is not None:
        text = f"{prep['gain_db']:+.2f} dB in float64 before dither"
        if prep["ceiling_dbtp"] is not None:
            tp = prep["true_peak_before_dbtp"]
            text += (f"; true-peak ceiling {prep['ceiling_dbtp']:g} dBTP, true peak "
                     f"{'of silence' if tp is None or tp == float('-inf') else f'{tp:+.2f} dBTP'}"
                     f" before the gain")
        rows.append(["gain", text])
    return rows


def _shaping_table(report, *, passthrough):
    coeffs = report.settings.shaping_coeffs
    rate = report.sample_rate
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


def _method_table(report, analyzer, bands_per_octave):
    meth = report.analysis.method if report.analysis is not None else None
    if not meth:
        return None
    rate = report.sample_rate or 0
    L = meth.get("segment_frames")
    stride = meth.get("segment_stride") or 1
    rows = [
        ["spectrum estimate", str(meth.get("psd"))],
        ["segment length L", f"{fmt_int(L)} frames"
                             + (f" ({1000.0 * L / rate:.1f} ms)" if L and rate else "")],
        ["overlap", "50 %"],
        ["segments analysed per channel", fmt_int(meth.get("segments_per_channel"))
         + ("" if stride == 1 else f" (every {stride}th, spread over the file)")],
        ["frequency resolution fs/L", f"{_num(meth.get('frequency_resolution_hz'), '.3f')} Hz"],
        ["ITU-R BS.468-4 detector", str(meth.get("itu468_detector"))],
        ["levels per bin", "10·log10(2·PSD·fs/L) dBFS: the noise power in one bin of width "
                           "fs/L (AES17: a full-scale sine reads 0 dBFS)"],
        ["weightings", "A: IEC 61672-1; 468: ITU-R BS.468-4; hearing threshold: inverse of "
                       "Terhardt (1979); all 0 dB at 1 kHz"],
        ["weighted figures", str(meth.get("weighted", "from the Welch spectrum"))],
        ["error histogram", "from the analysed segments"
                            + ("" if (meth.get("histogram_segment_stride") or 1) == 1 else
                               f" (every {meth.get('histogram_segment_stride')}th of them)")
                            + ", each sample counted once per segment it falls in"],
    ]
    if analyzer is not None:
        rows.append(["pictures", f"spectra averaged in 1/{bands_per_octave}-octave bands "
                                 "where bins are denser than that"])
    return _table("method", "How the error was analysed", ["item", "value"], rows,
                  numeric=[False, False])


def _bands_table(report):
    sp = report.analysis.spectrum if report.analysis is not None else None
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
