"""``requant inspect`` and ``requant shaper show``: what a file holds, what a filter does."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from requant.cli.common import DEFAULTS, Overwrite, ShaperLimit, ShaperOrder, SilenceMin

__all__ = ["inspect_command", "shaper_show", "format_shaper"]


def inspect_command(
    file: Annotated[Path, typer.Argument(help="Audio file to inspect.")],
    json_path: Annotated[Path | None, typer.Option(
        "--json", help="Also write the findings as JSON.")] = None,
    silence_min: SilenceMin = DEFAULTS.silence_min_ms,
    for_bits: Annotated[int, typer.Option(
        "--for-bits", min=1, max=32,
        help="Word length the 'which method' advice is for.")] = 16,
    overwrite: Overwrite = False,
):
    """Say what a file holds: bits in use, peaks, loudness, DC, clipping, silence, the
    quietest passage (and the noise floor when it is noise), and which method suits it."""
    from requant.audio_io.atomic import check_outputs
    from requant.audio_io.reader import open_input
    from requant.audio_io.writers import write_json_atomic
    from requant.inspection import format_inspection, inspect_file

    if json_path is not None:
        check_outputs([file], [json_path], overwrite=overwrite)
    open_input(file).close()  # one clear line for unreadable files
    rep = inspect_file(file, silence_min_ms=silence_min, for_bits=for_bits)
    print(format_inspection(rep))
    if json_path is not None:
        write_json_atomic(rep, json_path, warnings_key="recommendations")


def shaper_show(
    rate: Annotated[float, typer.Option("--rate", help="Sample rate the filter is for, Hz.")],
    shaping: Annotated[str, typer.Option(
        "--shaping", help="hearing, first-order, a JSON file or a comma list h1,h2,...")
    ] = "hearing",
    shaping_order: ShaperOrder = None,
    shaping_limit: ShaperLimit = None,
    json_out: Annotated[Path | None, typer.Option(
        "--json", help="Export the coefficients and figures as JSON.")] = None,
    png_out: Annotated[Path | None, typer.Option(
        "--png", help="Plot |NTF| beside the weighting curves (PNG).")] = None,
    overwrite: Overwrite = False,
):
    """Describe a shaping filter: coefficients, noise gains, Gerzon-Craven figures."""
    from requant.audio_io.atomic import check_outputs
    from requant.dsp import shaping as sh
    from requant.errors import UsageError
    from requant.report.filters import export_json, plot_ntf

    check_outputs([], [json_out, png_out], overwrite=overwrite)
    name, h = sh.resolve_shaping(shaping, rate, order=shaping_order, limit_db=shaping_limit)
    if name == "none" or len(h) == 0:
        raise UsageError("--shaping none has no filter to show; give hearing, first-order, "
                         "a JSON file or a comma list")
    print(format_shaper(name, sh.describe(h, rate)))
    if json_out is not None:
        export_json(h, rate, json_out, name=name)
        print(f"wrote {json_out}")
    if png_out is not None:
        plot_ntf(h, rate, png_out)
        print(f"wrote {png_out}")


def format_shaper(name, d):
    """A filter's description (:func:`requant.dsp.shaping.describe`) as text."""
    lines = [f"shaping filter '{name}' for {d['sample_rate']:g} Hz, order {len(d['coefficients'])}"
             f"{'' if d['minimum_phase'] else ' (NOT minimum phase)'}"]
    lines.append("  h_k: " + ", ".join(f"{v:.6f}" for v in d["coefficients"]))
    lines.append(f"  total noise gain (sum of n_k^2): {d['noise_gain_db']:+.2f} dB against "
                 "flat TPDF")
    lines.append(f"  Gerzon-Craven mean of 10*log10|NTF|^2 over 0..fs/2: "
                 f"{d['gerzon_craven_mean_log_db']:+.4f} dB (0 for a minimum-phase NTF)")
    lines.append(f"  {'weighting':22} {'gain vs flat TPDF':>18} {'best possible':>14}")
    labels = {"a": "A (IEC 61672-1)", "itu468": "ITU-R BS.468-4 (RMS)",
              "threshold": "hearing threshold"}
    for key, label in labels.items():
        g = d["weighted_gain_db"][key]
        b = -d["gerzon_craven_bound_db"][key]
        lines.append(f"  {label:22} {g:+17.2f} dB {b:+12.2f} dB")
    lines.append("  (negative is quieter; 'best possible' is the Gerzon-Craven bound)")
    return "\n".join(lines)
