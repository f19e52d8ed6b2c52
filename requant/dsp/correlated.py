"""Whether a requantization's error follows its signal: the verdict on the analysis' figures.

:func:`correlated_summary` reads the figures of
:meth:`requant.dsp.analysis.ErrorAnalyzer.finish` (the whole signal's and the
quietest passage's signal-correlated shares, the quietest passage's error
power against the model, the method and the signal's level) and says whether
the error follows the signal, why, and in which words. The convert report and
the audit share it.
"""

import math

__all__ = ["correlated_summary", "CORRELATED_WARNING_FRACTION", "MODULATION_WARNING_DB",
           "QUIET_UNDITHERED_LSB_RMS"]

#: Warn when this share of the error power follows the signal.
CORRELATED_WARNING_FRACTION = 0.02
#: Warn when the quietest passage's error power is this far (dB) from the model.
MODULATION_WARNING_DB = 3.0
#: Without dither, a passage (or a whole file) whose signal RMS is at or below this many LSB
#: of the output is requantized into an error that is a function of the signal, whatever
#: the correlation measures show (our rule: within about 6 dB of 1 LSB RMS, where the
#: output has only a few levels to follow the signal with).
QUIET_UNDITHERED_LSB_RMS = 2.0


def correlated_summary(res):
    """Whether the error follows the signal, and the warning sentence if so.

    Looks at the whole signal and at its quietest passage; returns
    ``correlated_error_fraction`` (the larger), ``signal_correlated``,
    ``signal_correlated_reason`` (``'measured'``: the share passes
    :data:`CORRELATED_WARNING_FRACTION`; ``'quiet-undithered'``: no dither and
    a passage, or the whole file, at or below :data:`QUIET_UNDITHERED_LSB_RMS`;
    None) and ``warnings``.

    Notes
    -----
    Without dither the error is a fixed function of the signal; at a level of
    about 1 LSB RMS the output follows the signal with a few codes only, so
    the error comes and goes with it even when it correlates little with the
    signal and shows no spectral lines (noise-like material), where both
    measured shares stay under the threshold.
    """
    whole = res["measured"]["correlated_error_fraction"]
    q = res.get("quietest_passage")
    quiet = q["correlated_error_fraction"] if q else 0.0
    frac = max(whole, quiet)
    warnings = []
    flagged = frac > CORRELATED_WARNING_FRACTION
    reason = "measured" if flagged else None
    if flagged:
        if q is not None and quiet >= whole:
            where = (f"in the quietest passage (at {q['start_s']:.2f} s, "
                     f"{_fmt_db(q['signal_rms_dbfs'])} dBFS RMS)")
        else:
            where = "over the whole signal"
        warnings.append(
            f"signal-correlated error: {100 * frac:.0f}% of the error power {where} follows "
            "the signal, so the requantization is heard as distortion rather than steady "
            "noise; use TPDF dither (and keep clipping away)."
        )
    quiet_text = _quiet_undithered(res, frac)
    if quiet_text is not None:
        if not flagged:
            warnings.append(quiet_text)
        flagged = True
        reason = reason or "quiet-undithered"
    dev = q.get("error_power_deviation_db") if q else None
    if q is not None and (dev is None or abs(dev) > MODULATION_WARNING_DB):
        level = "no error at all" if dev is None else f"{dev:+.1f} dB from the prediction"
        warnings.append(
            f"noise modulation: in the quietest passage (at {q['start_s']:.2f} s) the error "
            f"power is {level}, so the noise level follows the signal; TPDF dither keeps it "
            "constant."
        )
    return {"correlated_error_fraction": frac, "signal_correlated": flagged,
            "signal_correlated_reason": reason, "warnings": warnings}


def _quiet_undithered(res, frac):
    """The warning for undithered requantization of a passage near 1 LSB RMS, or None."""
    model = res.get("model") or {}
    if model.get("dither") != "none" or not model.get("bits"):
        return None
    scale = 2.0 ** (model["bits"] - 1)
    q = res.get("quietest_passage")
    candidates = []
    if q is not None and q.get("signal_rms_dbfs") is not None:
        # AES17 dBFS: a mean square p reads 10·log10(2p)
        rms = math.sqrt(10.0 ** (q["signal_rms_dbfs"] / 10.0) / 2.0) * scale
        candidates.append((rms, f"the quietest passage (at {q['start_s']:.2f} s, "
                                f"{q['signal_rms_dbfs']:.1f} dBFS RMS)"))
    whole = res["measured"].get("signal_rms_lsb")
    if whole:
        candidates.append((whole, "the whole file"))
    quiet = [(rms, where) for rms, where in candidates if 0.0 < rms <= QUIET_UNDITHERED_LSB_RMS]
    if not quiet:
        return None
    rms, where = min(quiet)
    return (f"signal-correlated error: without dither, {where} sits at {rms:.2f} LSB RMS of the "
            f"{model['bits']}-bit output, so its requantization error is a function of the "
            f"signal (the output follows it with a few codes only, and the error comes and "
            f"goes with it), however little of it the measures show ({100 * frac:.1f}% here, "
            f"under the {100 * CORRELATED_WARNING_FRACTION:.0f}% threshold); use TPDF dither.")


def _fmt_db(v):
    return "-inf" if v is None else f"{v:.1f}"
