"""The audit's words: one sentence, the findings (problems) and the notes (facts).

A pair *passes* when it has no finding. Findings are what a delivery check
would reject or query: no dither or RPDF dither, an error that follows the
signal, noise modulation, a truncation bias, clipped samples, noise away from what the
identified method predicts, a method that matches no model, an inverted
polarity. Notes
are facts worth knowing that are no fault: the offset, a gain, padding or
trimming, a short word in a longer container.

Where the error follows the signal comes from :mod:`requant.audit.passages`.
"""

import math

__all__ = ["verdict", "findings_and_notes", "clock", "AS_PREDICTED_DB", "OFF_PREDICTION_DB"]

#: Measured within this of the prediction reads "as predicted", dB.
AS_PREDICTED_DB = 0.5
#: Farther than this from the prediction is a finding, dB.
OFF_PREDICTION_DB = 1.0
_MINUS = "\u2212"


def _num(v, spec=".1f"):
    """A number with a true minus sign (U+2212), as in the examples of the docs."""
    return format(v, spec).replace("-", _MINUS)


def clock(seconds):
    """``12.3 s`` below a minute, ``3:12`` or ``1:02:03`` above."""
    if seconds < 60.0:
        return f"{seconds:.1f} s"
    s = int(seconds)
    h, rem = divmod(s, 3600)
    m, s = divmod(rem, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def _where(passages, duration_s):
    if not passages:
        return "throughout"
    first = passages[0]
    if len(passages) == 1 and first["start_s"] <= 1.0 and first["end_s"] >= duration_s - 1.0:
        return "throughout"
    if len(passages) == 1 and first["end_s"] >= duration_s - 1.0:
        return f"from {clock(first['start_s'])} to the end"
    more = f" (and {len(passages) - 1} more passages)" if len(passages) > 1 else ""
    return f"from {clock(first['start_s'])} to {clock(first['end_s'])}{more}"


def _method(r):
    q, d = r["quantizer"], r["dither"]
    if d == "none":
        verb = {"round": "rounded", "truncate": "truncated"}.get(q, "requantized")
        return f"{verb} without dither"
    name = {"rpdf": "RPDF dither", "tpdf": "TPDF dither", "tpdf-hp": "high-passed TPDF dither",
            "unknown": "dither not identified"}[d]
    if q == "truncate":
        name += ", truncated"
    return name


def _shaping(r):
    if not r["shaped"]:
        return "flat"
    g = r["ntf"]["noise_gain_db"] if r.get("ntf") else r["noise_gain_db"]
    return f"noise-shaped ({_num(g, '+.1f')} dB total)"


def verdict(r, *, duration_s):
    """One sentence: word length, method, shaping, then what matters most."""
    head = f"{r['word_length']}-bit"
    if r["identification"].get("exact"):
        return f"{head}: bit-exact, every sample equals the master's"
    parts = [head, _method(r)]
    if r["dither"] != "none" or r["shaped"]:
        parts.append(_shaping(r))
    tail = []
    if r["quantizer"] == "truncate":
        tail.append(f"{_MINUS}\u00bd LSB bias" if not r["shaped"]
                    else f"{_num(r['bias_lsb'], '+.2f')} LSB bias")
    if r["signal_correlated"]:
        tail.append(f"error follows the signal {_where(r['signal_correlated_at'], duration_s)}")
    if r["clipped_samples"]:
        tail.append(f"{r['clipped_samples']} samples clipped")
    meas, pred = r["error_rms_dbfs"], r["predicted"]["error_rms_dbfs"]
    if not r["signal_correlated"] and meas is not None:
        if pred is None:
            tail.append(f"noise {_num(meas)} dBFS")
        elif abs(meas - pred) <= AS_PREDICTED_DB:
            tail.append(f"noise {_num(meas)} dBFS as predicted")
        else:
            tail.append(f"noise {_num(meas)} dBFS, {_num(meas - pred, '+.1f')} dB from the "
                        f"{_num(pred)} dBFS predicted")
    return ", ".join(parts) + (": " + ", ".join(tail) if tail else "")


def findings_and_notes(r, *, warnings, sample_rate):
    """(findings, notes): lists of sentences (see the module notes)."""
    findings, notes = [], []
    ident = r["identification"]
    a = r["alignment"]
    if ident.get("exact"):
        return findings, _alignment_notes(r, sample_rate)
    if r["signal_correlated"]:
        where = _where(r["signal_correlated_at"], r["alignment"]["overlap_s"])
        pct = 100 * r["correlated_error_fraction"]
        findings.append(f"the error follows the signal {where} ({pct:.0f}% of its power in the "
                        "worst measure): it is heard as distortion, not as steady noise; TPDF "
                        "dither before requantizing prevents it")
    findings.extend(w for w in warnings if w.startswith("noise modulation"))
    if r["dither"] == "none" and not r["signal_correlated"]:
        findings.append("the requantization was not dithered: its error is a function of the "
                        "signal, which quiet passages and fades turn into audible distortion "
                        "(Lipshitz, Wannamaker & Vanderkooy 1992); TPDF dither prevents it")
    if r["dither"] == "rpdf":
        findings.append("RPDF dither keeps the mean error independent of the signal but not its "
                        "power, so the noise level follows the programme (Lipshitz, Wannamaker "
                        "& Vanderkooy 1992); TPDF makes both constant")
    if r["quantizer"] == "truncate":
        findings.append(f"truncation leaves a DC offset of {_num(r['bias_lsb'], '+.2f')} LSB; "
                        "rounding (with dither) has none")
    if r["clipped_samples"]:
        findings.append(f"{r['clipped_samples']} samples are clipped: the master, at the "
                        "delivery's gain, went beyond full scale there")
    if r["dither"] == "unknown":
        v = ident["innovation_variance_lsb2"]
        findings.append(f"the error matches no requantization model: {v:.3f} LSB² before "
                        "shaping (no dither 0.083, RPDF 0.167, TPDF 0.250), so the delivery was "
                        "made with another dither or further processing")
    meas, pred = r["error_rms_dbfs"], r["predicted"]["error_rms_dbfs"]
    if (meas is not None and pred is not None and not r["signal_correlated"]
            and abs(meas - pred) > OFF_PREDICTION_DB):
        findings.append(f"the error is {_num(meas - pred, '+.1f')} dB from what the identified "
                        f"method predicts ({_num(meas)} against {_num(pred)} dBFS)")
    if a["polarity"] < 0:
        findings.append("the delivery is inverted (polarity -1)")
    notes.extend(_alignment_notes(r, sample_rate))
    if r["container_bits"] and r["container_bits"] > r["word_length"]:
        notes.append(f"a {r['word_length']}-bit word in a {r['container_bits']}-bit container "
                     "(the low bits are zero)")
    if r["quantizer"] is None and r["dither"] != "none":
        notes.append("the noise transfer function removes DC, so rounding and truncation "
                     "cannot be told apart from the error")
    return findings, notes


def _alignment_notes(r, sample_rate):
    a, out = r["alignment"], []
    off = a["offset_frames"]
    if off:
        when = "after" if off > 0 else "before"
        out.append(f"the delivery starts {abs(off)} frames ({abs(off) / sample_rate * 1000:.1f} ms)"
                   f" {when} the master")
    if abs(a["gain_db"]) >= 0.005:
        louder = "louder" if a["gain_db"] > 0 else "quieter"
        out.append(f"the delivery is {abs(a['gain_db']):.2f} dB {louder} than the master")
    miss = a["master_frames"] - a["overlap_frames"]
    extra = a["delivered_frames"] - a["overlap_frames"]
    if miss > 0:
        out.append(f"{miss} frames of the master are not in the delivery (trimmed)")
    if extra > 0:
        out.append(f"{extra} frames of the delivery have no master frame (padding); only the "
                   f"{a['overlap_frames']} frames of the overlap are measured")
    if not math.isclose(abs(a["correlation"]), 1.0, abs_tol=0.5):
        out.append(f"the delivery follows the master only loosely (correlation "
                   f"{abs(a['correlation']):.2f}): the figures describe a noisy delivery")
    return out
