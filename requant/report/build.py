"""Building the report of a conversion: figures, predictions, warnings, the analysis.

:func:`build_report` is the one place that makes a :class:`~requant.report.model.Report`:
it gathers the figures as plain values, folds in the analysis, writes the
sentences and constructs the typed report once. Rendering is elsewhere
(:mod:`requant.report.write`, :mod:`requant.report.render`): this module only
decides what the report says.
"""

import datetime as _dt
import math
from dataclasses import dataclass
from typing import Any

from requant import __version__
from requant.audio_io.formats import LOSSY_SUBTYPES, container_bits_of
from requant.dsp.figures import measured_figures, power_to_dbfs, predicted_figures
from requant.dsp.quantizer import predicted_error_power_lsb2
from requant.recipe import Recipe
from requant.report.model import (
    Analysis,
    ChannelMeasured,
    ChannelRow,
    ErrorGain,
    ErrorSignalFacts,
    InputFacts,
    MeasuredFigures,
    MetadataRecord,
    OutputFacts,
    PredictedFigures,
    PredictionCoverage,
    Report,
    ReportSettings,
)

__all__ = ["build_report", "Conversion", "settings_block", "passthrough_reason"]

#: The weighted noise figures the analysis measures and predicts.
_WEIGHTED_KEYS = ("a_weighted_noise_dbfs", "itu468_noise_dbfs", "threshold_weighted_noise_dbfs")
_ANALYSIS_KEYS = ("method", "spectrum", "quietest_passage", "histogram", "true_peak", "loudness",
                  "dc_offset")


def _fold_analysis(res, total, pred_total, channels, *, passthrough):
    """Fold the analyzer's figures (``res``) into the figures' dicts, in place.

    Returns the analysis' warnings and its :class:`Analysis` section.
    """
    for key in _WEIGHTED_KEYS + ("tonal_fraction", "correlation_fraction",
                                 "correlated_error_fraction"):
        total[key] = res["measured"][key]
    for key in _WEIGHTED_KEYS:
        pred_total[key] = res["predicted"][key]
    tp = res.get("true_peak")
    if tp is not None:
        total["input_true_peak_dbtp"] = tp["input_dbtp"]
        total["output_true_peak_dbtp"] = tp["output_dbtp"]
    for c, row in enumerate(res["channels"]):
        meas, pred = channels[c]
        meas["a_weighted_noise_dbfs"] = row["a"]
        meas["itu468_noise_dbfs"] = row["itu468"]
        meas["threshold_weighted_noise_dbfs"] = row["threshold"]
        meas["correlated_error_fraction"] = max(row["tonal_fraction"], row["correlation_fraction"])
        meas["input_dc_offset"] = res["dc_offset"]["input"][c]
        meas["output_dc_offset"] = res["dc_offset"]["output"][c]
        if tp is not None:
            meas["input_true_peak_dbtp"] = tp["input_dbtp_per_channel"][c]
            meas["output_true_peak_dbtp"] = tp["output_dbtp_per_channel"][c]
        for key in _WEIGHTED_KEYS:
            pred[key] = res["predicted"][key]
    if passthrough:
        # written unchanged: no error, nothing to predict, nothing to warn about
        for key in _WEIGHTED_KEYS:
            pred_total[key] = None
            for _, pred in channels:
                pred[key] = None
        summary = {"correlated_error_fraction": 0.0, "signal_correlated": False, "warnings": []}
    else:
        from requant.dsp.analysis import correlated_summary  # only when analysed

        summary = correlated_summary(res)
    total["correlated_error_fraction"] = summary["correlated_error_fraction"]
    total["signal_correlated"] = summary["signal_correlated"]
    total["signal_correlated_reason"] = summary.get("signal_correlated_reason")
    warnings = list(summary["warnings"])
    tp_db = total.get("output_true_peak_dbtp")
    if tp_db is not None and tp_db > 0.0:
        warnings.append(
            f"The output's true peak is {tp_db:+.2f} dBTP (above 0 dBTP): converters and lossy "
            "encoders downstream may clip; convert again with --peak-ceiling -1 (one gain that "
            "puts the true peak at -1 dBTP)."
        )
    section = Analysis(**{k: res[k] for k in _ANALYSIS_KEYS if k in res})
    return warnings, section


def _difference_notes(m, p, *, dither_applied, section):
    """Why measured and predicted figures differ, when they do (> 0.5 dB).

    ``m`` and ``p`` are the measured and predicted figures of all channels
    together (dicts), ``section`` the :class:`Analysis`.
    """
    notes = []
    if m.get("error_power_lsb2") and p.get("error_power_lsb2"):
        diff = 10 * math.log10(m["error_power_lsb2"] / p["error_power_lsb2"])
        if abs(diff) > 0.5:
            why = []
            if m.get("clipped_samples"):
                why.append("clipping adds error the model leaves out")
            if dither_applied == "none":
                why.append("without dither the error depends on the signal (the Δ²/12 model "
                           "assumes a busy signal)")
            if section.quietest_passage is None and m.get("signal_rms_dbfs") is None:
                why.append("the input is digital silence")
            if not why:
                why.append("the signal is too short or too quiet for the statistics")
            notes.append(f"The measured error power is {diff:+.1f} dB from the prediction: "
                         + "; ".join(why) + ".")
    return notes


def _coverage(rq, conv, analysis, model_weighted):
    """The :class:`PredictionCoverage`: the counts from the requantizer (and, analysed, the
    analysis), the model per covered sample, and the measured figures over the covered
    samples (analysed only)."""
    t = rq.totals()
    samples = conv.frames * rq.channels
    silent, clipped = int(t["silent"].sum()), int(t["clipped"].sum())
    cov = None if analysis is None or conv.passthrough else analysis.get("coverage")
    unchanged = beyond = None
    if cov is not None:
        beyond = int(sum(cov["clipped_samples"]))
        if cov.get("unchanged_samples") is not None:
            unchanged = int(sum(cov["unchanged_samples"]))
    passthrough = conv.passthrough
    covered = 0 if passthrough else max(samples - silent - clipped - (unchanged or 0), 0)
    model = 0.0 if passthrough else predicted_error_power_lsb2(rq.quantizer, rq.dither, rq.coeffs)
    scale2 = rq.scale * rq.scale
    predicted = {"error_power_lsb2": model, "error_rms_dbfs": power_to_dbfs(model / scale2)}
    predicted.update({k: None if passthrough else model_weighted.get(k) for k in _WEIGHTED_KEYS})
    measured = None
    if cov is not None:
        counts = cov["covered_samples"]
        n = sum(counts)
        e2 = max(float(t["sum_e2"].sum()) - sum(cov["clipped_error_energy"]) * scale2, 0.0)
        power = e2 / n if n else None
        measured = {"error_power_lsb2": power,
                    "error_rms_dbfs": None if not power else power_to_dbfs(power / scale2)}
        for key, name in zip(_WEIGHTED_KEYS, ("a", "itu468", "threshold")):
            pairs = [(v, c) for v, c in zip(cov["covered_mean_square"][name], counts)
                     if v is not None and c]
            weight = sum(c for _, c in pairs)
            measured[key] = (power_to_dbfs(sum(v * c for v, c in pairs) / weight)
                             if weight else None)
    return PredictionCoverage(samples=samples, covered_samples=covered, silent_samples=silent,
                              clipped_samples=clipped, unchanged_samples=unchanged,
                              clipped_beyond_model_samples=beyond, measured=measured,
                              predicted=predicted)


def _db_from(m, p):
    """The difference of two levels (dB), rounded to 0.01 dB; None when undefined."""
    return None if m is None or p is None else _r2(m - p)


def _r2(v):
    """``v`` rounded to 0.01 with no negative zero (for ``+.2f``)."""
    return round(v, 2) + 0.0


def _coverage_note(cov, total, *, bits, passthrough):
    """Which samples the prediction covers and why the whole file's figures differ from it:
    one sentence, or None when it covers every sample."""
    if passthrough or not cov.samples or cov.covered_samples >= cov.samples:
        return None
    parts = []
    if cov.silent_samples:
        parts.append(f"{cov.silent_samples:,} kept digitally silent (exact zeros, no error)")
    if cov.clipped_samples:
        parts.append(f"{cov.clipped_samples:,} clipped at the ends of the {bits}-bit range "
                     "(their error is clipping, not requantization noise)")
    if cov.unchanged_samples:
        parts.append(f"{cov.unchanged_samples:,} already on the {bits}-bit grid, which rounding "
                     "without dither passes unchanged (no error)")
    text = (f"The prediction covers {cov.covered_samples:,} of {cov.samples:,} samples: "
            + "; ".join(parts) + ".")
    m, p = cov.measured, cov.predicted
    model = p["error_power_lsb2"]
    if m is not None and m["error_power_lsb2"] and model:
        d = _r2(10.0 * math.log10(m["error_power_lsb2"] / model))
        names = (("a_weighted_noise_dbfs", "A-weighted"), ("itu468_noise_dbfs", "ITU-R 468"),
                 ("threshold_weighted_noise_dbfs", "hearing-threshold-weighted"))
        more = [f"{label} {v:+.2f}" for key, label in names
                if (v := _db_from(m.get(key), p.get(key))) is not None]
        text += (f" Over the covered samples the measured error power is {d:+.2f} dB from the "
                 "model" + (f" ({', '.join(more)} dB)" if more else "") + ".")
    whole = total.get("error_power_lsb2")
    if whole is not None and model:
        if whole <= 0.0:
            text += " Over the whole file there is no error at all."
        else:
            d = 10.0 * math.log10(whole / model)
            why = []
            if cov.silent_samples or cov.unchanged_samples:
                why.append("the samples with no error lower it")
            if cov.clipped_samples:
                why.append("the clipped samples raise it")
            text += (f" Over the whole file the measured error power is {abs(d):.2f} dB "
                     f"{'below' if d < 0 else 'above'} the model's for every sample ("
                     + " and ".join(why) + "); the report's predicted figures for the whole "
                     "file are the model's times the share covered.")
    return text


def _peak_notes(tp):
    """A sentence for each signal whose true-peak reading fell below its sample peak."""
    if not tp:
        return []
    notes = []
    for what in ("input", "output"):
        meter, sample = tp.get(f"{what}_meter_dbtp"), tp.get(f"{what}_sample_peak_dbfs")
        if meter is None or sample is None or meter >= sample - 0.005:
            continue
        notes.append(
            f"The {what}'s true peak shown is its sample peak, {sample:+.2f} dBFS: the ITU-R "
            f"BS.1770-4 Annex 2 interpolator read {sample - meter:.2f} dB lower (its filter's "
            "ripple: it does not pass the samples through exactly), and a true peak is never "
            "below the sample peak.")
    return notes


def _figures(rq, frames, passthrough, excluded):
    """(measured total, predicted total, per-channel (measured, predicted)) from the running
    sums, as dicts of the figures' fields.

    The prediction covers the requantized samples only (:func:`_excluded`): the
    predicted error power is the model's power times the share of samples it
    covers (each channel's own share, and all channels' together for the
    total).
    """
    t = rq.totals()
    nch = rq.channels
    power = 0.0 if passthrough else predicted_error_power_lsb2(rq.quantizer, rq.dither, rq.coeffs)
    silent = [int(v) for v in t["silent"]]
    channels = []
    for c in range(nch):
        meas = measured_figures(sum_x2=t["sum_x2"][c], sum_e=t["sum_e"][c], sum_e2=t["sum_e2"][c],
                                frames=frames, scale=rq.scale, clipped=t["clipped"][c],
                                max_abs_e=t["max_abs_e"][c])
        meas["silent_frames"] = silent[c]
        pred = predicted_figures(power_lsb2=power * _share(frames - excluded[c], frames),
                                 sum_x2=t["sum_x2"][c], frames=frames, scale=rq.scale)
        channels.append((meas, pred))
    total = measured_figures(sum_x2=float(t["sum_x2"].sum()), sum_e=float(t["sum_e"].sum()),
                             sum_e2=float(t["sum_e2"].sum()), frames=frames * nch,
                             scale=rq.scale, clipped=t["clipped"].sum(),
                             max_abs_e=float(t["max_abs_e"].max()))
    total["over_full_scale_samples"] = int(t["over_full_scale"].sum())
    total["shaping_overloads"] = int(t["overloads"].sum())
    total["silent_frames"] = sum(silent)
    pred_total = predicted_figures(
        power_lsb2=power * _share(frames * nch - sum(excluded), frames * nch),
        sum_x2=float(t["sum_x2"].sum()), frames=frames * nch, scale=rq.scale)
    return total, pred_total, channels


def _excluded(rq, analysis, passthrough):
    """Per channel, the samples the prediction does not cover: kept silent, clipped at the
    ends of the range and, without dither, passed unchanged (from the analysis)."""
    t = rq.totals()
    out = [int(a) + int(b) for a, b in zip(t["silent"], t["clipped"])]
    cov = (analysis or {}).get("coverage")
    if cov is not None and cov.get("unchanged_samples") is not None and not passthrough:
        out = [a + int(u) for a, u in zip(out, cov["unchanged_samples"])]
    return out


def _weighted_for_coverage(pred_total, channels, frames, excluded):
    """Scale the analysis' weighted predictions (the model's, for every sample) to the share
    of the samples the prediction covers."""
    if not any(excluded):
        return
    for (_, pred), ex in zip(channels, excluded):
        _scale_weighted(pred, _share(frames - ex, frames))
    nall = frames * len(channels)
    _scale_weighted(pred_total, _share(nall - sum(excluded), nall))


def _share(part, whole):
    """``part / whole``, 1 for nothing at all (no frames: the model's own power)."""
    return part / whole if whole else 1.0


def _silence_note(channels, *, frames, rate, min_ms):
    """The line saying how much digital silence was kept silent, or None."""
    silent = [int(meas["silent_frames"]) for meas, _ in channels]
    if not any(silent) or not frames:
        return None
    if len(set(silent)) == 1:
        where = f"{silent[0] / rate:.2f} s of {frames / rate:.2f} s" + (
            " in every channel" if len(silent) > 1 else "")
    else:
        where = ", ".join(f"channel {c + 1} {n / rate:.2f} s" for c, n in enumerate(silent))
        where += f" (of {frames / rate:.2f} s)"
    share = 100.0 * sum(silent) / (frames * len(silent))
    return (f"Digital silence kept silent: {where}, {share:.1f}% of all samples, in runs of exact "
            f"zeros of at least {min_ms:g} ms; no dither there, and the predictions cover the "
            "requantized samples only (--silence dither to dither it).")


def _scale_weighted(figures, share):
    """Weighted predictions (from the analysis, for every sample) scaled to the requantized
    share of the samples, in place."""
    for key in _WEIGHTED_KEYS:
        value = figures.get(key)
        if value is not None:
            figures[key] = value + 10.0 * math.log10(share) if share > 0 else None


def passthrough_reason(subtype, bits):
    """Why an input on the target grid is on it, from its container: one clause.

    >>> passthrough_reason("PCM_24", 16)
    'it holds 16-bit audio in a 24-bit file (its low 8 bits are all zero)'
    """
    held = container_bits_of(subtype) if subtype.startswith("PCM") else None
    if subtype in ("FLOAT", "DOUBLE"):
        return (f"its {'32' if subtype == 'FLOAT' else '64'}-bit float samples all lie on the "
                f"{bits}-bit grid ({bits}-bit audio in a float file)")
    if held == bits:
        return f"it is already {bits}-bit"
    if held is not None and held > bits:
        return (f"it holds {bits}-bit audio in a {held}-bit file (its low {held - bits} bits "
                "are all zero)")
    if held is not None:
        return f"it is {held}-bit, shorter than the {bits}-bit target"
    return f"its samples all lie on the {bits}-bit grid"


def _sentences(total, *, bits, dither, passthrough, subtype="", error_written=True):
    """The report's warnings and notes about what the figures show."""
    warnings, notes = [], []
    if passthrough:
        notes.append(
            f"The input already lies on the {bits}-bit grid: "
            f"{passthrough_reason(subtype, bits)}. It was written unchanged, without dither "
            "(pass --force-dither to dither anyway)."
        )
    if subtype in LOSSY_SUBTYPES:
        warnings.append(
            f"The source is lossy-coded ({LOSSY_SUBTYPES[subtype]}): its noise floor is the "
            "codec's, not the master's, so the figures describe requantizing the decoded "
            "codec output; deliver from the uncompressed master where you can."
        )
    if total["over_full_scale_samples"]:
        warnings.append(
            f"{total['over_full_scale_samples']} input samples lie beyond full scale and were "
            "clipped; lower the gain before requantizing (--gain DB, or --peak-ceiling -1 "
            "for one gain that puts the true peak at -1 dBTP)."
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
    if peak_db is not None and peak_db > -20.0 and error_written:
        warnings.append(
            f"The error signal peaks at {peak_db:.1f} dBFS: it is loud; start playback at a low "
            "level."
        )
    return warnings, notes


def settings_block(recipe, *, coeffs, dither_applied, block_frames):
    """The report's ``settings``: the recipe's own dictionary (:meth:`Recipe.to_dict`), with
    the coefficients applied at the file's rate, the dither applied and the block size."""
    return ReportSettings(recipe=recipe.to_dict(), shaping_coeffs=tuple(float(v) for v in coeffs),
                          dither_applied=dither_applied, block_frames=block_frames)


@dataclass(frozen=True)
class Conversion:
    """What a conversion did, as the report states it (everything but the figures).

    Parameters
    ----------
    recipe : requant.recipe.Recipe
        As asked for (with its seed).
    coeffs : ndarray
        The recipe's shaping coefficients at the file's rate.
    source : requant.convert._Source
        The input's facts, from its header.
    targets : requant.convert._Targets
        The checked outputs.
    frames : int, frames
        Frames converted.
    out_format, error_format : str
        Containers written (``RF64`` for large WAV); ``error_format`` is None
        without an error signal.
    passthrough : bool
        The input was on the grid and written unchanged.
    block_frames : int, frames
    error_gain : requant.report.model.ErrorGain, optional
        How loud the error signal was written; default exact (unity gain).
    prepared : requant.dsp.prepare.PreparedFacts, optional
        What the stages before the quantizer did (channels, rate, gain); None
        when none applied. ``frames`` are then the delivered frames and
        ``frames_in`` the frames read.
    frames_in : int, optional
        Frames read from the input (default: ``frames``).
    """

    recipe: Recipe
    coeffs: Any
    source: Any
    targets: Any
    frames: int
    out_format: str
    error_format: str | None
    passthrough: bool
    block_frames: int
    error_gain: ErrorGain = ErrorGain()
    prepared: Any = None
    frames_in: int | None = None

    @property
    def read_frames(self):
        """Frames read from the input."""
        return self.frames if self.frames_in is None else self.frames_in

    @property
    def rate(self):
        """The delivered sample rate, Hz."""
        return self.source.rate if self.prepared is None else self.prepared.rate_out


def build_report(rq, conv, *, analysis=None, metadata=None):
    """The report of one conversion, from the requantizer's running sums and the analysis.

    Parameters
    ----------
    rq : requant.dsp.quantizer.Requantizer
        After the last block.
    conv : Conversion
    analysis : dict, optional
        :meth:`requant.dsp.analysis.ErrorAnalyzer.finish`; None when the
        analysis did not run.
    metadata : dict, optional
        The record of the metadata carried over
        (:class:`requant.audio_io.metadata.CarryMetadata`); None when not asked.

    Returns
    -------
    requant.report.model.Report
    """
    excluded = _excluded(rq, analysis, conv.passthrough)
    total, pred_total, channels = _figures(rq, conv.frames, conv.passthrough, excluded)
    warnings, notes = _sentences(total, bits=rq.bits, dither=conv.recipe.dither,
                                 passthrough=conv.passthrough, subtype=conv.source.subtype,
                                 error_written=conv.targets.error is not None)
    if conv.read_frames != conv.source.declared_frames:
        warnings.append(f"{conv.targets.src!r} holds {conv.read_frames} frames although its "
                        f"header declares {conv.source.declared_frames} (the file was cut "
                        "short); the frames that are there were converted.")
    section = None
    model_weighted = {}
    if analysis is not None:
        more, section = _fold_analysis(analysis, total, pred_total, channels,
                                       passthrough=conv.passthrough)
        warnings.extend(more)
        model_weighted = {k: pred_total.get(k) for k in _WEIGHTED_KEYS}
        _weighted_for_coverage(pred_total, channels, conv.frames, excluded)
        notes.extend(_difference_notes(total, pred_total, dither_applied=rq.dither,
                                       section=section))
        notes.extend(_peak_notes(analysis.get("true_peak")))
    coverage = _coverage(rq, conv, analysis, model_weighted)
    line = _coverage_note(coverage, total, bits=rq.bits, passthrough=conv.passthrough)
    if line:
        notes.append(line)
    if conv.prepared is not None:
        notes.insert(0, f"before requantizing: {conv.prepared.sentence()}")
    if metadata is not None:
        from requant.audio_io.metadata import metadata_sentences

        line, more = metadata_sentences(MetadataRecord.from_dict(metadata), conv.out_format)
        if line:
            notes.append(line)
        warnings.extend(more)
    note = _silence_note(channels, frames=conv.frames, rate=conv.rate,
                         min_ms=conv.recipe.silence_min_ms)
    if note:
        notes.append(note)
    return Report(
        requant_version=__version__,
        created=_dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
        settings=settings_block(conv.recipe, coeffs=conv.coeffs, dither_applied=rq.dither,
                                block_frames=conv.block_frames),
        **_files(rq, conv, metadata),
        lsb=1.0 / rq.scale,
        measured=MeasuredFigures(**total),
        predicted=PredictedFigures(**pred_total),
        channels=tuple(ChannelRow(channel=c + 1, measured=ChannelMeasured(**meas),
                                  predicted=PredictedFigures(**pred))
                       for c, (meas, pred) in enumerate(channels)),
        warnings=tuple(warnings),
        notes=tuple(notes),
        analysis=section,
        preparation=(None if conv.prepared is None
                     else {**conv.prepared.to_dict(), "frames_out": conv.frames}),
        coverage=coverage,
    )


def _files(rq, conv, metadata):
    """The report's ``input``, ``output`` and ``error_signal``."""
    source, targets, frames = conv.source, conv.targets, conv.read_frames
    record = None if metadata is None else MetadataRecord.from_dict(metadata)
    return {
        "input": InputFacts(path=targets.src, format=source.format, sample_rate=source.rate,
                            channels=source.channels, frames=frames,
                            duration_s=frames / source.rate if source.rate else 0.0,
                            subtype=source.subtype, declared_frames=source.declared_frames),
        "output": OutputFacts(path=targets.dst, format=conv.out_format, subtype=targets.subtype,
                              bits=rq.bits, container_bits=container_bits_of(targets.subtype),
                              passthrough=bool(conv.passthrough), metadata=record),
        "error_signal": (None if targets.error is None
                         else ErrorSignalFacts(path=targets.error, format=conv.error_format,
                                               gain=conv.error_gain)),
    }
