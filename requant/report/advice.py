"""The "which method for this file" paragraph, shared by ``requant inspect`` and the
convert report.

Wording only: the figures and the decision come from
:func:`requant.dsp.audibility.advise` (an :class:`~requant.dsp.audibility.Advice`).
"""

__all__ = ["advice_paragraph", "threshold_comparison", "delivered_rate", "requantized_share",
           "flat_tpdf_figures", "threshold_figures", "report_advice"]


def _db(v):
    return f"{v:.1f}"


def _side(v, *, above="above", below="below"):
    """``'3.2 dB above'`` / ``'3.2 dB below'`` for a signed difference."""
    return f"{abs(v):.1f} dB {above if v > 0 else below}"


def _level(a):
    """The sentence about the quietest passage against flat TPDF's noise, or ''."""
    if a.quiet_dbfs is None:
        return ""
    d = a.quiet_dbfs - a.tpdf_dbfs
    where = (f"{_side(d)} flat TPDF's noise at {a.bits} bits ({_db(a.tpdf_dbfs)} dBFS)")
    if a.quiet_is_noise:
        return f"The file's own noise floor sits at {_db(a.quiet_dbfs)} dBFS, {where}. "
    kind = " (music or tones, not noise)" if a.quiet_is_noise is False else ""
    covered = ": the noise will cover it" if d < 0 else ""
    return f"The quietest passage sits at {_db(a.quiet_dbfs)} dBFS{kind}, {where}{covered}. "


def _loud(a):
    return f"played loud (a full-scale sine at {a.playback_db_spl:g} dB SPL)"


def advice_paragraph(a):
    """One paragraph: which method suits the file at ``a.bits`` bits, and why in numbers.

    Parameters
    ----------
    a : requant.dsp.audibility.Advice

    Returns
    -------
    str
        Plain text (ASCII digits and signs), no trailing newline.
    """
    head = f"At {a.bits} bits and {a.sample_rate:g} Hz: "
    if a.reason == "lossless":
        return (head + f"no method needed. Only {a.bits_in_use} bits are in use, so "
                f"converting to {a.bits} bits is exact (no dither, no shaping).")
    return head + _lower_first(_body(a))


def _body(a):
    """The paragraph after its head, for every reason but ``lossless``."""
    text = _level(a)
    weighted = (f"Weighted by the hearing threshold (Terhardt 1979), flat TPDF's noise is "
                f"{_db(a.tpdf_threshold_dbfs)} dBFS")
    shaped = ""
    if a.hearing_benefit_db is not None:
        shaped = (f"the hearing-threshold shaper designed for {a.sample_rate:g} Hz lowers it "
                  f"by {_db(a.hearing_benefit_db)} dB")
    if a.reason == "own-noise":
        text += (f"Flat TPDF raises that floor by {a.floor_rise_tpdf_db:.2f} dB, too little to "
                 "notice: the added noise hides under the file's own")
        if a.floor_rise_hearing_db is not None:
            text += (f"; shaping would lower its audible part by {_db(a.hearing_benefit_db)} dB "
                     f"but add {_db(a.hearing_total_gain_db)} dB of total noise (a rise of "
                     f"{a.floor_rise_hearing_db:.2f} dB), so it buys nothing here")
        return text + ". Use plain TPDF (--dither tpdf)."
    if a.reason == "below-threshold":
        text += (f"{weighted}, {_side(a.tpdf_above_threshold_db)} the threshold of hearing "
                 f"even when {_loud(a)}: plain TPDF (--dither tpdf) is inaudible here")
        if shaped:
            text += f"; {shaped}, to no audible benefit"
        return text + "."
    text += (f"{weighted}: {_loud(a)} it would lie {_side(a.tpdf_above_threshold_db)} the "
             "threshold of hearing in quiet, in pauses and fades. ")
    if a.reason == "no-design":
        return text + (f"No hearing-threshold design exists at {a.sample_rate:g} Hz (it covers "
                       "8000 to 384000 Hz): use plain TPDF (--dither tpdf), or more bits.")
    text += (shaped[0].upper() + shaped[1:] + f", to {_side(a.hearing_above_threshold_db)} the "
             "threshold: use --dither tpdf --shaping hearing.")
    if a.shaped_still_audible:
        text += (" Even shaped, the noise stays audible when played loud: more bits help more "
                 "than any shaper.")
    return text + (f" Shaping raises the total noise power by {_db(a.hearing_total_gain_db)} dB, "
                   "so SNR and A-weighted figures get worse while the audible noise falls.")


def _lower_first(text):
    return text[:1].lower() + text[1:]


def threshold_comparison(measured_dbfs, flat_dbfs, *, bits, predicted=False):
    """``'-109.4 dBFS measured, 15.3 dB below flat TPDF at 16 bits (-94.1 dBFS predicted)'``.

    Parameters
    ----------
    measured_dbfs : float
        The method's threshold-weighted noise (measured, or predicted when
        ``predicted``).
    flat_dbfs : float
        Flat TPDF's predicted threshold-weighted noise at ``bits``.
    bits : int
    predicted : bool
        Whether ``measured_dbfs`` is a prediction.
    """
    d = measured_dbfs - flat_dbfs
    how = "predicted" if predicted else "measured"
    rel = "the same as" if abs(d) < 0.05 else _side(d)
    return (f"{_db(measured_dbfs)} dBFS {how}, {rel} flat TPDF at {bits} bits "
            f"({_db(flat_dbfs)} dBFS predicted)")


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
                 f"noise by {_db(a.hearing_benefit_db)} dB.")
    elif a.choice == "tpdf" and shaped:
        text += " This conversion is shaped; plain TPDF would serve as well here."
    return text
