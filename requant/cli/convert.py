"""``requant convert``: one file, its error signal and reports."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Annotated

import typer

from requant.audio_io.formats import DEFAULT_BLOCK_FRAMES
from requant.cli.common import (
    CAUTION,
    DEFAULTS,
    FEW_BITS_CAUTION,
    Bits,
    BlockFrames,
    ChannelsOpt,
    Dither,
    DitherOpt,
    Downmix,
    DownmixOpt,
    ErrorGainOpt,
    ErrorPath,
    ForceDither,
    GainOpt,
    Overwrite,
    PeakCeiling,
    Quantizer,
    QuantizerOpt,
    Quiet,
    RateOpt,
    ReportPaths,
    Seed,
    ShapingLimit,
    ShapingOpt,
    ShapingOrder,
    Silence,
    SilenceMin,
    SilenceOpt,
    recipe_options,
)

__all__ = ["convert", "summary_line", "error_line"]


def convert(
    input: Annotated[Path,
                     typer.Argument(help="Audio file to requantize (any PCM or float file).")],
    output: Annotated[Path, typer.Argument(help="Output file: .wav, .flac or .aiff.")],
    bits: Bits = DEFAULTS.bits,
    quantizer: QuantizerOpt = Quantizer(DEFAULTS.quantizer),
    dither: DitherOpt = Dither(DEFAULTS.dither),
    shaping: ShapingOpt = DEFAULTS.shaping.kind,
    shaping_order: ShapingOrder = None,
    shaping_limit: ShapingLimit = None,
    seed: Seed = DEFAULTS.seed,
    error: ErrorPath = None,
    error_gain: ErrorGainOpt = None,
    report: ReportPaths = None,
    overwrite: Overwrite = False,
    force_dither: ForceDither = DEFAULTS.force_dither,
    silence: SilenceOpt = Silence(DEFAULTS.silence),
    silence_min: SilenceMin = DEFAULTS.silence_min_ms,
    channels: ChannelsOpt = None,
    downmix: DownmixOpt = Downmix(DEFAULTS.downmix),
    rate: RateOpt = None,
    gain: GainOpt = DEFAULTS.gain_db,
    peak_ceiling: PeakCeiling = None,
    metadata: Annotated[bool, typer.Option(
        "--metadata/--no-metadata",
        help="Carry the source's metadata over, as batch does: a WAV's chunks into a WAV "
             "(bext with a coding-history row appended), text tags into FLAC and AIFF; what "
             "cannot be carried is listed.")] = True,
    block_frames: BlockFrames = DEFAULT_BLOCK_FRAMES,
    quiet: Quiet = False,
):
    """Requantize one file; optionally write its error signal and a report."""
    from requant.convert import Outputs, convert_file
    from requant.recipe import Recipe

    recipe = Recipe.from_dict(recipe_options(
        bits=bits, quantizer=quantizer, dither=dither, shaping=shaping,
        shaping_order=shaping_order, shaping_limit=shaping_limit, seed=seed,
        force_dither=force_dither, silence=silence, silence_min=silence_min,
        channels=channels, downmix=downmix, rate=rate, gain=gain, peak_ceiling=peak_ceiling))
    outputs = Outputs(error=error, report=tuple(report or ()), overwrite=overwrite,
                      error_gain=error_gain, metadata=metadata)
    progress = _ProgressPrinter(quiet)
    try:
        rep = convert_file(input, output, recipe, outputs=outputs, block_frames=block_frames,
                           progress=progress)
    finally:
        progress.close()
    if not quiet:
        print(summary_line(rep))
        if rep.error_signal is not None:
            print(error_line(rep.error_signal))
        for note in rep.notes:
            print(f"note: {note}")
    for w in rep.warnings:
        print(f"warning: {w}", file=sys.stderr)
    if rep.error_signal is not None:
        print(CAUTION, file=sys.stderr)
    elif bits <= 8 and not quiet:
        print(FEW_BITS_CAUTION, file=sys.stderr)


def error_line(err):
    """What was written as the error signal, and how loud: one line.

    Parameters
    ----------
    err : requant.report.model.ErrorSignalFacts
    """
    g = err.gain
    if g.rule == "exact":
        return f"error signal: {err.path} (the exact error, unity gain)"
    how = ("auto: flat TPDF noise at -40 dBFS RMS" if g.rule == "auto" else "as asked")
    return (f"error signal: {err.path} raised by {g.gain_db:+.1f} dB ({how}), hard-limited at "
            f"{g.cap_dbfs:.0f} dBFS peak; {g.limited_samples} sample(s) limited")


def _fmt(v, spec=".2f", none="n/a"):
    return none if v is None else format(v, spec)


def summary_line(rep):
    """What a conversion did: the output, measured against predicted, and what is heard.

    Three lines: the output and its method; SNR and error power, measured and
    predicted; the hearing-threshold-weighted noise beside flat TPDF's at the
    same word length (measured with ``--report``, else predicted), the figure
    that shows what noise shaping gains while SNR and A-weighting show it
    losing. A pass-through is one line.

    Parameters
    ----------
    rep : requant.report.model.Report

    Returns
    -------
    str
    """
    m, p, s, out = rep.measured, rep.predicted, rep.settings, rep.output
    method = f"{s.quantizer}, dither {s.dither_applied}, shaping {s.shaping}, seed {s.seed}"
    if out.passthrough:
        return (f"wrote {out.path} ({out.bits}-bit {out.subtype} {out.format}): the "
                f"input already lies on the {out.bits}-bit grid, copied unchanged")
    lines = (f"wrote {out.path} ({out.bits}-bit {out.subtype} {out.format}; {method})\n"
             f"  SNR {_fmt(m.snr_db)} dB measured, {_fmt(p.snr_db)} dB predicted; "
             f"error {_fmt(m.error_power_lsb2, '.4f')} LSB² measured, "
             f"{_fmt(p.error_power_lsb2, '.4f')} LSB² predicted")
    heard = _heard_line(rep)
    return lines if heard is None else f"{lines}\n  {heard}"


def _heard_line(rep):
    """The hearing-threshold-weighted noise against flat TPDF, or None (no rate, no samples)."""
    from requant.report.advice import threshold_comparison, threshold_figures

    th = threshold_figures(rep)
    if th is None:
        return None
    method, flat, measured = th
    return ("hearing-threshold-weighted noise "
            + threshold_comparison(method, flat, bits=rep.settings.bits, predicted=not measured))


class _ProgressPrinter:
    """A rich progress bar on a terminal, for files longer than 30 s; nothing otherwise.

    :meth:`stage` names what the conversion is doing (a first pass that
    measures the true peak, requantizing, the report), so the bar never sits
    at 100 % in silence while the report is written.
    """

    def __init__(self, quiet, stream=None, tty=None):
        self._bar = None
        self._task = None
        self._stream = stream or sys.stderr
        self._on = (not quiet) and (self._stream.isatty() if tty is None else tty)
        self._label = "requantizing"
        self.stages = []

    def stage(self, label):
        """Show ``label`` from now on (and start counting again)."""
        self._label = label
        self.stages.append(label)
        if self._bar is not None:
            self._bar.update(self._task, description=label)

    def __call__(self, done, total):
        if not self._on:
            return
        if self._bar is None:
            if total < 48000 * 30:
                self._on = False
                return
            from rich.console import Console
            from rich.progress import Progress

            self._bar = Progress(transient=True, console=Console(file=self._stream))
            self._bar.start()
            self._task = self._bar.add_task(self._label, total=total)
        self._bar.update(self._task, completed=done, total=total, description=self._label)

    def close(self):
        if self._bar is not None:
            self._bar.stop()
