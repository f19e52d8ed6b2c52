"""Command-line commands ``listen`` and ``score``: parsing and printing only.

:func:`register` adds both commands to the typer app of :mod:`requant.cli`
(which calls it). The domain code (:mod:`requant.listen`,
:mod:`requant.score`) is imported inside the commands, so that
``requant --help`` stays fast.
"""

import sys
from pathlib import Path
from typing import List, Optional

import typer

__all__ = ["register", "DEFAULT_METHODS"]

#: Methods rendered when no --method is given: the plain cut, the textbook
#: cure, and the cure with noise shaping.
DEFAULT_METHODS = ("truncate", "tpdf", "tpdf+hearing")

_METHOD_HELP = ("A method to render (repeat for more): truncate, round, rpdf, tpdf or tpdf-hp, "
                "optionally followed by +first-order or +hearing, e.g. tpdf+hearing. "
                f"Default: {', '.join(DEFAULT_METHODS)}.")


def _command_names(app):
    names = set()
    for c in app.registered_commands:
        name = c.name or (c.callback.__name__.replace("_", "-") if c.callback else None)
        names.add(name)
    return names


def register(app):
    """Add the ``listen`` and ``score`` commands to ``app`` (once; repeats are ignored).

    Parameters
    ----------
    app : typer.Typer
        The application of :mod:`requant.cli`.
    """
    from requant.cli import CAUTION, friendly

    if "listen" in _command_names(app):
        return

    @app.command("listen")
    @friendly
    def listen(
        src: Path = typer.Argument(..., help="Audio file to take the excerpt from."),
        outdir: Path = typer.Argument(..., help="Folder for the kit (created if missing)."),
        bits: int = typer.Option(16, "--bits", "-b", min=1, max=32, help="Target word length."),
        method: Optional[List[str]] = typer.Option(None, "--method", "-m", help=_METHOD_HELP),
        start: float = typer.Option(0.0, "--start", min=0.0,
                                    help="Start of the excerpt in the source, seconds."),
        duration: Optional[float] = typer.Option(
            None, "--duration", min=0.5, max=120.0,
            help="Length of the excerpt, seconds. Default: 30 s or to the end of the file."),
        quiet_passage: bool = typer.Option(
            False, "--quiet-passage",
            help="Also render the quietest non-silent stretch of the source, raised by a "
                 "stated gain after requantizing, so that low-level behaviour is audible."),
        quiet_seconds: float = typer.Option(2.0, "--quiet-seconds", min=0.5, max=60.0,
                                            help="Length of the quiet passage, seconds."),
        seed: Optional[int] = typer.Option(None, "--seed", min=0,
                                           help="Dither seed, the same for every method. "
                                                "Default: fresh, recorded in figures.json."),
        shaping_order: Optional[int] = typer.Option(None, min=1, max=64,
                                                    help="Order of the 'hearing' design."),
        shaping_limit: Optional[float] = typer.Option(None, help="Limit on the total noise "
                                                                 "gain of the 'hearing' "
                                                                 "design, dB."),
        overwrite: bool = typer.Option(False, "--overwrite", help="Replace an earlier kit's "
                                                                  "files in OUTDIR."),
    ):
        """Render one excerpt with every method, with error signals made safely audible,
        and a page (OUTDIR/index.html) for open and blind listening."""
        from requant.listen import make_listening_kit

        kit = make_listening_kit(src, outdir, bits=bits, methods=method or DEFAULT_METHODS,
                                 start_s=start, duration_s=duration, quiet_passage=quiet_passage,
                                 quiet_seconds=quiet_seconds, seed=seed,
                                 shaping_order=shaping_order, shaping_limit_db=shaping_limit,
                                 overwrite=overwrite)
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
        print(CAUTION, file=sys.stderr)

    @app.command("score")
    @friendly
    def score(
        results: Path = typer.Argument(..., help="Results JSON saved by the listening page."),
    ):
        """Print right answers per comparison and the chance of that score by guessing."""
        from requant.score import format_scores, load_results, score_results

        print(format_scores(score_results(load_results(results))))
