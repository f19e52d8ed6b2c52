"""Command-line interface: parsing and printing only.

Heavy modules (numpy, soundfile, numba, scipy, matplotlib) are imported
inside the commands so that ``requant --help`` starts fast. Domain errors
(:class:`requant.errors.RequantError`) become one line on stderr and a
non-zero exit code; ``--debug`` shows the traceback instead.
"""

import functools
import os
import sys
from pathlib import Path
from typing import List, Optional

import typer

try:  # typer >= 0.20 vendors click
    from typer._click import exceptions as _cx
except ImportError:  # pragma: no cover - older typer with click installed
    import click.exceptions as _cx
from enum import Enum

__all__ = ["app", "main"]

_DEBUG = {"on": False}

CAUTION = ("Caution: few-bit outputs and error signals can be loud. Start playback at a low "
           "level; your own judgement and local workplace rules on hearing come first.")

app = typer.Typer(
    name="requant",
    help="Requantize audio to a shorter word length, with dither and noise shaping, "
         "and prove the result: measured noise beside predicted noise.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)


def _err(text):
    print(f"requant: error: {text}", file=sys.stderr)


def friendly(fn):
    """Turn domain errors into one line and an exit code (tracebacks with --debug)."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        from requant.errors import RequantError

        try:
            return fn(*args, **kwargs)
        except RequantError as exc:
            if _DEBUG["on"]:
                raise
            _err(str(exc))
            raise typer.Exit(code=exc.exit_code) from None
        except KeyboardInterrupt:
            if _DEBUG["on"]:
                raise
            _err("interrupted; no partial output was left behind")
            raise typer.Exit(code=130) from None

    return wrapper


@app.callback(invoke_without_command=True)
def _root(
    ctx: typer.Context,
    debug: bool = typer.Option(False, "--debug", help="Show full tracebacks on errors."),
    version: bool = typer.Option(False, "--version", help="Print the version and exit.",
                                 is_eager=True),
):
    _DEBUG["on"] = debug
    if version:
        from requant import __version__

        print(f"requant {__version__}")
        raise typer.Exit()
    if ctx.invoked_subcommand is None:
        print(ctx.get_help())
        raise typer.Exit(code=2)


class Quantizer(str, Enum):
    round = "round"
    truncate = "truncate"


class Dither(str, Enum):
    none = "none"
    rpdf = "rpdf"
    tpdf = "tpdf"
    tpdf_hp = "tpdf-hp"


@app.command()
@friendly
def convert(
    input: Path = typer.Argument(..., help="Audio file to requantize (any PCM or float file)."),
    output: Path = typer.Argument(..., help="Output file: .wav, .flac or .aiff."),
    bits: int = typer.Option(16, "--bits", "-b", min=1, max=32, help="Target word length."),
    quantizer: Quantizer = typer.Option("round",
                                  help="round: nearest, ties up; truncate: toward minus infinity."),
    dither: Dither = typer.Option("tpdf", help="Dither added before quantizing."),
    shaping: str = typer.Option("none", help="Noise shaping: none, first-order, hearing, a JSON "
                                             "file of coefficients, or a comma list h1,h2,..."),
    shaping_order: Optional[int] = typer.Option(None, min=1, max=64,
                                                help="Order of the 'hearing' design."),
    shaping_limit: Optional[float] = typer.Option(None, help="Limit on the total noise gain of "
                                                             "the 'hearing' design, dB."),
    seed: Optional[int] = typer.Option(None, min=0, help="Dither seed; the same seed gives the "
                                                         "same bits. Default: fresh, reported."),
    error: Optional[Path] = typer.Option(None, "--error", help="Write the error signal (output "
                                                               "minus input), 32-bit float."),
    report: Optional[Path] = typer.Option(None, "--report", help="Write the report: .json, .html "
                                                                 "(one self-contained page) or .md "
                                                                 "(pictures beside it)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace existing outputs."),
    force_dither: bool = typer.Option(False, "--force-dither",
                                      help="Dither even if the input is already on the grid."),
    block_frames: int = typer.Option(65536, min=1, help="Frames per block (output is the same "
                                                        "for any value)."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="Print only warnings and errors."),
):
    """Requantize one file; optionally write its error signal and a report."""
    from requant.convert import convert_file

    progress = _progress_printer(quiet)
    try:
        rep = convert_file(input, output, bits=bits, quantizer=quantizer.value, dither=dither.value,
                           shaping=shaping, shaping_order=shaping_order,
                           shaping_limit_db=shaping_limit, seed=seed, error_path=error,
                           report_path=report, overwrite=overwrite, force_dither=force_dither,
                           block_frames=block_frames, progress=progress)
    finally:
        progress.close()
    if not quiet:
        print(_summary_line(rep))
        for note in rep["notes"]:
            print(f"note: {note}")
    for w in rep["warnings"]:
        print(f"warning: {w}", file=sys.stderr)
    if bits <= 8 and not quiet:
        print(CAUTION, file=sys.stderr)


def _fmt(v, spec=".2f", none="n/a"):
    return none if v is None else format(v, spec)


def _summary_line(rep):
    m, p, s = rep["measured"], rep["predicted"], rep["settings"]
    out = rep["output"]
    method = (f"{s['quantizer']}, dither {s['dither_applied']}, shaping {s['shaping']}, "
              f"seed {s['seed']}")
    if out["passthrough"]:
        return (f"wrote {out['path']} ({out['bits']}-bit {out['subtype']} {out['format']}): the "
                f"input already lies on the {out['bits']}-bit grid, copied unchanged")
    return (f"wrote {out['path']} ({out['bits']}-bit {out['subtype']} {out['format']}; {method})\n"
            f"  SNR {_fmt(m['snr_db'])} dB measured, {_fmt(p['snr_db'])} dB predicted; "
            f"error {_fmt(m['error_power_lsb2'], '.4f')} LSB² measured, "
            f"{_fmt(p['error_power_lsb2'], '.4f')} LSB² predicted")


class _progress_printer:
    """A rich progress bar on a terminal; nothing otherwise."""

    def __init__(self, quiet):
        self._bar = None
        self._task = None
        self._on = (not quiet) and sys.stderr.isatty()

    def __call__(self, done, total):
        if not self._on:
            return
        if self._bar is None:
            if total < 48000 * 30:
                self._on = False
                return
            from rich.progress import Progress

            self._bar = Progress(transient=True)
            self._bar.start()
            self._task = self._bar.add_task("requantizing", total=total)
        self._bar.update(self._task, completed=done)

    def close(self):
        if self._bar is not None:
            self._bar.stop()


@app.command()
@friendly
def inspect(
    file: Path = typer.Argument(..., help="Audio file to inspect."),
    json_path: Optional[Path] = typer.Option(None, "--json", help="Also write the findings as JSON."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an existing JSON file."),
):
    """Say what a file really holds: bits in use, peaks, DC, clipping, silence, noise floor."""
    from requant.audio_io.reader import open_input
    from requant.audio_io.writers import write_json_atomic
    from requant.inspection import format_inspection, inspect_file
    from requant.audio_io.atomic import check_outputs

    if json_path is not None:
        check_outputs([file], [json_path], overwrite=overwrite)
    open_input(file).close()  # one clear line for unreadable files
    rep = inspect_file(file)
    print(format_inspection(rep))
    if json_path is not None:
        write_json_atomic(rep, json_path)


shaper_app = typer.Typer(help="Show, design and export noise-shaping filters.",
                         no_args_is_help=True, rich_markup_mode=None)
app.add_typer(shaper_app, name="shaper")


@shaper_app.command("show")
@friendly
def shaper_show(
    rate: float = typer.Option(..., "--rate", help="Sample rate the filter is for, Hz."),
    shaping: str = typer.Option("hearing", "--shaping", help="hearing, first-order, a JSON file "
                                                            "or a comma list h1,h2,..."),
    order: Optional[int] = typer.Option(None, "--order", min=1, max=64,
                                        help="Order of the 'hearing' design (default 9)."),
    limit: Optional[float] = typer.Option(None, "--limit", help="Total noise gain limit of the "
                                                                "'hearing' design, dB (default 13)."),
    json_out: Optional[Path] = typer.Option(None, "--json", help="Export the coefficients and "
                                                                 "figures as JSON."),
    png_out: Optional[Path] = typer.Option(None, "--png", help="Plot |NTF| beside the weighting "
                                                               "curves (PNG)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace existing exports."),
):
    """Describe a shaping filter: coefficients, noise gains, Gerzon-Craven figures."""
    from requant.dsp import shaping as sh
    from requant.audio_io.atomic import check_outputs
    from requant.convert import resolve_shaping_spec

    check_outputs([], [json_out, png_out], overwrite=overwrite)
    name, h = resolve_shaping_spec(shaping, rate, order=order, limit_db=limit)
    if name == "none" or len(h) == 0:
        from requant.errors import UsageError

        raise UsageError("--shaping none has no filter to show; give hearing, first-order, "
                         "a JSON file or a comma list")
    d = sh.describe(h, rate)
    print(_format_shaper(name, d))
    if json_out is not None:
        sh.export_json(h, rate, json_out, name=name)
        print(f"wrote {json_out}")
    if png_out is not None:
        sh.plot_ntf(h, rate, png_out)
        print(f"wrote {png_out}")


def _format_shaper(name, d):
    lines = [f"shaping filter '{name}' for {d['sample_rate']:g} Hz, order {len(d['coefficients'])}"
             f"{'' if d['minimum_phase'] else ' (NOT minimum phase)'}"]
    lines.append("  h_k: " + ", ".join(f"{v:.6f}" for v in d["coefficients"]))
    lines.append(f"  total noise gain (sum of n_k^2): {d['noise_gain_db']:+.2f} dB against flat TPDF")
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


@app.command()
@friendly
def demo(
    out: Path = typer.Option(Path("demo_output"), "--out", help="Folder for the demo results."),
    source: Optional[Path] = typer.Option(None, "--source",
                                          help="Folder of demo audio (default: the bundled one)."),
    seed: int = typer.Option(2026, help="Dither seed for the demo."),
):
    """Run the main job on the bundled demo audio and print measured against predicted."""
    from requant.demo import run_demo

    print(run_demo(out, source=source, seed=seed))
    print(CAUTION, file=sys.stderr)


from requant.cli_batch import register as _register_batch  # noqa: E402  (imports typer only)
from requant.cli_listen import register as _register_listen  # noqa: E402

_register_batch(app)
_register_listen(app)


def main(argv=None):
    """Console entry point: one line per error, documented exit codes."""
    args = sys.argv[1:] if argv is None else list(argv)
    import signal

    if hasattr(signal, "SIGXFSZ"):
        # a file-size limit then fails the write (EFBIG) instead of killing the process,
        # so the temporary files are removed and the user gets one clear line
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    try:
        rc = app(args=args, prog_name="requant", standalone_mode=False)
    except typer.Exit as exc:
        return exc.exit_code
    except _cx.NoArgsIsHelpError as exc:
        print(exc.ctx.get_help() if exc.ctx is not None else "", file=sys.stderr)
        return 2
    except _cx.UsageError as exc:
        hint = ""
        if exc.ctx is not None:
            hint = f" (see '{exc.ctx.command_path} --help')"
        _err(f"{exc.format_message()}{hint}")
        return 2
    except typer.Abort:
        _err("interrupted; no partial output was left behind")
        return 130
    except _cx.ClickException as exc:
        _err(exc.format_message())
        return exc.exit_code
    return rc if isinstance(rc, int) else 0


if __name__ == "__main__":
    sys.exit(main())


def console():
    """Entry point of the ``requant`` script."""
    rc = main()
    # Everything is written and closed by now. Freezing the heap spares the interpreter's
    # last garbage collections, which would visit every object of every loaded module
    # (about 40 ms of each run's exit with numpy, soundfile and typer loaded).
    import gc

    gc.freeze()
    sys.exit(rc)
