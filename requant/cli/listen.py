"""``requant listen`` and ``requant score``: parsing and printing only.

The domain code (:mod:`requant.listening`) is imported inside the commands, so
that ``requant --help`` stays fast.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Annotated

import typer

from requant.cli.common import (
    CAUTION,
    DEFAULTS,
    Bits,
    Overwrite,
    Seed,
    ShapingLimit,
    ShapingOrder,
    Silence,
    SilenceMin,
    SilenceOpt,
)
from requant.listening.excerpt import MAX_EXCERPT_SECONDS, MIN_EXCERPT_SECONDS, QUIET_SECONDS
from requant.listening.methods import DEFAULT_METHODS, METHOD_HEADS, METHOD_SHAPINGS

__all__ = ["listen", "score", "level_words"]

_METHOD_HELP = (f"A method to render (repeat for more): {', '.join(METHOD_HEADS)}, optionally "
                f"followed by {' or '.join('+' + s for s in METHOD_SHAPINGS)} and by @BITS for "
                f"a word length of its own, e.g. tpdf+hearing or tpdf@12. Default: "
                f"{', '.join(DEFAULT_METHODS)} (or only the methods of --pair).")
_PAIR_HELP = ("Two methods to compare with each other, openly and in blind trials, separated by "
              "a comma (repeat for more), e.g. tpdf,tpdf+hearing or tpdf@12,tpdf@16; their "
              "methods are rendered too.")


def listen(
    src: Annotated[Path, typer.Argument(help="Audio file to take the excerpt from.")],
    outdir: Annotated[Path, typer.Argument(help="Folder for the kit (created if missing).")],
    bits: Bits = DEFAULTS.bits,
    method: Annotated[list[str] | None, typer.Option(
        "--method", "-m", help=_METHOD_HELP)] = None,
    pair: Annotated[list[str] | None, typer.Option(
        "--pair", "-p", metavar="A,B", help=_PAIR_HELP)] = None,
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
    hide_answers: Annotated[bool, typer.Option(
        "--hide-answers",
        help="The page starts with answers and the running score hidden until the end of a "
             "blind session (the listener can change it before the first trial).")] = False,
    seed: Seed = None,
    shaping_order: ShapingOrder = None,
    shaping_limit: ShapingLimit = None,
    silence: SilenceOpt = Silence(DEFAULTS.silence),
    silence_min: SilenceMin = DEFAULTS.silence_min_ms,
    overwrite: Overwrite = False,
):
    """Render one excerpt with every method, with error signals made safely audible,
    and a page (OUTDIR/index.html) for open and blind listening."""
    from requant.listening.excerpt import Excerpt
    from requant.listening.kit import make_listening_kit
    from requant.recipe import Recipe, Shaping

    base = Recipe(bits=bits, seed=seed,
                  shaping=Shaping("hearing", order=shaping_order, limit_db=shaping_limit),
                  silence=silence.value, silence_min_ms=silence_min)
    kit = make_listening_kit(src, outdir, recipe=base, methods=method or None,
                             pairs=pair or (), excerpt=Excerpt(start, duration),
                             quiet=quiet_seconds if quiet_passage else None,
                             hide_answers=hide_answers, overwrite=overwrite)
    _print_kit(kit, outdir)
    print(CAUTION, file=sys.stderr)


def _unit(measure):
    return "LU" if measure == "LUFS" else "dB"


def level_words(comparison, role="B"):
    """How the player of ``role`` plays against the reference: words for the terminal."""
    row = next(r for r in comparison["players"] if r["role"] == role)
    ref = comparison["players"][0]
    unit = _unit(comparison["measure"])
    if row["state"] == "silent" or ref["level"] is None:
        return "digital silence" if row["state"] == "silent" else "the reference is silent"
    written = row["level"] - ref["level"]
    if row["state"] == "stated":
        return f"{written:+.1f} {unit} from the original, stated on the page (the switch fades)"
    if row["gain_db"] == 0 and ref["gain_db"] == 0:
        return f"{written:+.2f} {unit} as written: matched within {comparison['tolerance_db']:g} dB"
    who = "it" if row["gain_db"] < 0 else "the original"
    return (f"{written:+.2f} {unit} as written; {who} plays "
            f"{-min(row['gain_db'], ref['gain_db']):.1f} dB quieter to match")


def _print_kit(kit, outdir):
    ex = kit["excerpt"]
    print(f"wrote a listening kit to {outdir}/: {len(kit['methods'])} method(s) at "
          f"{'/'.join(map(str, kit['word_lengths']))} bits, {ex['duration_s']:.2f} s from "
          f"{ex['start_s']:.2f} s, seed {kit['seed']}")
    comps = {c["id"]: c for c in kit["comparisons"]}
    for m in kit["methods"]:
        f, er = m["figures"], m["error_render"]
        snr = "n/a" if f["snr_db"] is None else f"{f['snr_db']:.2f} dB"
        note = "" if m["level"]["consistent"] else " (differs by more than its error: clipped)"
        print(f"  {m['method']:18} SNR {snr}; loudness {level_words(comps[m['id']])}{note}")
        print(f"  {'':18} error render: {level_words(comps[m['id']], 'extra')}; peak "
              f"{'n/a' if er['peak_dbfs'] is None else format(er['peak_dbfs'], '.1f')} dBFS, "
              f"{er['limited_samples']} samples limited")
    for c in kit["comparisons"]:
        if c["kind"] == "pair" and c["passage"] == "excerpt":
            print(f"  {c['label']}: {level_words(c).replace('the original', 'the first')}")
    print(f"error renders: {kit['error_gain']['gain_db']:+.1f} dB, hard-limited at "
          f"{kit['cap_dbfs']:.0f} dBFS peak")
    q = kit["quiet_passage"]
    if q is not None:
        if q["found"]:
            own = [f"{m['method']} {m['quiet']['gain_db']:+.1f} dB" for m in kit["methods"]
                   if m["quiet"]["own_gain"]]
            print(f"quiet passage: {q['start_s']:.2f} s to "
                  f"{q['start_s'] + q['duration_s']:.2f} s, {q['rms_dbfs']:.1f} dBFS RMS, "
                  f"raised {q['gain_db']:+.1f} dB after requantizing"
                  + (f"; to the original's loudness: {', '.join(own)}" if own else ""))
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

    data = load_results(results)
    print(format_scores(score_results(data), data))
