"""What every command shares: options declared once, the caution, one-line errors.

Each option is declared here once (:data:`OPTIONS`: its flags, help and limits)
and given to every command as an ``Annotated`` type, with its default taken
from the library (:class:`~requant.recipe.Recipe`), so commands cannot drift
apart. Commands that layer a profile under the options (``batch``) use the
``Maybe...`` forms, whose default is None ("not given").

This module imports only typer and requant's light modules, so ``requant
--help`` stays fast.
"""

from __future__ import annotations

import functools
import sys
from enum import Enum
from pathlib import Path
from typing import Annotated

import typer

from requant.audio_io.formats import DEFAULT_BLOCK_FRAMES, MAX_BLOCK_FRAMES
from requant.recipe import (
    DEFAULT_LIMIT_DB,
    DEFAULT_ORDER,
    DITHERS,
    DOWNMIX_LAWS,
    MAX_CEILING_DBTP,
    MAX_GAIN_DB,
    MAX_RATE,
    MAX_SILENCE_MIN_MS,
    MAX_TAPS,
    MIN_CEILING_DBTP,
    MIN_RATE,
    QUANTIZERS,
    RECIPE_KEYS,
    SEED_MAX,
    SILENCE_MODES,
    Recipe,
)

__all__ = ["CAUTION", "FEW_BITS_CAUTION", "DEFAULTS", "err", "friendly", "set_debug",
           "handle_sigterm", "stop_reason",
           "stop_exit_code", "Quantizer", "Dither", "Silence", "SilenceOpt", "SilenceMin",
           "MaybeSilence", "MaybeSilenceMin", "Downmix", "ChannelsOpt", "DownmixOpt", "RateOpt",
           "GainOpt", "PeakCeiling", "MaybeChannels", "MaybeDownmix", "MaybeRate", "MaybeGain",
           "MaybePeakCeiling",
           "recipe_options", "OPTIONS", "Bits", "QuantizerOpt", "DitherOpt", "ShapingOpt",
           "ShapingOrder", "ShapingLimit", "ShaperOrder", "ShaperLimit", "Seed", "ForceDither",
           "Overwrite", "Quiet",
           "BlockFrames", "MaybeBits", "MaybeQuantizer", "MaybeDither", "MaybeShaping",
           "MaybeForceDither", "MaybeBlockFrames", "ErrorPath", "ErrorGainOpt", "ReportPaths",
           "Jobs", "Cluster", "ClusterTimeout", "cluster_executor"]

#: The short caution printed after work that may be loud.
CAUTION = ("Caution: few-bit outputs and error signals can be loud. Start playback at a low "
           "level; your own judgement and local workplace rules on hearing come first.")
#: The caution after few-bit outputs when no error signal was written.
FEW_BITS_CAUTION = ("Caution: few-bit outputs can be loud and harsh. Start playback at a low "
                    "level; your own judgement and local workplace rules on hearing come first.")

#: The library's defaults, which every command's defaults come from.
DEFAULTS = Recipe()

_DEBUG = {"on": False}


def set_debug(on):
    """Show tracebacks instead of one-line errors (``requant --debug``)."""
    _DEBUG["on"] = bool(on)


_STOP = {"signal": None}


def _on_sigterm(signum, frame):
    """SIGTERM (a service stopping, a scheduler's kill) stops the work as Ctrl-C does:
    temporary files are removed on the way out."""
    _STOP["signal"] = signum
    raise KeyboardInterrupt


def handle_sigterm():
    """Treat SIGTERM like Ctrl-C in this process (main thread only)."""
    import signal

    signal.signal(signal.SIGTERM, _on_sigterm)


def stop_reason():
    """How the work was stopped, for the one line the user sees."""
    return "stopped by SIGTERM" if _STOP["signal"] is not None else "interrupted"


def stop_exit_code():
    """130 after Ctrl-C, 143 after SIGTERM (128 + the signal number, as shells report)."""
    return 128 + (_STOP["signal"] or 2)


def err(text):
    """One error line on stderr."""
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
            err(str(exc))
            raise typer.Exit(code=exc.exit_code) from None
        except KeyboardInterrupt:
            if _DEBUG["on"]:
                raise
            err(f"{stop_reason()}; no partial output was left behind")
            raise typer.Exit(code=stop_exit_code()) from None

    return wrapper


Quantizer = Enum("Quantizer", {q: q for q in QUANTIZERS}, type=str)
Quantizer.__doc__ = "The quantizers of requant.recipe.QUANTIZERS."
Dither = Enum("Dither", {d.replace("-", "_"): d for d in DITHERS}, type=str)
Dither.__doc__ = "The dithers of requant.recipe.DITHERS."
Silence = Enum("Silence", {m: m for m in SILENCE_MODES}, type=str)
Silence.__doc__ = "What to do with digital silence: requant.recipe.SILENCE_MODES."
Downmix = Enum("Downmix", {("minus_3db" if m == "-3db" else m): m for m in DOWNMIX_LAWS},
               type=str)
Downmix.__doc__ = "How channels fold to one: requant.recipe.DOWNMIX_LAWS."

#: Every shared option: flags, help, limits, and the default shown for layered forms.
OPTIONS = {
    "bits": (("--bits", "-b"), "Target word length.", {"min": 1, "max": 32}, DEFAULTS.bits),
    "quantizer": (("--quantizer",), "round: nearest, ties up; truncate: toward minus infinity.",
                  {}, DEFAULTS.quantizer),
    "dither": (("--dither",), "Dither added before quantizing.", {}, DEFAULTS.dither),
    "shaping": (("--shaping",), "Noise shaping: none, first-order, hearing, a JSON file of "
                "coefficients, or a comma list h1,h2,...", {}, DEFAULTS.shaping.kind),
    "shaping_order": (("--shaping-order",), "Order of the 'hearing' design "
                      f"[default: {DEFAULT_ORDER}].", {"min": 1, "max": MAX_TAPS}, None),
    "shaping_limit": (("--shaping-limit",), "Limit on the total noise gain of the "
                      f"'hearing' design, dB [default: {DEFAULT_LIMIT_DB:g}].", {}, None),
    "seed": (("--seed",), "Dither seed; the same seed gives the same bits. Default: fresh, "
             "reported.", {"min": 0, "max": SEED_MAX}, None),
    "force_dither": (("--force-dither/--no-force-dither",), "Dither even if the input already "
                     "lies on the target grid.", {}, "no"),
    "silence": (("--silence",), "keep: runs of exact zeros stay exact zeros (no dither hiss "
                "out of nothing); dither: dither them like any quiet passage.", {},
                DEFAULTS.silence),
    "silence_min": (("--silence-min",), "Shortest run of exact zeros, in ms, that counts as "
                    "digital silence.",
                    {"min": 0.001, "max": MAX_SILENCE_MIN_MS}, f"{DEFAULTS.silence_min_ms:g}"),
    "channels": (("--channels",), "Deliver 1 or 2 channels (default: as the source): several "
                 "fold to one by --downmix, one is copied to two.", {"min": 1, "max": 2}, None),
    "downmix": (("--downmix",), "How channels fold to one: mean (their average; cannot clip) "
                "or -3db (their sum times 1/sqrt(N)).", {}, DEFAULTS.downmix),
    "rate": (("--rate",), f"Deliver at this sample rate, Hz ({MIN_RATE} to {MAX_RATE}; "
             "default: as the source); converted in float64 before dither.",
             {"min": MIN_RATE, "max": MAX_RATE}, None),
    "gain": (("--gain",), f"Gain in dB ({-MAX_GAIN_DB:g} to {MAX_GAIN_DB:g}) applied in "
             "float64 before dither; the error signal is output minus the gained input.",
             {"min": -MAX_GAIN_DB, "max": MAX_GAIN_DB}, "0"),
    "peak_ceiling": (("--peak-ceiling",), "True-peak ceiling, dBTP "
                     f"({MIN_CEILING_DBTP:g} to {MAX_CEILING_DBTP:g}): the file is measured "
                     "first and the gain lowered so its true peak lands on the ceiling (one "
                     "gain for the file, never a limiter).",
                     {"min": MIN_CEILING_DBTP, "max": MAX_CEILING_DBTP}, None),
    "overwrite": (("--overwrite",), "Replace existing outputs (never the input).", {}, None),
    "quiet": (("--quiet", "-q"), "Print only warnings and errors.", {}, None),
    "block_frames": (("--block-frames",), "Frames per block (the output is the same for any "
                     "value).", {"min": 1, "max": MAX_BLOCK_FRAMES}, DEFAULT_BLOCK_FRAMES),
}


def _option(key, *, layered=False, aliases=()):
    decls, text, limits, shown = OPTIONS[key]
    decls = (*decls, *aliases)
    if layered and shown is not None:
        text = f"{text} [default: {shown}]"
    return typer.Option(*decls, help=text, show_default=not layered, **limits)


Bits = Annotated[int, _option("bits")]
QuantizerOpt = Annotated[Quantizer, _option("quantizer")]
DitherOpt = Annotated[Dither, _option("dither")]
ShapingOpt = Annotated[str, _option("shaping")]
ShapingOrder = Annotated[int | None, _option("shaping_order")]
ShapingLimit = Annotated[float | None, _option("shaping_limit")]
#: ``shaper show`` also takes the short names it has always had.
ShaperOrder = Annotated[int | None, _option("shaping_order", aliases=("--order",))]
ShaperLimit = Annotated[float | None, _option("shaping_limit", aliases=("--limit",))]
Seed = Annotated[int | None, _option("seed")]
ForceDither = Annotated[bool, _option("force_dither")]
SilenceOpt = Annotated[Silence, _option("silence")]
SilenceMin = Annotated[float, _option("silence_min")]
ChannelsOpt = Annotated[int | None, _option("channels")]
DownmixOpt = Annotated[Downmix, _option("downmix")]
RateOpt = Annotated[int | None, _option("rate")]
GainOpt = Annotated[float, _option("gain")]
PeakCeiling = Annotated[float | None, _option("peak_ceiling")]
Overwrite = Annotated[bool, _option("overwrite")]
Quiet = Annotated[bool, _option("quiet")]
BlockFrames = Annotated[int, _option("block_frames")]

MaybeBits = Annotated[int | None, _option("bits", layered=True)]
MaybeQuantizer = Annotated[Quantizer | None, _option("quantizer", layered=True)]
MaybeDither = Annotated[Dither | None, _option("dither", layered=True)]
MaybeShaping = Annotated[str | None, _option("shaping", layered=True)]
MaybeForceDither = Annotated[bool | None, _option("force_dither", layered=True)]
MaybeSilence = Annotated[Silence | None, _option("silence", layered=True)]
MaybeSilenceMin = Annotated[float | None, _option("silence_min", layered=True)]
MaybeBlockFrames = Annotated[int | None, _option("block_frames", layered=True)]
MaybeChannels = Annotated[int | None, _option("channels", layered=True)]
MaybeDownmix = Annotated[Downmix | None, _option("downmix", layered=True)]
MaybeRate = Annotated[int | None, _option("rate", layered=True)]
MaybeGain = Annotated[float | None, _option("gain", layered=True)]
MaybePeakCeiling = Annotated[float | None, _option("peak_ceiling", layered=True)]

ErrorPath = Annotated[Path | None, typer.Option(
    "--error", help="Write the error signal (output minus input), 32-bit float .wav or .aiff.")]
ErrorGainOpt = Annotated[str | None, typer.Option(
    "--error-gain", metavar="DB|auto",
    help="Write the error signal raised for listening: by DB decibels (-120 to 120), or 'auto' "
         "(flat TPDF noise of the word length at about -40 dBFS RMS); then hard-limited at -6 "
         "dBFS peak. The gain is stated in the report and the file. Default: the exact error, "
         "unity gain.")]
ReportPaths = Annotated[list[Path] | None, typer.Option(
    "--report", help="Write the report: .json, .html (one self-contained page) or .md "
                     "(pictures beside it); repeat for several forms.")]


#: Worker processes and the cluster, for the commands that run many files (batch, audit).
Jobs = Annotated[int | None, typer.Option(
    "--jobs", "-j", min=1, help="Worker processes [default: all cores].")]
Cluster = Annotated[str | None, typer.Option(
    "--cluster", metavar="tcp://HOST:PORT",
    help="Run on the workers of an existing dask.distributed scheduler (needs "
         "requant[cluster]); the folders must be shared storage at the same paths on "
         "every worker.")]
ClusterTimeout = Annotated[float, typer.Option(
    "--cluster-timeout", min=0.1, max=600.0,
    help="Seconds to wait for the dask scheduler to answer.")]


def cluster_executor(cluster, jobs, timeout_s):
    """The batch's cluster executor when ``--cluster`` is given, else None (local workers).

    Raises
    ------
    UsageError
        ``--jobs`` given with ``--cluster``.
    """
    if cluster is None:
        return None
    from requant.errors import UsageError
    from requant.library.executors.cluster import DaskExecutor

    if jobs is not None:
        raise UsageError("--jobs sets local worker processes and does not combine with "
                         "--cluster (the dask workers' --nworkers and --nthreads decide); "
                         "leave out --jobs")
    return DaskExecutor(cluster, connect_timeout=timeout_s)


#: Command-line option names that differ from the recipe's keys.
_RECIPE_KEY_OF = {"shaping_limit": "shaping_limit_db", "silence_min": "silence_min_ms",
                  "gain": "gain_db", "peak_ceiling": "peak_ceiling_dbtp"}


def recipe_options(**given):
    """The recipe keys given on a command line (None: not given), as a flat dict.

    Keyword names are the commands' parameter names (``shaping_limit``,
    ``silence_min``, ``gain``, ``peak_ceiling`` and the recipe's own keys);
    choices given as enums become their values.
    """
    flat = {}
    for name, value in given.items():
        key = _RECIPE_KEY_OF.get(name, name)
        if key not in RECIPE_KEYS:
            raise TypeError(f"recipe_options() got an unknown option {name!r}")
        if value is not None:
            flat[key] = getattr(value, "value", value)
    return flat
