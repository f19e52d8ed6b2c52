"""What ``requant inspect`` concludes from its figures: findings (short codes), one plain
sentence for each, and the "which method" advice.

Reads the report dict :func:`requant.inspection.measure.inspect_file` builds; measures
nothing.
"""

__all__ = ["findings_of", "method_advice", "grid_limit", "fmt_db", "GAP_MIN_S",
           "DITHER_PEAK_MAX_LSB"]

#: Largest grid word length recognised in non-integer files.
_GRID_LIMIT = {"FLOAT": 24, "DOUBLE": 32}
#: Interior runs of exact zeros at least this long (in every channel, or in one channel
#: while another plays) are named as possible dropouts. Our choice: shorter runs are more
#: often edits or pauses between sounds.
GAP_MIN_S = 0.5
#: A quiet file whose zeros are scattered is called dither-like when its peak stays within
#: this many LSB of its word length in use (codes toggling round 0). Our choice.
DITHER_PEAK_MAX_LSB = 8


def grid_limit(subtype, container_bits):
    """Largest grid word length recognised for a non-integer subtype."""
    return _GRID_LIMIT.get(subtype, min(container_bits or 24, 24))


def fmt_db(value, unit):
    return "n/a" if value is None else f"{value:+.2f} {unit}"


def _count(n, noun):
    return f"1 {noun}" if n == 1 else f"{n} {noun}s"


def findings_of(r):
    """Findings (short codes) and one plain sentence for each."""
    out = []
    s = r["settings"]
    per = r["per_channel"]
    if r["frames"] == 0:
        return ["empty"], ["The file holds no samples."]
    if r["nonfinite_samples"]:
        out.append(("nonfinite",
                    f"NaN or infinite samples: {r['nonfinite_samples']}. The file is damaged or "
                    "was written by a faulty process; these figures take them as 0."))
    if r["silent_fraction"] == 1.0:
        out.append(("all-silent", "The file holds only digital silence (every sample is 0)."))
        return [k for k, _ in out], [t for _, t in out]
    b, cb, kind = r["bits_used"], r["container_bits"], r["bits_kind"]
    out += _silence_findings(r)
    if not b:
        pass  # no nonzero finite sample: nothing to say about the word length
    elif kind == "pcm" and b < cb:
        out.append(("lossless-reduction",
                    f"{b} bits in use out of {cb}: converting to {b} bits is lossless."))
    elif kind == "pcm":
        out.append(("full-word-length",
                    f"All {cb} bits are in use: a shorter word length adds quantization "
                    "error, so dither when converting."))
    elif kind == "grid":
        in_range = all(p["_min"] >= -1.0 and p["_max"] <= 1.0 - 2.0 ** -(b - 1) for p in per)
        if in_range:
            out.append(("lossless-reduction",
                        f"{b} bits in use: every sample lies on the {b}-bit grid, so "
                        f"converting to {b}-bit PCM is lossless."))
        else:
            out.append(("grid-over",
                        f"Every sample lies on the {b}-bit grid, but some reach or exceed full "
                        f"scale: lower the gain by 1 LSB or more before converting to {b} bits."))
    else:
        out.append(("float-content",
                    "The samples use floating-point resolution (they lie on no grid of "
                    f"{grid_limit(r['subtype'], cb)} bits or fewer): converting to PCM adds "
                    "quantization error, so dither when converting."))
    if r["over_samples"]:
        out.append(("float-overs",
                    f"Samples above full scale: {r['over_samples']} (sample peak "
                    f"{fmt_db(r['peak_dbfs'], 'dBFS')}). Lower the gain before converting to "
                    "PCM, or they will clip."))
    if r["true_peak"] > 1.0:
        out.append(("true-peak-over",
                    f"True peak is {fmt_db(r['true_peak_dbtp'], 'dBTP')}, above 0 dBTP: lower "
                    "the gain before delivery, or the signal between samples will clip in "
                    "converters and decoders."))
    if r["clipped_samples"]:
        out.append(("clipping",
                    f"Clipping: {_count(r['clipped_samples'], 'sample')} in "
                    f"{_count(r['clip_runs'], 'run')} of {s['clip_run']} or more at full "
                    "scale. The audio has probably been clipped."))
    limit = 10.0 ** (s["dc_threshold_dbfs"] / 20.0)
    dc_ch = [p for p in per if p["dc_offset"] is not None and abs(p["dc_offset"]) >= limit]
    if dc_ch:
        where = ", ".join(
            f"channel {p['channel']} {fmt_db(p['dc_offset_dbfs'], 'dBFS')} "
            f"(mean {p['dc_offset']:+.6f})" for p in dc_ch)
        out.append(("dc-offset",
                    f"DC offset at or above {s['dc_threshold_dbfs']:.0f} dBFS on {where}: "
                    "remove it with a high-pass filter before requantizing."))
    return [k for k, _ in out], [t for _, t in out]


def _silence_findings(r):
    """Digital silence (runs of exact zeros) told from a quiet signal whose codes are
    mostly 0 (scattered zeros), and runs of zeros inside the audio (possible dropouts)."""
    s = r["settings"]
    ms = s["silence_min_ms"]
    run_share = r["silent_run_fraction"]
    out = []
    if run_share >= s["silent_threshold"]:
        out.append(("mostly-silent",
                    f"{100 * run_share:.0f} % of the samples lie in runs of exact zeros of "
                    f"{ms:g} ms or more (digital silence): check for missing audio or long "
                    "padding."))
    elif r["silent_fraction"] >= s["silent_threshold"]:
        b = r["bits_used"]
        codes = ""
        if b and r["bits_kind"] in ("pcm", "grid"):
            peak_lsb = r["peak"] * 2.0 ** (b - 1)
            codes = (f"; the codes stay within {peak_lsb:.0f} LSB of 0 at {b} bits, as dither "
                     "noise makes them" if peak_lsb <= DITHER_PEAK_MAX_LSB else
                     f"; the peak is {peak_lsb:.0f} LSB at {b} bits")
        out.append(("scattered-zeros",
                    f"{100 * r['silent_fraction']:.0f} % of the samples are exactly 0 but "
                    f"scattered ({100 * run_share:.1f} % in runs of {ms:g} ms or more){codes}: "
                    "a quiet signal at a short word length, not missing audio."))
    gaps = _gaps(r)
    if gaps:
        shown = "; ".join(f"{g['duration_s']:.3f} s at {g['start_s']:.3f} s ({g['where']})"
                          for g in gaps[:3])
        more = f"; and {len(gaps) - 3} more" if len(gaps) > 3 else ""
        out.append(("silent-gap",
                    f"Exact zeros inside the audio for {s['gap_min_s']:g} s or more: {shown}"
                    f"{more}. Check for missing audio (a dropout) unless it is a pause."))
    return out


def _gaps(r):
    """Runs of exact zeros of at least ``gap_min_s`` that neither start nor end the file:
    in every channel, or in one channel while another holds sound."""
    frames, rate = r["frames"], r["sample_rate"]
    least = r["settings"]["gap_min_s"] * rate

    def inside(run):
        return (run["start_frame"] > 0 and run["start_frame"] + run["frames"] < frames
                and run["frames"] >= least)

    gaps = [dict(run, where="every channel") for run in r["silent_runs"] if inside(run)]
    if r["channels"] > 1:
        every = [(g["start_frame"], g["start_frame"] + g["frames"]) for g in gaps]
        for p in r["per_channel"]:
            for run in p["silent_runs"]:
                a, e = run["start_frame"], run["start_frame"] + run["frames"]
                if inside(run) and not any(lo <= a and e <= hi for lo, hi in every):
                    gaps.append(dict(run, where=f"ch {p['channel']} only"))
    return sorted(gaps, key=lambda g: g["start_frame"])


def method_advice(r):
    """The "which method" figures and paragraph at ``settings.for_bits``; None for a file
    with no sound."""
    from requant.dsp.audibility import advice_paragraph, advise

    if r["frames"] == 0 or r["silent_fraction"] == 1.0 or not r["sample_rate"]:
        return None
    exact = {"lossless-reduction", "full-word-length"} & set(r["findings"])
    a = advise(r["settings"]["for_bits"], r["sample_rate"], quiet_dbfs=r["quiet_level_dbfs"],
               quiet_is_noise={"noise": True, "tonal": False}.get(r["quiet_kind"]),
               bits_in_use=r["bits_used"] if exact else None)
    return {**a.to_dict(), "text": advice_paragraph(a)}
