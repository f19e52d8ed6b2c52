"""``requant batch``: a library, its progress and its summary; parsing and printing only.

The domain work is :func:`requant.library.run_batch`, imported inside the
command so that ``requant --help`` stays fast. Recipe options default to None
here (the ``Maybe...`` forms of :mod:`requant.cli.common`) so that the command
can tell which ones were given: explicit options override a ``--profile``,
which overrides the library defaults.
"""

import sys
import time
from enum import Enum
from pathlib import Path
from typing import Annotated

import typer

from requant.cli.common import (
    FEW_BITS_CAUTION,
    Cluster,
    ClusterTimeout,
    Jobs,
    MaybeBits,
    MaybeBlockFrames,
    MaybeChannels,
    MaybeDither,
    MaybeDownmix,
    MaybeForceDither,
    MaybeGain,
    MaybePeakCeiling,
    MaybeQuantizer,
    MaybeRate,
    MaybeShaping,
    MaybeSilence,
    MaybeSilenceMin,
    Quiet,
    Seed,
    ShapingLimit,
    ShapingOrder,
    cluster_executor,
    err,
    recipe_options,
    stop_exit_code,
    stop_reason,
)
from requant.library.tree import OUTPUT_CHOICES

__all__ = ["batch", "OutFormat", "ConsoleReporter"]

_LIST_LIMIT = 10


OutFormat = Enum("OutFormat", {c: c for c in OUTPUT_CHOICES}, type=str)
OutFormat.__doc__ = "The batch output formats of requant.library.tree.OUTPUT_CHOICES."


def _clock(seconds):
    if float(seconds or 0.0) < 60:
        return f"{float(seconds or 0.0):.1f} s"
    seconds = int(round(float(seconds or 0.0)))
    h, rem = divmod(seconds, 3600)
    m, s = divmod(rem, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def _show(name):
    """A file name on one line: as it is when printable, else with escapes."""
    return name if name.isprintable() else repr(name)


def _fmt(v, spec):
    return "n/a" if v is None else format(v, spec)


class ConsoleReporter:
    """Progress for people: a rich bar on a terminal, a few plain lines otherwise.

    Parameters
    ----------
    quiet : bool
        Print only warnings and errors (failures are always printed).
    stream : file, default sys.stderr
        Where progress and problems go; the final summary goes to stdout.
    tty : bool, optional
        Force the bar on or off (default: ``stream.isatty()``).
    """

    def __init__(self, quiet=False, stream=None, tty=None):
        self.quiet = quiet
        self.stream = stream or sys.stderr
        self.tty = self.stream.isatty() if tty is None else tty
        self._bar = None
        self._task = None
        self._next_line = 0
        self._last_line_t = 0.0
        self._t0 = time.monotonic()

    def _print(self, text, err=True):
        if self._bar is not None:
            self._bar.console.print(text, markup=False, highlight=False)
        else:
            print(text, file=self.stream if err else sys.stdout, flush=True)

    def started(self, info):
        self._t0 = time.monotonic()
        self._files = info["files"]
        if self.quiet:
            return
        up = info.get("up_to_date")
        print(f"requant batch: {info['files']} files ({info['audio_files']} to check or convert"
              + (f", {up} up to date" if up else "") + f") into {info['dst']}; "
              f"{info['executor']}; run seed {info['run_seed']} ({info['seed_origin']})",
              flush=True)
        if self.tty and info["files"]:
            from rich.console import Console
            from rich.progress import (
                BarColumn,
                Progress,
                TextColumn,
                TimeElapsedColumn,
                TimeRemainingColumn,
            )

            self._bar = Progress(
                TextColumn("converting"), BarColumn(),
                TextColumn("{task.fields[files]} files"),
                TextColumn("{task.fields[audio]} of audio"),
                TimeElapsedColumn(), TextColumn("ETA"), TimeRemainingColumn(),
                console=Console(file=self.stream), transient=True,
                # no refresh thread while worker processes are forked (fork safety):
                # file_done and tick refresh the bar instead
                auto_refresh=info.get("threads_ok", True))
            self._bar.start()
            self._task = self._bar.add_task("batch", total=max(1, info["bytes"]),
                                            files=f"0/{info['files']}", audio=_clock(0))
        else:
            self._step = max(1, info["files"] // 10)
            self._next_line = self._step

    def tick(self):
        if self._bar is not None:
            self._bar.refresh()

    def message(self, kind, text):
        if kind == "warning" or not self.quiet:
            self._print(f"{kind}: {text}")

    def file_done(self, event, progress):
        if event["status"] == "failed":
            self._print(f"failed: {_show(event['source'])}: {event['error']}")
        if self.quiet:
            return
        if self._bar is not None:
            self._bar.update(self._task, completed=progress["bytes_done"],
                             files=f"{progress['files_done']}/{progress['files_total']}",
                             audio=_clock(progress["audio_s_done"]))
            now = time.monotonic()
            if now - self._last_line_t > 0.1:
                self._last_line_t = now
                self._bar.refresh()
            return
        now = time.monotonic()
        done = progress["files_done"]
        if done >= self._next_line or (now - self._last_line_t > 30 and done < self._files):
            self._last_line_t = now
            while self._next_line <= done:
                self._next_line += self._step
            self._print(f"  {done}/{progress['files_total']} files, "
                        f"{_clock(progress['audio_s_done'])} of audio, "
                        f"{now - self._t0:.1f} s")

    def close(self):
        if self._bar is not None:
            self._bar.stop()
            self._bar = None

    def finished(self, summary):
        self.close()


def _print_list(title, rows, stream):
    if not rows:
        return
    print(f"{title} ({len(rows)}):", file=stream)
    for line in rows[:_LIST_LIMIT]:
        print(f"  {line}", file=stream)
    if len(rows) > _LIST_LIMIT:
        print(f"  ... and {len(rows) - _LIST_LIMIT} more (see the summary file)", file=stream)


def _print_summary(summary, quiet):
    import os

    c, t = summary["counts"], summary["throughput"]
    dst = summary["dst"]
    if not quiet:
        line = (f"converted {c['converted']}, up to date {c['up_to_date']}, failed {c['failed']}, "
                f"not audio {c['not_audio']}")
        if c.get("excluded"):
            line += f", excluded by patterns {c['excluded']}"
        if c.get("not_started"):
            line += f", not started {c['not_started']}"
        print(f"{line} in {summary['wall_s']:.1f} s ({_fmt(t['files_per_s'], '.1f')} files/s, "
              f"{_clock(summary['converted_duration_s'])} of audio converted, "
              f"{_fmt(t['audio_s_per_s'], '.0f')} audio seconds per second)")
        for note in summary["notes"]:
            print(f"note: {note}")
    _print_list("failed", [f"{_show(f['source'])}: {f['error']}" for f in summary["failures"]],
                sys.stderr)
    warn = [f"{_show(w['source'])}: {', '.join(w['kinds']) or 'warning'}"
            + (" (from an earlier run)" if w.get("earlier_run") else "")
            for w in summary["warnings"]]
    _print_list("files with warnings", warn, sys.stderr)
    if not quiet:
        _print_list("not audio, skipped", [f"{_show(n['source'])} ({n['reason']})"
                                           for n in summary["not_audio"]], sys.stdout)
        print(f"manifest {os.path.join(dst, summary['manifest'])} "
              f"(+{summary.get('manifest_rows', 0)} rows); summary "
              f"{os.path.join(dst, 'requant-summary.json')}; index "
              f"{os.path.join(dst, summary['index'])}")


def _print_dry_run(result, quiet):
    if not quiet:
        for it in result["items"]:
            target = (f" -> {_show(it['output'])}" if it["output"] and it["output"] != it["source"]
                      else "")
            print(f"{'would ' + it['action']:14} {_show(it['source'])}{target}  ({it['reason']})")
    c = result["counts"]
    seed = (f"run seed {result['run_seed']} ({result['seed_origin']})"
            if result["run_seed"] is not None else "a fresh run seed would be drawn")
    print(f"dry run: would convert {c['convert']}, skip {c['skip']}, fail {c['fail']}"
          + (f", {result['excluded']} excluded by patterns" if result["excluded"] else "")
          + f"; {seed}; nothing was written")


def batch(
    src: Annotated[Path | None, typer.Argument(
        help="Folder of audio files (walked recursively; links to folders are not "
             "followed).", show_default=False)] = None,
    dst: Annotated[Path | None, typer.Argument(
        help="Destination folder: mirrors SRC's tree and holds the manifest, summary and "
             "index.", show_default=False)] = None,
    bits: MaybeBits = None,
    quantizer: MaybeQuantizer = None,
    dither: MaybeDither = None,
    shaping: MaybeShaping = None,
    shaping_order: ShapingOrder = None,
    shaping_limit: ShapingLimit = None,
    seed: Seed = None,
    force_dither: MaybeForceDither = None,
    silence: MaybeSilence = None,
    silence_min: MaybeSilenceMin = None,
    channels: MaybeChannels = None,
    downmix: MaybeDownmix = None,
    rate: MaybeRate = None,
    gain: MaybeGain = None,
    peak_ceiling: MaybePeakCeiling = None,
    analyze: Annotated[bool | None, typer.Option(
        "--analyze/--no-analyze",
        help="Measure each file's weighted noise, signal-correlated error and true peak "
             "(about 5x slower on short files) [default: no].", show_default=False)] = None,
    format: Annotated[OutFormat | None, typer.Option(
        "--format", help="Output format; 'same' keeps WAV, FLAC and AIFF and writes "
                         "other sources as WAV [default: same].", show_default=False)] = None,
    include: Annotated[list[str] | None, typer.Option(
        "--include", help="Only files whose relative path (or name) matches this glob; "
                          "repeatable.")] = None,
    exclude: Annotated[list[str] | None, typer.Option(
        "--exclude", help="Leave out files whose relative path (or name) matches this "
                          "glob; repeatable.")] = None,
    profile: Annotated[Path | None, typer.Option(
        "--profile", help="Saved delivery settings (TOML); options given here override "
                          "it.")] = None,
    jobs: Jobs = None,
    cluster: Cluster = None,
    cluster_timeout: ClusterTimeout = 10.0,
    overwrite: Annotated[bool, typer.Option(
        "--overwrite", help="Replace outputs in DST that requant batch did not write.")] = False,
    dry_run: Annotated[bool, typer.Option(
        "--dry-run", help="Say what would be done; write nothing.")] = False,
    verify_sources: Annotated[bool, typer.Option(
        "--verify-sources", help="Hash every source converted before, not only those whose "
                                 "size or time changed, before skipping it as up to date.")
    ] = False,
    block_frames: MaybeBlockFrames = None,
    quiet: Quiet = False,
    compact: Annotated[Path | None, typer.Option(
        "--compact", metavar="DST",
        help="Only rewrite DST's manifest, keeping the newest row per file (and what resume "
             "needs); crash-safe. Takes no SRC.", show_default=False)] = None,
):
    """Convert a folder tree (a sound library) into a mirrored tree, with a manifest.

    Reruns skip files already converted with the same settings; a broken
    file is recorded and the batch goes on. Exit code 0 when nothing
    failed, 1 when some file failed, 2 for bad options, 130 when
    interrupted (rerun the same command to resume).
    """
    if compact is not None:
        _compact(compact, src, dst, quiet)
        return
    if src is None or dst is None:
        from requant.errors import UsageError

        raise UsageError("give a source folder and a destination folder (requant batch SRC "
                         "DST), or --compact DST")
    from requant.library import resolve_settings, run_batch

    prof = None
    if profile is not None:
        from requant.library.profiles import load_profile

        prof = load_profile(profile)
    options = recipe_options(bits=bits, quantizer=quantizer, dither=dither, shaping=shaping,
                             shaping_order=shaping_order, shaping_limit=shaping_limit,
                             seed=seed, force_dither=force_dither, silence=silence,
                             silence_min=silence_min, channels=channels, downmix=downmix,
                             rate=rate, gain=gain, peak_ceiling=peak_ceiling)
    options.update({"format": format.value if format else None, "include": include or None,
                    "exclude": exclude or None, "block_frames": block_frames,
                    "analyze": analyze})
    settings = resolve_settings(options, prof)
    executor = cluster_executor(cluster, jobs, cluster_timeout)
    reporter = ConsoleReporter(quiet=quiet)
    try:
        if executor is not None and not dry_run:
            executor.start()  # unreachable scheduler: one line, before anything is written
        result = run_batch(src, dst, settings, jobs=jobs, overwrite=overwrite,
                           dry_run=dry_run, reporter=reporter, executor=executor,
                           profile_path=str(profile) if profile else None,
                           verify_sources=verify_sources)
    finally:
        reporter.close()
        if executor is not None:
            executor.close()
    _report_outcome(result, settings, dry_run=dry_run, quiet=quiet)


def _compact(dst, src, extra, quiet):
    """``--compact DST``: rewrite the manifest; print what it did."""
    from requant.errors import UsageError
    from requant.library import compact_manifest

    if src is not None or extra is not None:
        raise UsageError("--compact takes the destination folder alone (requant batch --compact "
                         "DST); run the batch separately")
    done = compact_manifest(dst)
    if not quiet:
        print(f"compacted {done['path']}: {done['rows_before']} rows -> {done['rows_after']}, "
              f"{done['bytes_before'] / 1e6:.1f} MB -> {done['bytes_after'] / 1e6:.1f} MB"
              + (f"; {done['unreadable']} unreadable line(s) dropped" if done["unreadable"]
                 else ""))


def _report_outcome(result, settings, *, dry_run, quiet):
    """Print the end of a run and leave with its exit code."""
    if dry_run:
        _print_dry_run(result, quiet)
        return
    if result["interrupted"]:
        import os

        c = result["counts"]
        err(f"{stop_reason()} after {c['converted']} converted and {c['failed']} failed "
            f"(summary in {os.path.join(result['dst'], 'requant-summary.json')}); no "
            "partial output was left behind; run the same command again to resume")
        raise typer.Exit(code=stop_exit_code())
    _print_summary(result, quiet)
    if settings.recipe.bits <= 8 and not quiet and result["counts"]["converted"]:
        print(FEW_BITS_CAUTION, file=sys.stderr)  # batch writes no error signals
    if result["counts"]["failed"]:
        raise typer.Exit(code=1)
