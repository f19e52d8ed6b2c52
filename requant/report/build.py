"""Building the report of a conversion: figures, predictions, warnings, the analysis.

Rendering is elsewhere (:mod:`requant.report.write`, :mod:`requant.report.render`):
this module only decides what the report says.
"""

import datetime as _dt
import math

from requant import __version__
from requant.audio_io.formats import container_bits_of
from requant.dsp.analysis import correlated_summary
from requant.dsp.figures import measured_figures, predicted_figures
from requant.dsp.quantizer import predicted_error_power_lsb2

__all__ = ["build_report", "merge_analysis", "settings_block"]


def merge_analysis(report, res):
    """Fold the analyzer's figures into the report's sections."""
    report["measured"].update(res["measured"])
    report["predicted"].update(res["predicted"])
    if "true_peak" in res:
        report["measured"]["input_true_peak_dbtp"] = res["true_peak"]["input_dbtp"]
        report["measured"]["output_true_peak_dbtp"] = res["true_peak"]["output_dbtp"]
    for c, row in enumerate(res["channels"]):
        ch = report["channels"][c]
        ch["measured"]["a_weighted_noise_dbfs"] = row["a"]
        ch["measured"]["itu468_noise_dbfs"] = row["itu468"]
        ch["measured"]["correlated_error_fraction"] = max(row["tonal_fraction"],
                                                          row["correlation_fraction"])
        ch["measured"]["input_dc_offset"] = res["dc_offset"]["input"][c]
        ch["measured"]["output_dc_offset"] = res["dc_offset"]["output"][c]
        if "true_peak" in res:
            ch["measured"]["input_true_peak_dbtp"] = res["true_peak"]["input_dbtp_per_channel"][c]
            ch["measured"]["output_true_peak_dbtp"] = res["true_peak"]["output_dbtp_per_channel"][c]
        ch["predicted"]["a_weighted_noise_dbfs"] = res["predicted"]["a_weighted_noise_dbfs"]
        ch["predicted"]["itu468_noise_dbfs"] = res["predicted"]["itu468_noise_dbfs"]
    if report["output"]["passthrough"]:
        # written unchanged: no error, nothing to predict, nothing to warn about
        for key in ("a_weighted_noise_dbfs", "itu468_noise_dbfs"):
            report["predicted"][key] = None
            for ch in report["channels"]:
                ch["predicted"][key] = None
        summary = {"correlated_error_fraction": 0.0, "signal_correlated": False, "warnings": []}
    else:
        summary = correlated_summary(res)
    report["measured"]["correlated_error_fraction"] = summary["correlated_error_fraction"]
    report["measured"]["signal_correlated"] = summary["signal_correlated"]
    report["warnings"].extend(summary["warnings"])
    tp = report["measured"].get("output_true_peak_dbtp")
    if tp is not None and tp > 0.0:
        report["warnings"].append(
            f"The output's true peak is {tp:+.2f} dBTP (above 0 dBTP): converters and lossy "
            "encoders downstream may clip; lower the gain before delivery."
        )
    report["analysis"] = {k: res[k] for k in ("method", "spectrum", "quietest_passage",
                                              "histogram", "true_peak", "dc_offset") if k in res}
    report["notes"].extend(_difference_notes(report))


def _difference_notes(report):
    """Why measured and predicted figures differ, when they do (> 0.5 dB)."""
    m, p = report["measured"], report["predicted"]
    notes = []
    if m.get("error_power_lsb2") and p.get("error_power_lsb2"):
        diff = 10 * math.log10(m["error_power_lsb2"] / p["error_power_lsb2"])
        if abs(diff) > 0.5:
            why = []
            if m.get("clipped_samples"):
                why.append("clipping adds error the model leaves out")
            if report["settings"]["dither_applied"] == "none":
                why.append("without dither the error depends on the signal (the Δ²/12 model "
                           "assumes a busy signal)")
            if report["analysis"].get("quietest_passage") is None and m.get("signal_rms_dbfs") is None:
                why.append("the input is digital silence")
            if not why:
                why.append("the signal is too short or too quiet for the statistics")
            notes.append(f"The measured error power is {diff:+.1f} dB from the prediction: "
                         + "; ".join(why) + ".")
    return notes


def _figures(rq, frames, passthrough):
    """(measured total, predicted total, per-channel rows) from the running sums."""
    t = rq.totals()
    nch = rq.channels
    power = 0.0 if passthrough else predicted_error_power_lsb2(rq.quantizer, rq.dither, rq.coeffs)
    channels = []
    for c in range(nch):
        meas = measured_figures(sum_x2=t["sum_x2"][c], sum_e=t["sum_e"][c], sum_e2=t["sum_e2"][c],
                                frames=frames, scale=rq.scale, clipped=t["clipped"][c],
                                max_abs_e=t["max_abs_e"][c])
        pred = predicted_figures(power_lsb2=power, sum_x2=t["sum_x2"][c], frames=frames,
                                 scale=rq.scale)
        channels.append({"channel": c + 1, "measured": meas, "predicted": pred})
    total = measured_figures(sum_x2=float(t["sum_x2"].sum()), sum_e=float(t["sum_e"].sum()),
                             sum_e2=float(t["sum_e2"].sum()), frames=frames * nch,
                             scale=rq.scale, clipped=t["clipped"].sum(),
                             max_abs_e=float(t["max_abs_e"].max()))
    total["over_full_scale_samples"] = int(t["over_full_scale"].sum())
    total["shaping_overloads"] = int(t["overloads"].sum())
    pred_total = predicted_figures(power_lsb2=power, sum_x2=float(t["sum_x2"].sum()),
                                   frames=frames * nch, scale=rq.scale)
    return total, pred_total, channels


def _sentences(total, *, bits, dither, passthrough):
    """The report's warnings and notes about what the figures show."""
    warnings, notes = [], []
    if passthrough:
        notes.append(
            f"The input already lies on the {bits}-bit grid: it was written unchanged, "
            "without dither (pass --force-dither to dither anyway)."
        )
    if total["over_full_scale_samples"]:
        warnings.append(
            f"{total['over_full_scale_samples']} input samples lie beyond full scale and were "
            "clipped; lower the gain before requantizing."
        )
    if total["clipped_samples"]:
        warnings.append(
            f"{total['clipped_samples']} output samples were clipped at the end of the "
            f"{bits}-bit range; the measured error includes the clipping, so it exceeds "
            "the prediction. Leave more headroom."
        )
    if total["shaping_overloads"]:
        warnings.append(
            f"The noise-shaping loop overloaded {total['shaping_overloads']} times (its fed-back "
            "error was bounded to keep it stable); use more bits, less shaping or more headroom."
        )
    if dither == "none" and not passthrough and bits < 24:
        notes.append(
            "Without dither the error follows the signal; the predicted Δ²/12 holds only for "
            "busy signals, not for quiet passages or fades."
        )
    peak_db = total["error_peak_dbfs"]
    if peak_db is not None and peak_db > -20.0:
        warnings.append(
            f"The error signal peaks at {peak_db:.1f} dBFS: it is loud; start playback at a low "
            "level."
        )
    return warnings, notes


def settings_block(recipe, *, coeffs, dither_applied, block_frames):
    """The report's ``settings``: the recipe's own dictionary (:meth:`Recipe.to_dict`), with
    the coefficients applied at the file's rate, the dither applied and the block size."""
    s = recipe.to_dict()
    s["shaping_coeffs"] = [float(v) for v in coeffs]
    s["dither_applied"] = dither_applied
    s["block_frames"] = block_frames
    return s


def build_report(rq, *, recipe, coeffs, source, frames, targets, out_format, error_format,
                 passthrough, block_frames):
    """The report of one conversion, from the requantizer's running sums.

    Parameters
    ----------
    rq : requant.dsp.quantizer.Requantizer
        After the last block.
    recipe : requant.recipe.Recipe
        As asked for (with its seed).
    coeffs : ndarray
        The recipe's shaping coefficients at the file's rate.
    source, targets
        The input's facts and the checked outputs (:mod:`requant.convert`).
    frames : int
        Frames converted.
    out_format, error_format : str
        Containers written (``RF64`` for large WAV).
    passthrough : bool
        The input was on the grid and written unchanged.
    block_frames : int

    Returns
    -------
    dict
        The report (docs/theory.md); :func:`merge_analysis` adds the analysis.
    """
    total, pred_total, channels = _figures(rq, frames, passthrough)
    warnings, notes = _sentences(total, bits=rq.bits, dither=recipe.dither,
                                 passthrough=passthrough)
    if frames != source.frames:
        warnings.append(f"{targets.src!r} holds {frames} frames although its header declares "
                        f"{source.frames}; the frames that are there were converted.")
    return {
        "requant_version": __version__,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "settings": settings_block(recipe, coeffs=coeffs, dither_applied=rq.dither,
                                   block_frames=block_frames),
        "input": {
            "path": targets.src,
            "format": source.format,
            "sample_rate": source.rate,
            "channels": source.channels,
            "frames": frames,
            "duration_s": frames / source.rate if source.rate else 0.0,
            "subtype": source.subtype,
        },
        "output": {
            "path": targets.dst,
            "format": out_format,
            "subtype": targets.subtype,
            "bits": rq.bits,
            "container_bits": container_bits_of(targets.subtype),
            "passthrough": bool(passthrough),
        },
        "error_signal": None if targets.error is None else {
            "path": targets.error, "format": error_format, "subtype": "FLOAT"},
        "lsb": 1.0 / rq.scale,
        "measured": total,
        "predicted": pred_total,
        "channels": channels,
        "warnings": warnings,
        "notes": notes,
    }
