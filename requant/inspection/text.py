"""``requant inspect``'s console text: the figures of
:func:`requant.inspection.measure.inspect_file` as a table, notes and the advice."""

import textwrap

from requant.inspection.findings import fmt_db

__all__ = ["format_inspection"]


def _fmt_loudness(loud):
    """The console's loudness line: integrated loudness and range, or why there is none."""
    i, lra = loud["integrated_lufs"], loud["range_lu"]
    if i is None:
        why = ("the sample rate is too low for K-weighting" if loud["channel_layout"] is None
               else "no 400 ms block above the gates")
        return f"n/a ({why})"
    rng = "n/a (shorter than 3 s)" if lra is None else f"{lra:.1f} LU"
    return (f"{i:.1f} LUFS integrated (ITU-R BS.1770-4), range {rng} (EBU Tech 3342), "
            f"{loud['channel_layout']}")


def _format_runs(r, shown=8):
    """Lines listing the digital-silence runs (every channel first, then one channel alone)."""
    s = r["settings"]
    head = f"Digital silence: runs of exact zeros of {s['silence_min_ms']:g} ms or more"
    lists = [("every channel", r)]
    if len(r["per_channel"]) > 1:
        lists += [(f"ch {p['channel']}", p) for p in r["per_channel"]
                  if p["silent_run_frames"] > r["silent_run_frames"]]
    if not any(d["silent_run_count"] for _, d in lists):
        return [f"{head}: none."]
    out = [f"{head} (start, length):"]
    for label, d in lists:
        if not d["silent_run_count"]:
            continue
        runs = [f"{x['start_s']:.3f} s ({x['duration_s']:.3f} s)" for x in d["silent_runs"][:shown]]
        more = d["silent_run_count"] - len(runs)
        out.append(f"  {label}: " + ", ".join(runs) + (f", and {more} more" if more else ""))
    return out


def format_inspection(report):
    """Render an :func:`inspect_file` report as plain text for the console.

    Parameters
    ----------
    report : dict
        As returned by :func:`inspect_file`.

    Returns
    -------
    text : str
        Several lines, no trailing newline.
    """
    r = report
    per = r["per_channel"]
    kind_words = {"pcm": "integer PCM", "grid": "float samples on an integer grid",
                  "float": "floating point"}
    cbits = r["container_bits"]
    lines = [
        f"File         {r['path']}",
        f"Format       {r['container']}, {r['subtype']}, {r['sample_rate']} Hz, "
        f"{r['channels']} channel{'s' if r['channels'] != 1 else ''}",
        f"Length       {r['frames']} frames ({r['duration_s']:.3f} s)",
        f"Bits in use  {'unknown' if r['bits_used'] is None else r['bits_used']}"
        + (f" of {cbits}" if cbits is not None else "")
        + f" ({kind_words.get(r['bits_kind'], r['bits_kind'])})",
        f"Loudness     {_fmt_loudness(r['loudness'])}",
        "",
    ]

    def num(v, fmt):
        return "n/a" if v is None else format(v, fmt)

    rows = [
        ("Bits in use", "bits_used", "d"),
        ("Sample peak (dBFS)", "peak_dbfs", "+.2f"),
        ("True peak (dBTP)", "true_peak_dbtp", "+.2f"),
        ("RMS (dBFS, AES17)", "rms_dbfs", "+.2f"),
        ("DC offset (% of FS)", "dc_offset", "signed-pct"),
        ("DC offset level (dBFS)", "dc_offset_dbfs", "+.1f"),
        ("Clipped samples", "clipped_samples", "d"),
        ("Samples over full scale", "over_samples", "d"),
        ("Exact zeros (%)", "silent_fraction", "pct"),
        ("  in silent runs (%)", "silent_run_fraction", "pct"),
        ("Quietest passage (dBFS)", "quiet_level_dbfs", "+.1f"),
        ("  which is", "quiet_kind", "s"),
    ]
    heads = [f"ch {p['channel']}" for p in per] + (["all"] if len(per) > 1 else [])
    label_w = max(len(label) for label, _, _ in rows) + 2
    table = [" " * label_w + "".join(f"{h:>10}" for h in heads)]
    for label, key, fmt in rows:
        values = [p[key] for p in per] + ([r[key]] if len(per) > 1 else [])
        if fmt == "pct":
            cells = [num(None if v is None else 100.0 * v, ".1f") for v in values]
        elif fmt == "signed-pct":  # the mean with its sign: the dB level below has none
            cells = [num(None if v is None else 100.0 * v, "+.4f") for v in values]
        else:
            cells = [num(v, fmt) for v in values]
        table.append(f"{label:<{label_w}}" + "".join(f"{c:>10}" for c in cells))
    lines += table
    s = r["settings"]
    lines += [
        "",
        *_true_peak_note(r),
        f"Clipping: runs of {s['clip_run']} or more samples at full scale.",
        f"Quietest passage: {s['floor_percentile']:g}th percentile of "
        f"{1000 * s['floor_block_s']:g} ms block RMS levels, digital silence excluded. It is "
        f"'noise' (the noise floor) when under {100 * s['noise_tonal_max']:g} % of its power "
        "stands in spectral lines, else 'tonal' (music, tones or hum).",
        _noise_floor_line(r),
        *_format_runs(r),
        "",
        "Recommendations" if r["recommendations"] else "Recommendations: none",
    ]
    lines += [f"  - {text}" for text in r["recommendations"]]
    advice = r.get("method_advice")
    if advice is not None:
        lines += ["", f"Which method at {advice['bits']} bits (--for-bits)"]
        lines += textwrap.wrap(advice["text"], width=96, initial_indent="  ",
                               subsequent_indent="  ")
    return "\n".join(lines)


def _true_peak_note(r):
    """What the true-peak row shows, and where the meter read below the sample peak."""
    low = [p for p in r["per_channel"]
           if p["true_peak_meter"] < p["peak"] and p["peak"] > 0.0]
    note = ("True peak: the larger of the sample peak and the ITU-R BS.1770-4 (4x oversampled) "
            "reading.")
    if not low:
        return [note]
    where = ", ".join(f"ch {p['channel']} {fmt_db(p['true_peak_meter_dbtp'], 'dBTP')} against "
                      f"{fmt_db(p['peak_dbfs'], 'dBFS')}" for p in low)
    return [note, f"  The reading is below the sample peak here ({where}): the standard's "
                  "interpolation filter does not pass samples through unchanged (its phase 0 "
                  "centre tap is 0.972, -0.25 dB for a lone sample), so it reads a little low "
                  "on sparse or few-bit material."]


def _noise_floor_line(r):
    kind, level = r["quiet_kind"], r["quiet_level_dbfs"]
    if level is None:
        return "Noise floor: n/a (no sound)."
    if kind == "noise":
        return (f"Noise floor: {level:+.1f} dBFS (the quietest passage is noise; "
                f"{100 * r['quiet_tonal_fraction']:.1f} % of its power in spectral lines).")
    if kind == "tonal":
        return (f"Noise floor: not shown. The quietest passage ({level:+.1f} dBFS) holds "
                f"music or tones ({100 * r['quiet_tonal_fraction']:.0f} % of its power in "
                "spectral lines), so the noise lies below it.")
    return "Noise floor: not judged (the file is shorter than one block)."
