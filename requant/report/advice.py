"""What a conversion's report says about hearing: flat TPDF at the same word length beside
the conversion, the hearing-threshold-weighted noise, and which method suits the file.

The figures, the decision and their wording are :mod:`requant.dsp.audibility`'s (shared with
``requant inspect``); this module reads them off a :class:`~requant.report.model.Report`.
"""

from requant.dsp.audibility import advice_paragraph, threshold_comparison

__all__ = ["advice_paragraph", "threshold_comparison", "delivered_rate", "requantized_share",
           "flat_tpdf_figures", "threshold_figures", "report_advice"]


# ------------------------------------------------------------------------------------------
# a conversion's report (requant.report.model.Report)


def delivered_rate(report):
    """The sample rate the conversion requantized at, Hz (after any rate change)."""
    prep = getattr(report, "preparation", None) or {}
    return prep.get("rate_out") or report.input.sample_rate


def requantized_share(report):
    """The share of the samples that were requantized (the rest were kept digitally silent),
    as the report's predictions assume: the predicted error power over the model's."""
    from requant.dsp.quantizer import predicted_error_power_lsb2

    s = report.settings
    model = predicted_error_power_lsb2(s.quantizer, s.dither_applied, s.shaping_coeffs)
    p = report.predicted.error_power_lsb2
    return 1.0 if not model or p is None else p / model


def flat_tpdf_figures(report):
    """What flat TPDF would give on the same requantized samples, predicted: a dict of
    ``error_power_lsb2``, ``error_rms_dbfs``, ``snr_db`` (against the measured signal),
    ``a_weighted_noise_dbfs``, ``itu468_noise_dbfs`` and ``threshold_weighted_noise_dbfs``;
    None for a pass-through or an empty file."""
    import math

    from requant.dsp.audibility import predicted_noise_dbfs

    share = requantized_share(report)
    rate = delivered_rate(report)
    if report.output.passthrough or share <= 0.0 or not rate:
        return None
    bits = report.settings.bits
    shift = 10.0 * math.log10(share)
    out = {"error_power_lsb2": 0.25 * share}
    out["error_rms_dbfs"] = predicted_noise_dbfs(bits, rate, weighting="flat") + shift
    sig = report.measured.signal_rms_dbfs
    out["snr_db"] = None if sig is None else sig - out["error_rms_dbfs"]
    for key, w in (("a_weighted_noise_dbfs", "a"), ("itu468_noise_dbfs", "itu468"),
                   ("threshold_weighted_noise_dbfs", "threshold")):
        out[key] = predicted_noise_dbfs(bits, rate, weighting=w) + shift
    return out


def threshold_figures(report):
    """``(method_dbfs, flat_dbfs, measured)``: the conversion's hearing-threshold-weighted
    noise (measured when the report was analysed, else predicted from its dither and shaping)
    and flat TPDF's, predicted, on the same samples; None for a pass-through."""
    import math

    from requant.dsp.audibility import predicted_noise_dbfs

    flat = flat_tpdf_figures(report)
    if flat is None:
        return None
    measured = report.measured.threshold_weighted_noise_dbfs
    if measured is not None:
        return measured, flat["threshold_weighted_noise_dbfs"], True
    s = report.settings
    method = predicted_noise_dbfs(s.bits, delivered_rate(report), dither=s.dither_applied,
                                  coeffs=s.shaping_coeffs)
    return (method + 10.0 * math.log10(requantized_share(report)),
            flat["threshold_weighted_noise_dbfs"], False)


def report_advice(report):
    """The report's "which method for this file" paragraph, or None (no rate, no frames).

    The quietest passage is the analysis' (the input's quietest window that is not digital
    silence), judged noise as ``requant inspect`` judges it (its ``signal_tonal_fraction``
    under :data:`~requant.dsp.audibility.NOISE_TONAL_MAX`).
    """
    from requant.dsp.audibility import NOISE_TONAL_MAX, advise

    rate = delivered_rate(report)
    s = report.settings
    if not rate or not report.input.frames:
        return None
    q = (report.analysis.quietest_passage if report.analysis is not None else None) or {}
    tonal = q.get("signal_tonal_fraction")
    a = advise(s.bits, rate, quiet_dbfs=q.get("signal_rms_dbfs"),
               quiet_is_noise=None if tonal is None else tonal < NOISE_TONAL_MAX,
               bits_in_use=s.bits if report.output.passthrough else None)
    text = advice_paragraph(a)
    shaped = bool(s.shaping_coeffs)
    if a.choice == "hearing" and not shaped:
        text += (f" This conversion is not shaped: --shaping hearing would lower its audible "
                 f"noise by {a.hearing_benefit_db:.1f} dB.")
    elif a.choice == "tpdf" and shaped:
        text += " This conversion is shaped; plain TPDF would serve as well here."
    return text
