"""One audit: a master and its delivery, from the two files to the verdict.

:func:`audit_pair` is the job's entry: it opens the pair
(:mod:`requant.audit.sources`), aligns it in one pass (:mod:`.align`),
measures the real error in a second (:mod:`.measure`), identifies the method
(:mod:`.identify`), words the verdict (:mod:`.verdict`) and writes the JSON and
the report atomically. Its result is a plain dict, the JSON form; the keys are
listed in docs/audit.md.
"""

import math
import os
from dataclasses import dataclass

import numpy as np

from requant.audit.align import refine, scan, word_length_of
from requant.audit.identify import identify
from requant.audit.measure import measure
from requant.audit.passages import correlated_passages
from requant.audit.sources import open_pair
from requant.audit.verdict import findings_and_notes, verdict
from requant.errors import InputError, UsageError

__all__ = ["audit_pair", "run_audit", "AuditData", "DEFAULT_MAX_SHIFT_S", "REPORT_SUFFIXES"]

#: Largest offset looked for by default, seconds.
DEFAULT_MAX_SHIFT_S = 10.0
#: Largest relative gain correction taken from the whole-overlap refit (0.009 dB).
_REFIT_LIMIT = 1e-3
#: What ``--report`` may write.
REPORT_SUFFIXES = (".html", ".htm", ".md")


@dataclass
class AuditData:
    """The arrays behind the report's pictures (not part of the JSON)."""

    freqs: object
    power: object
    predicted_power: object
    ntf_power: object
    histogram: object
    alignment: object
    scan: object
    rate: float


def _db_power(power_lsb2, scale):
    """Mean square in LSB² as dBFS (AES17: a full-scale sine reads 0 dBFS)."""
    if power_lsb2 is None or power_lsb2 <= 0.0:
        return None
    return 10.0 * math.log10(2.0 * power_lsb2 / (scale * scale))


def _check_shift(max_shift_s):
    if isinstance(max_shift_s, bool) or not isinstance(max_shift_s, (int, float)) or not (
            0.0 < float(max_shift_s) <= 600.0):
        raise UsageError(f"max_shift_s={max_shift_s!r} must be a number of seconds above 0 and "
                         "at most 600")
    return float(max_shift_s)


def _alignment_dict(al, m, d, correction):
    rate = m.rate
    # the whole-overlap refit, when it is a refinement (an error that follows the
    # signal can pull a fit far more; the loud stretch's fit then stands)
    gain = al.gain * (1.0 + correction) if abs(correction) < _REFIT_LIMIT else al.gain
    return {"offset_frames": al.offset_frames, "offset_s": al.offset_frames / rate,
            "gain_db": 20.0 * math.log10(abs(gain)), "gain": abs(gain), "polarity": al.polarity,
            "overlap_frames": al.overlap_frames, "overlap_s": al.overlap_frames / rate,
            "delivered_start_frame": al.start_frame, "master_frames": m.frames,
            "delivered_frames": d.frames, "correlation": al.correlation,
            "fit": {"master_start_frame": al.window_start, "frames": al.window_frames,
                    "samples": al.fit_samples}}


def _predictions(ident, meas, res_pred):
    from requant.dsp.quantizer import predicted_error_power_lsb2

    known = ident["dither"] in ("none", "rpdf", "tpdf", "tpdf-hp") and not ident.get("exact")
    if not known:
        return {"error_power_lsb2": None, "error_rms_dbfs": None, "a_weighted_noise_dbfs": None,
                "itu468_noise_dbfs": None}
    p = predicted_error_power_lsb2(ident["quantizer"] or "round", ident["dither"],
                                   ident["coeffs"])
    return {"error_power_lsb2": p, "error_rms_dbfs": _db_power(p, meas.scale),
            "a_weighted_noise_dbfs": res_pred["a_weighted_noise_dbfs"],
            "itu468_noise_dbfs": res_pred["itu468_noise_dbfs"]}


def _finish_analysis(meas, ident, gain_db):
    from requant.dsp.analysis import correlated_summary

    an = meas.analyzer
    known = ident["dither"] in ("none", "rpdf", "tpdf", "tpdf-hp")
    an.set_model(quantizer=ident["quantizer"] or "round",
                 dither=ident["dither"] if known else "tpdf", coeffs=ident["coeffs"])
    res = an.finish()
    q = res.get("quietest_passage")
    if q and q.get("signal_rms_dbfs") is not None:  # it was fed the master, not gain x master
        q["signal_rms_dbfs"] += gain_db
    summary = correlated_summary(res)
    if not known:  # the noise-modulation test compares with a model there is none of
        summary["warnings"] = [w for w in summary["warnings"] if not w.startswith("noise mod")]
    return res, summary


def _weighted(res, meas):
    shift = 10.0 * math.log10((meas.counted + meas.clipped) / max(meas.counted, 1))
    out = {}
    for key in ("a_weighted_noise_dbfs", "itu468_noise_dbfs"):
        v = res["measured"].get(key)
        out[key] = None if v is None else v + shift
    return out


def _loudness_json(loud):
    """Master and delivery loudness over the overlap (the analysis' input and output)."""
    if loud is None:
        return None
    return {"master_integrated_lufs": loud["input_integrated_lufs"],
            "delivered_integrated_lufs": loud["output_integrated_lufs"],
            "master_range_lu": loud["input_range_lu"],
            "delivered_range_lu": loud["output_range_lu"],
            "channel_layout": loud["channel_layout"]}


def _ntf_json(ident):
    n = ident.get("ntf")
    if not n:
        return None
    return {"coefficients": n["coefficients"], "noise_gain_db": n["noise_gain_db"],
            "weighted_gain_db": n["weighted_gain_db"],
            "gerzon_craven_mean_log_db": n["gerzon_craven_mean_log_db"],
            "minimum_phase": n["minimum_phase"]}


def _identification_json(ident):
    keys = ("error_power_lsb2", "innovation_variance_lsb2", "noise_gain_db", "tonal_fraction",
            "excess_kurtosis", "support_lsb", "exact")
    return {k: ident.get(k) for k in keys}


def _histogram(ident, meas):
    """Counts of the error (whitened when shaped) and the identified density, LSB."""
    from requant.dsp.analysis import error_pdf

    if ident["shaped"]:
        e = ident["whitened"]
    else:
        e = np.concatenate([s.reshape(-1) for s in meas.reservoir]) if meas.reservoir else \
            np.zeros(0)
    e = e[np.isfinite(e)]
    if e.size == 0:
        return None
    span = max(2.5, float(np.percentile(np.abs(e), 99.9)) * 1.15)
    edges = np.linspace(-span, span, 121)
    counts, _ = np.histogram(e, bins=edges)
    centres = 0.5 * (edges[:-1] + edges[1:])
    pdf = None
    if ident["dither"] in ("none", "rpdf", "tpdf", "tpdf-hp") and not ident.get("exact"):
        q = ident["quantizer"] or "round"
        # unshaped: the total error's density; shaped: the whitened error stands for the
        # loop error, whose density is the unshaped one (a truncation's -1/2 LSB included)
        pdf = error_pdf(centres, quantizer=q, dither=ident["dither"])
    return {"edges": edges, "counts": counts, "pdf": pdf, "whitened": bool(ident["shaped"]),
            "samples": int(e.size)}


def run_audit(master, delivered, *, max_shift_s=DEFAULT_MAX_SHIFT_S, progress=None):
    """Audit one pair; return (result dict, :class:`AuditData`). Writes nothing.

    Raises
    ------
    InputError
        Unreadable files, a different rate or channel count, a silent
        delivery, or files that do not hold the same programme.
    """
    max_shift_s = _check_shift(max_shift_s)
    m, d = open_pair(master, delivered)
    try:
        sc = scan(m, d, max_shift_s=max_shift_s)
        bits = word_length_of(sc.or_bits)
        if bits is None:
            raise InputError(f"the delivery {d.path!r} is digital silence throughout; there is "
                             "nothing to audit")
        al = refine(sc, m, d, bits)
        meas = measure(m, d, al, bits, progress=progress)
        result, data = _assemble(m, d, sc, al, meas, bits)
    finally:
        m.close()
        d.close()
    return result, data


def _assemble(m, d, sc, al, meas, bits):
    ident = identify(meas, sample_rate=m.rate)
    res, summary = _finish_analysis(meas, ident, al.gain_db)
    pred = _predictions(ident, meas, res["predicted"])
    tot = meas.totals()
    power = float(tot[5] / max(tot[0], 1.0))
    passages = []
    if summary["signal_correlated"]:
        passages = correlated_passages(m, d, al, meas)
    r = {
        "master": m.path, "delivered": d.path, "sample_rate": m.rate, "channels": m.channels,
        "word_length": bits, "container_bits": d.container_bits,
        "alignment": _alignment_dict(al, m, d, meas.gain_correction),
        "quantizer": ident["quantizer"], "dither": ident["dither"], "shaped": ident["shaped"],
        "bias_lsb": ident["bias_lsb"], "ntf_db": ident["ntf_db"], "ntf": _ntf_json(ident),
        "signal_correlated": bool(summary["signal_correlated"]),
        "signal_correlated_at": passages,
        "correlated_error_fraction": summary["correlated_error_fraction"],
        "clipped_samples": meas.clipped,
        "error_rms_dbfs": _db_power(power, meas.scale),
        "measured": {"error_rms_dbfs": _db_power(power, meas.scale), **_weighted(res, meas)},
        "loudness": _loudness_json(res.get("loudness")),
        "predicted": pred,
        "identification": _identification_json(ident),
        "files": {"master": m.describe(), "delivered": d.describe()},
        "method": {"spectrum": res["method"], "decimation": sc.decimation,
                   "window_frames": meas.window_frames},
    }
    r["verdict"] = verdict(r, duration_s=al.start_frame / m.rate + al.overlap_frames / m.rate)
    r["findings"], r["notes"] = findings_and_notes(r, warnings=summary["warnings"],
                                                   sample_rate=m.rate)
    r["passed"] = not r["findings"]
    data = AuditData(freqs=ident.get("freqs"), power=ident.get("power"),
                     predicted_power=_predicted_power(ident, pred),
                     ntf_power=None if ident.get("power") is None or not
                     ident["innovation_variance_lsb2"] else
                     ident["power"] / ident["innovation_variance_lsb2"],
                     histogram=_histogram(ident, meas), alignment=al, scan=sc, rate=m.rate)
    return _plain(r), data


def _predicted_power(ident, pred):
    """The identified method's error spectrum (LSB² per normalized bandwidth), or None: the
    dither model's own spectrum through the NTF
    (:func:`requant.dsp.quantizer.error_spectrum_lsb2`)."""
    from requant.dsp.quantizer import error_spectrum_lsb2

    f = ident.get("freqs")
    if f is None or pred["error_power_lsb2"] is None:
        return None
    return error_spectrum_lsb2(ident["dither"], f, 2.0 * f[-1], ident["coeffs"])


def _plain(v):
    """JSON-ready: numpy scalars to Python, non-finite floats to None."""
    if isinstance(v, dict):
        return {k: _plain(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_plain(x) for x in v]
    if isinstance(v, (np.floating, float)):
        v = float(v)
        return v if math.isfinite(v) else None
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, np.bool_):
        return bool(v)
    return v


def _check_report_paths(paths):
    for p in paths:
        if os.path.splitext(os.fspath(p))[1].lower() not in REPORT_SUFFIXES:
            raise UsageError(f"--report {os.fspath(p)!r}: name the report .html or .md (the JSON "
                             "goes to --json)")


def audit_pair(master, delivered, *, max_shift_s=DEFAULT_MAX_SHIFT_S, json_path=None,
               report_paths=(), overwrite=False, progress=None):
    """Audit a delivery against its master; optionally write the JSON and reports.

    Parameters
    ----------
    master : path
        The master, at a longer word length or float.
    delivered : path
        The delivery: fixed point, same sample rate and channels.
    max_shift_s : float, s, default 10
        Largest offset between the two looked for.
    json_path : path, optional
        Write the result as JSON.
    report_paths : sequence of path
        ``.html`` (one self-contained page) or ``.md`` (pictures beside it).
    overwrite : bool
        Replace existing outputs (never an input).
    progress : callable(done_frames, total_frames), optional
        Called during the measuring pass.

    Returns
    -------
    dict
        The result (the JSON form; docs/audit.md lists the keys).

    Raises
    ------
    InputError, UsageError, OutputError
        One sentence each; nothing is written after a failure.
    """
    from requant.audio_io.atomic import AtomicOutputs, check_outputs

    report_paths = tuple(report_paths or ())
    _check_report_paths(report_paths)
    outputs = [json_path, *report_paths]
    check_outputs([master, delivered], outputs, overwrite=overwrite)
    if any(p is not None for p in outputs):
        from requant.report.audit import picture_paths

        extra = [q for p in report_paths if str(p).lower().endswith(".md")
                 for q in picture_paths(p).values()]
        check_outputs([master, delivered], extra, overwrite=overwrite)
    result, data = run_audit(master, delivered, max_shift_s=max_shift_s, progress=progress)
    if json_path is None and not report_paths:
        return result
    import json

    from requant.report.audit import write_audit_report

    with AtomicOutputs() as outs:
        if json_path is not None:
            tmp = outs.path_for(json_path)
            try:
                with open(tmp, "w", encoding="utf-8") as fh:
                    json.dump(result, fh, indent=2, allow_nan=False)
                    fh.write("\n")
            except OSError as exc:
                from requant.errors import OutputError

                raise OutputError(f"writing {os.fspath(json_path)!r} failed "
                                  f"({exc.strerror or exc}); check the destination") from None
        for p in report_paths:
            write_audit_report(result, data, p, outs)
    return result
