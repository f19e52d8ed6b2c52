"""Streaming file conversion: read blocks, requantize, write codes, error
signal and report.

Memory stays flat: one block buffer is reused for the whole file. Outputs
are written to temporary files and renamed at the end (:mod:`requant.audio_io.atomic`),
so a failed or interrupted run leaves nothing partial behind.
"""

import datetime as _dt
import math
import os
import sys

import numpy as np

from requant import __version__
from requant.audio_io.atomic import AtomicOutputs, check_outputs
from requant.audio_io.reader import BlockReader, first_nonfinite, on_grid, open_input, read_blocks
from requant.audio_io.writers import BlockWriter, SyncWriter, open_output, wrap_write_error
from requant.errors import InputError, UsageError
from requant.audio_io.formats import (RF64_THRESHOLD, container_bits_of, format_for_path, read_dtype_for,
                      subtype_for)
from requant.dsp.figures import measured_figures, predicted_figures
from requant.dsp.quantizer import Requantizer, check_settings, new_seed, predicted_error_power_lsb2

__all__ = ["convert_file", "resolve_shaping_spec", "DEFAULT_BLOCK_FRAMES"]

DEFAULT_BLOCK_FRAMES = 65536

_ERROR_FORMATS = {".wav": "WAV", ".wave": "WAV", ".aif": "AIFF", ".aiff": "AIFF", ".aifc": "AIFF"}
_REPORT_KINDS = (".json", ".html", ".htm", ".md")


def resolve_shaping_spec(spec, sample_rate, *, order=None, limit_db=None):
    """Turn a shaping spec into (name, coefficients).

    ``spec`` is 'none', 'first-order', 'hearing', a JSON file of coefficients
    or a comma list. Everything but 'none' is handled by
    :mod:`requant.dsp.shaping` (imported only when needed).
    """
    if spec is None or spec == "none":
        return "none", np.zeros(0)
    from requant.dsp import shaping

    kwargs = {}
    if order is not None:
        kwargs["order"] = order
    if limit_db is not None:
        kwargs["max_gain_db"] = limit_db
    name, h = shaping.resolve_shaping(spec, sample_rate, **kwargs)
    return name, np.asarray(h, dtype=np.float64)


def convert_file(in_path, out_path, *, bits=16, quantizer="round", dither="tpdf", shaping="none",
                 shaping_order=None, shaping_limit_db=None, seed=None, error_path=None,
                 report_path=None, overwrite=False, force_dither=False,
                 block_frames=DEFAULT_BLOCK_FRAMES, out_format=None, progress=None, tags=None,
                 finalize=None, analyze=None, keep_analyzer=False):
    """Requantize one audio file.

    Parameters
    ----------
    in_path : path
        Any file libsndfile reads: integer or float, any channels and rate.
    out_path : path
        The container follows the extension (.wav, .flac, .aiff) unless
        ``out_format`` is given.
    bits : int, 1..32, default 16
        Target word length.
    quantizer : {'round', 'truncate'}, default 'round'
    dither : {'none', 'rpdf', 'tpdf', 'tpdf-hp'}, default 'tpdf'
    shaping : str, default 'none'
        'none', 'first-order', 'hearing', a JSON file or a comma list of h_k.
    shaping_order, shaping_limit_db : int, float, optional
        Order and total-gain limit (dB) of the 'hearing' design.
    seed : int, optional
        Without it a fresh seed is drawn; it is recorded in the report.
    error_path : path, optional
        Write the error signal (output minus input) as 32-bit float.
    report_path : path, optional
        Write the report as JSON.
    overwrite : bool, default False
        Replace existing outputs (never the input).
    force_dither : bool, default False
        Dither even when the input already lies on the target grid.
    block_frames : int, default 65536
        Frames per block; the output does not depend on it.
    out_format : {'WAV', 'FLAC', 'AIFF'}, optional
    progress : callable(frames_done, frames_total), optional
    tags : dict, optional
        Text tags to store (soundfile's names: title, artist, comment, ...).
    finalize : callable(tmp_output_path, output_format, report) -> dict or None, optional
        Called on the finished temporary output before it is renamed into
        place (batch uses it to copy WAV chunks). Its dict goes into
        ``report['output']['metadata']``. An exception aborts the conversion
        and leaves nothing behind.
    analyze : bool, optional
        Measure weighted noise, error spectrum, signal-correlated error,
        the quietest passage and true peak (:mod:`requant.dsp.analysis`).
        Default: when a report is written.
    keep_analyzer : bool, default False
        Put the :class:`~requant.dsp.analysis.ErrorAnalyzer` (with the arrays the
        pictures need) in ``report['_analyzer']``; callers remove it before
        writing JSON.

    Returns
    -------
    dict
        The report (see README, "The report").

    Raises
    ------
    UsageError, InputError, OutputError
        With a one-sentence message saying what to do.
    """
    import soundfile as sf

    check_settings(bits, quantizer, dither)
    if isinstance(block_frames, bool) or not isinstance(block_frames, int) or block_frames < 1:
        raise UsageError(f"block_frames={block_frames!r} must be a positive integer")
    in_path = os.fspath(in_path)
    out_path = os.fspath(out_path)
    fmt = out_format or format_for_path(out_path)
    subtype = subtype_for(fmt, bits)
    err_fmt = None
    if error_path is not None:
        error_path = os.fspath(error_path)
        ext = os.path.splitext(error_path)[1].lower()
        if ext not in _ERROR_FORMATS:
            raise UsageError(f"{error_path!r}: the error signal is 32-bit float; name it .wav or .aiff")
        err_fmt = _ERROR_FORMATS[ext]
    if report_path is not None:
        report_path = os.fspath(report_path)
        if os.path.splitext(report_path)[1].lower() not in _REPORT_KINDS:
            raise UsageError(f"{report_path!r}: name the report .json, .html or .md")
    extra = []
    if report_path is not None and report_path.lower().endswith(".md"):
        from requant.report.render import picture_paths

        extra = list(picture_paths(report_path).values())
    check_outputs([in_path], [out_path, error_path, report_path, *extra], overwrite=overwrite)
    seed = new_seed() if seed is None else int(seed)

    with open_input(in_path) as f:
        rate, nch, frames = f.samplerate, f.channels, f.frames
        in_subtype, in_format = f.subtype, f.format
        shaping_name, coeffs = resolve_shaping_spec(shaping, rate, order=shaping_order,
                                                    limit_db=shaping_limit_db)
        dtype = read_dtype_for(in_subtype)
        scale = float(2 ** (bits - 1))
        kmin, kmax = -(2 ** (bits - 1)), 2 ** (bits - 1) - 1
        passthrough = (not force_dither) and frames > 0 and on_grid(
            f, dtype=dtype, scale=scale, kmin=kmin, kmax=kmax,
            block_frames=min(block_frames, 65536), subtype=in_subtype)
        eff_dither, eff_coeffs = ("none", np.zeros(0)) if passthrough else (dither, coeffs)
        cbits = container_bits_of(subtype)
        rq = Requantizer(nch, bits=bits, quantizer=quantizer, dither=eff_dither, coeffs=eff_coeffs,
                         seed=seed, container_bits=cbits)
        out_fmt = fmt
        if fmt == "WAV" and frames * nch * (cbits // 8) > RF64_THRESHOLD:
            out_fmt = "RF64"
        e_fmt = err_fmt
        if err_fmt == "WAV" and frames * nch * 4 > RF64_THRESHOLD:
            e_fmt = "RF64"

        outs = AtomicOutputs()
        try:
            tmp_out = outs.path_for(out_path)
            tmp_err = outs.path_for(error_path) if error_path else None
            try:
                wout = open_output(tmp_out, rate, nch, subtype, out_fmt, plain=not tags)
                werr = (open_output(tmp_err, rate, nch, "FLOAT", e_fmt, plain=True)
                        if tmp_err else None)
            except (sf.LibsndfileError, RuntimeError, OSError) as exc:
                raise wrap_write_error(exc, out_path) from None
            for key, value in (tags or {}).items():
                try:
                    setattr(wout, key, value)
                except (sf.LibsndfileError, RuntimeError, AttributeError, TypeError):
                    pass
            files = [wout] if werr is None else [wout, werr]
            if analyze is None:
                analyze = report_path is not None
            analyzer = consumer = None
            layouts = [((block_frames, nch), rq.code_dtype), ((block_frames, nch), np.float32)]
            if analyze:
                from requant.dsp.analysis import ErrorAnalyzer

                analyzer = ErrorAnalyzer(nch, rate, bits=bits, quantizer=quantizer,
                                         dither=eff_dither, coeffs=eff_coeffs,
                                         total_frames=frames, own_sums=False)
                layouts.append(((block_frames, nch), dtype))

                def consumer(bufs, n):
                    analyzer.feed(bufs[2][:n], bufs[1][:n])
            else:
                layouts = layouts[:len(files)]
            want_err = werr is not None or analyzer is not None
            short = frames <= block_frames
            if short:  # one block: threads would cost more than they save
                writer = SyncWriter(files, layouts, consumer=consumer)
                blocks = read_blocks(f, block_frames, dtype)
            else:
                # the analysis thread runs in bursts (true peak); deeper queues keep the
                # kernel from waiting on it: report vs none 1.49x -> 1.45x (median of 7)
                writer = BlockWriter(files, layouts, depth=4 if consumer else 2,
                                     consumer=consumer)
                blocks = None
            done = 0
            try:
                f.seek(0)
                for start, x in blocks or BlockReader(f, block_frames, dtype):
                    n = x.shape[0]
                    bufs = writer.buffers()
                    rq.process(x, codes=bufs[0], error=want_err,
                               err_out=bufs[1] if want_err else None)
                    if analyzer is not None:
                        bufs[2][:n] = x
                    if rq.acc[:, 6].any():
                        frame, ch, kind = first_nonfinite(x, start)
                        raise InputError(
                            f"{in_path!r} has a {kind} sample at {frame / rate:.6f} s "
                            f"(frame {frame}, channel {ch + 1}); repair the source and run again"
                        )
                    writer.submit(bufs, n)
                    done += n
                    if progress is not None:
                        progress(done, frames)
                writer.close()
            except (sf.LibsndfileError, RuntimeError, OSError) as exc:
                raise wrap_write_error(exc, out_path) from None
            finally:
                try:
                    writer.close()
                except BaseException:
                    pass
                try:
                    wout.close()
                    if werr is not None:
                        werr.close()
                except (sf.LibsndfileError, RuntimeError, OSError) as exc:
                    if sys.exc_info()[0] is None:
                        raise wrap_write_error(exc, out_path) from None
            if done != frames:
                short_note = (f"{in_path!r} holds {done} frames although its header declares "
                              f"{frames}; the frames that are there were converted.")
            else:
                short_note = None
            report = _build_report(
                rq, in_path=in_path, in_format=in_format, in_subtype=in_subtype, rate=rate,
                frames=done, out_path=out_path, out_format=out_fmt, subtype=subtype, cbits=cbits,
                error_path=error_path, e_fmt=e_fmt, shaping_name=shaping_name, coeffs=coeffs,
                dither=dither, passthrough=passthrough, force_dither=force_dither,
                block_frames=block_frames)
            if short_note:
                report["warnings"].append(short_note)
            if analyzer is not None:
                t = rq.totals()
                analyzer.use_sums(sum_x=t["sum_x"], sum_e=t["sum_e"] / rq.scale,
                                  sum_xe=t["sum_xe"] / rq.scale, sum_x2=t["sum_x2"],
                                  sum_e2=t["sum_e2"] / rq.scale**2)
                _merge_analysis(report, analyzer.finish())
                if keep_analyzer:
                    report["_analyzer"] = analyzer
            if finalize is not None:
                report["output"]["metadata"] = finalize(tmp_out, out_fmt, report)
            if report_path is not None:
                from requant.report.write import write_report

                write_report(report, analyzer, report_path, outs)
            try:
                outs.commit()
            except OSError as exc:
                raise wrap_write_error(exc, out_path) from None
        except BaseException:
            outs.discard()
            raise
    return report


def _merge_analysis(report, res):
    """Fold the analyzer's figures into the report's sections."""
    from requant.dsp.analysis import correlated_summary

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


def _build_report(rq, *, in_path, in_format, in_subtype, rate, frames, out_path, out_format,
                  subtype, cbits, error_path, e_fmt, shaping_name, coeffs, dither, passthrough,
                  force_dither, block_frames):
    t = rq.totals()
    nch = rq.channels
    power = predicted_error_power_lsb2(rq.quantizer, rq.dither, rq.coeffs)
    if passthrough:
        power = 0.0
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
    warnings, notes = [], []
    if passthrough:
        notes.append(
            f"The input already lies on the {rq.bits}-bit grid: it was written unchanged, "
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
            f"{rq.bits}-bit range; the measured error includes the clipping, so it exceeds "
            "the prediction. Leave more headroom."
        )
    if total["shaping_overloads"]:
        warnings.append(
            f"The noise-shaping loop overloaded {total['shaping_overloads']} times (its fed-back "
            "error was bounded to keep it stable); use more bits, less shaping or more headroom."
        )
    if dither == "none" and not passthrough and rq.bits < 24:
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
    return {
        "requant_version": __version__,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "settings": {
            "bits": rq.bits,
            "quantizer": rq.quantizer,
            "dither": dither,
            "dither_applied": rq.dither,
            "shaping": shaping_name,
            "shaping_coeffs": [float(v) for v in coeffs],
            "seed": rq.seed,
            "force_dither": bool(force_dither),
            "block_frames": block_frames,
        },
        "input": {
            "path": in_path,
            "format": in_format,
            "sample_rate": rate,
            "channels": nch,
            "frames": frames,
            "duration_s": frames / rate if rate else 0.0,
            "subtype": in_subtype,
        },
        "output": {
            "path": out_path,
            "format": out_format,
            "subtype": subtype,
            "bits": rq.bits,
            "container_bits": cbits,
            "passthrough": bool(passthrough),
        },
        "error_signal": None if error_path is None else {"path": error_path, "format": e_fmt,
                                                         "subtype": "FLOAT"},
        "lsb": 1.0 / rq.scale,
        "measured": total,
        "predicted": pred_total,
        "channels": channels,
        "warnings": warnings,
        "notes": notes,
    }
