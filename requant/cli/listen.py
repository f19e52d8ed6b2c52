"""``requant listen`` and ``requant score``: parsing and printing only.

The domain code (:mod:`requant.listening`) is imported inside the commands, so
that ``requant --help`` stays fast.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Annotated

import typer

from requant.cli.common import CAUTION, DEFAULTS, Bits, Overwrite, Seed, ShapingLimit, ShapingOrder
from requant.listening.excerpt import MAX_EXCERPT_SECONDS, MIN_EXCERPT_SECONDS, QUIET_SECONDS
from requant.listening.methods import DEFAULT_METHODS, METHOD_HEADS, METHOD_SHAPINGS

__all__ = ["listen", "score"]

_METHOD_HELP = (f"A method to render (repeat for more): {', '.join(METHOD_HEADS)}, optionally "
                f"followed by {' or '.join('+' + s for s in METHOD_SHAPINGS)}, e.g. "
                f"tpdf+hearing. Default: {', '.join(DEFAULT_METHODS)}.")


def listen(
    src: Annotated[Path, typer.Argument(help="Audio file to take the excerpt from.")],
    outdir: Annotated[Path, typer.Argument(help="Folder for the kit (created if missing).")],
    bits: Bits = DEFAULTS.bits,
    method: Annotated[list[str] | None, typer.Option(
        "--method", "-m", help=_METHOD_HELP)] = None,
    start: Annotated[float, typer.Option(
        "--start", min=0.0, help="Start of the excerpt in the source, seconds.")] = 0.0,
    duration: Annotated[float | None, typer.Option(
        "--duration", min=MIN_EXCERPT_SECONDS, max=MAX_EXCERPT_SECONDS,
        help="Length of the excerpt, seconds. Default: 30 s or to the end of the file.")] = None,
    quiet_passage: Annotated[bool, typer.Option(
        "--quiet-passage",
        help="Also render the quietest non-silent stretch of the source, raised by a "
             "stated gain after requantizing, so that low-level behaviour is audible.")] = False,
    quiet_seconds: Annotated[float, typer.Option(
        "--quiet-seconds", min=MIN_EXCERPT_SECONDS, max=60.0,
        help="Length of the quiet passage, seconds.")] = QUIET_SECONDS,
    seed: Seed = None,
    shaping_order: ShapingOrder = None,
    shaping_limit: ShapingLimit = None,
    overwrite: Overwrite = False,
):
    """Render one excerpt with every method, with error signals made safely audible,
    and a page (OUTDIR/index.html) for open and blind listening."""
    from requant.listening.excerpt import Excerpt
    from requant.listening.kit import make_listening_kit
    from requant.recipe import Recipe, Shaping

    base = Recipe(bits=bits, seed=seed,
                  shaping=Shaping("hearing", order=shaping_order, limit_db=shaping_limit))
    kit = make_listening_kit(src, outdir, recipe=base, methods=method or DEFAULT_METHODS,
                             excerpt=Excerpt(start, duration),
                             quiet=quiet_seconds if quiet_passage else None,
                             overwrite=overwrite)
    _print_kit(kit, outdir)
    print(CAUTION, file=sys.stderr)


def _print_kit(kit, outdir):
    ex = kit["excerpt"]
    print(f"wrote a listening kit to {outdir}/: {len(kit['methods'])} method(s) at "
          f"{kit['bits']} bits, {ex['duration_s']:.2f} s from {ex['start_s']:.2f} s, "
          f"seed {kit['seed']}")
    for m in kit["methods"]:
        f, lv, er = m["figures"], m["level"], m["error_render"]
        snr = "n/a" if f["snr_db"] is None else f"{f['snr_db']:.2f} dB"
        diff = "n/a" if lv["difference_db"] is None else f"{lv['difference_db']:+.4f} dB"
        print(f"  {m['method']:18} SNR {snr}; level {diff} "
              f"({'matched' if lv['matched'] else 'NOT matched'}); error render peak "
              f"{'n/a' if er['peak_dbfs'] is None else format(er['peak_dbfs'], '.1f')} dBFS, "
              f"{er['limited_samples']} samples limited")
    print(f"error renders: {kit['error_gain']['gain_db']:+.1f} dB, hard-limited at "
          f"{kit['cap_dbfs']:.0f} dBFS peak")
    q = kit["quiet_passage"]
    if q is not None:
        if q["found"]:
            print(f"quiet passage: {q['start_s']:.2f} s to "
                  f"{q['start_s'] + q['duration_s']:.2f} s, {q['rms_dbfs']:.1f} dBFS RMS, "
                  f"raised {q['gain_db']:+.1f} dB after requantizing")
        else:
            print(f"warning: {q['note']}", file=sys.stderr)
    print(f"open {Path(outdir) / kit['files']['page']} in a web browser (no server needed)")
    for m in kit["methods"]:
        for w in m["figures"]["warnings"]:
            print(f"warning: {m['method']}: {w}", file=sys.stderr)


def score(
    results: Annotated[Path, typer.Argument(help="Results JSON saved by the listening page.")],
):
    """Print right answers per comparison and the chance of that score by guessing."""
    from requant.listening.score import format_scores, load_results, score_results

    print(format_scores(score_results(load_results(results))))
