"""Convert one file: read blocks, requantize, write codes, the error signal and reports.

:func:`convert_file` takes a :class:`~requant.recipe.Recipe` (what decides the
output bits) and an :class:`Outputs` (where and how they are written). Memory
stays flat: a handful of block buffers is reused for the whole file. Outputs
are written to temporary files and renamed at the end
(:mod:`requant.audio_io.atomic`), so a failed or interrupted run leaves nothing
partial behind.

The steps, in order: :func:`_targets` checks every output before anything is
read; :func:`_open_source` reads the input's facts; :func:`_requantizer`
resolves the shaping for the file's rate and decides whether the input is
already on the target grid; :func:`_stream` runs the blocks through the
requantizer and the writers (and the analyzer, when a report wants it);
:func:`_finish` carries metadata, has
:func:`requant.report.build.build_report` turn the running sums and the
analysis into the typed :class:`~requant.report.model.Report`, writes the
reports and commits.
"""

from __future__ import annotations

import math
import os
import sys
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from requant.audio_io.atomic import AtomicOutputs, check_outputs, remove_stale_temps_of
from requant.audio_io.formats import (
    DEFAULT_BLOCK_FRAMES,
    MAX_BLOCK_FRAMES,
    RF64_THRESHOLD,
    check_block_frames,
    container_bits_of,
    format_for_path,
    read_dtype_for,
    subtype_for,
)
from requant.audio_io.probe import declared_frames
from requant.audio_io.reader import BlockReader, first_nonfinite, on_grid, open_input, read_blocks
from requant.audio_io.writers import BlockWriter, SyncWriter, open_output, wrap_write_error
from requant.dsp.cap import CAP_DBFS, MAX_GAIN_DB, hard_limit, raise_to_target_db
from requant.dsp.kernel import ACC_FIELDS
from requant.dsp.quantizer import Requantizer, new_seed
from requant.errors import InputError, UsageError
from requant.recipe import Recipe
from requant.report.build import Conversion, build_report
from requant.report.model import ErrorGain, Report

__all__ = ["convert_file", "Outputs", "DEFAULT_BLOCK_FRAMES", "MAX_BLOCK_FRAMES",
           "check_block_frames", "error_gain_db"]

_ERROR_FORMATS = {".wav": "WAV", ".wave": "WAV", ".aif": "AIFF", ".aiff": "AIFF", ".aifc": "AIFF"}
_REPORT_KINDS = (".json", ".html", ".htm", ".md")


@dataclass(frozen=True)
class Outputs:
    """Where and how a conversion writes; nothing here changes the output codes.

    Parameters
    ----------
    error : path, optional
        Write the error signal (output minus input) as 32-bit float, ``.wav``
        or ``.aiff``.
    report : path or sequence of paths, optional
        Write the report: ``.json``, ``.html`` (one self-contained page) or
        ``.md`` (pictures beside it); several paths write several forms.
    overwrite : bool, default False
        Replace existing outputs (never the input, not even through a link).
    container : {'WAV', 'FLAC', 'AIFF'}, optional
        The output container; default: from the output's extension.
    metadata : bool, default False
        Carry the source's metadata over: a WAV's chunks into a WAV output
        (``bext`` with a coding-history row appended), text tags into FLAC and
        AIFF; what cannot be carried is listed in the report.
    error_gain : float (dB), 'auto' or None, default None
        Write the error signal raised for listening: by this gain (-120 to
        +120 dB), or ``'auto'`` (:func:`error_gain_db`: flat TPDF noise of the
        word length at -40 dBFS RMS), then hard-limited at -6 dBFS sample peak
        (:mod:`requant.dsp.cap`). The gain is stated in the report and in the
        file's comment. None (default): the exact error at unity gain.
    """

    error: str | os.PathLike | None = None
    report: str | os.PathLike | Sequence[str | os.PathLike] | None = None
    overwrite: bool = False
    container: str | None = None
    metadata: bool = False
    error_gain: float | str | None = None

    @property
    def reports(self) -> tuple[str, ...]:
        """The report paths, as strings."""
        if self.report is None:
            return ()
        if isinstance(self.report, (str, os.PathLike)):
            return (os.fspath(self.report),)
        return tuple(os.fspath(p) for p in self.report)


@dataclass(frozen=True)
class _Targets:
    """Every output of one conversion, checked before anything is read."""

    src: str
    dst: str
    fmt: str
    subtype: str
    error: str | None
    error_fmt: str | None
    reports: tuple[str, ...]
    error_gain: tuple[float, str] | None = None


@dataclass(frozen=True)
class _Source:
    """The input's facts, from its header."""

    rate: int
    channels: int
    frames: int
    subtype: str
    format: str
    dtype: str
    declared_frames: int


def _targets(src, dst, recipe, outputs):
    """Check names, formats and clashes of every output; nothing is written yet."""
    src, dst = os.fspath(src), os.fspath(dst)
    fmt = outputs.container or format_for_path(dst)
    subtype = subtype_for(fmt, recipe.bits)
    error = err_fmt = None
    if outputs.error is not None:
        error = os.fspath(outputs.error)
        err_fmt = _ERROR_FORMATS.get(os.path.splitext(error)[1].lower())
        if err_fmt is None:
            raise UsageError(f"{error!r}: the error signal is 32-bit float; name it .wav or .aiff")
    reports = outputs.reports
    pictures = []
    for path in reports:
        if os.path.splitext(path)[1].lower() not in _REPORT_KINDS:
            raise UsageError(f"{path!r}: name the report .json, .html or .md")
        if path.lower().endswith(".md"):
            from requant.report.render import picture_paths

            pictures.extend(picture_paths(path).values())
    gain = error_gain_db(outputs.error_gain, recipe.bits)
    if gain is not None and error is None:
        raise UsageError("an error gain was given without an error file; add --error PATH.wav "
                         "or leave out --error-gain")
    check_outputs([src], [dst, error, *reports, *pictures], overwrite=outputs.overwrite)
    for path in (dst, error, *reports, *pictures):  # what a killed run of these left behind
        if path is not None:
            remove_stale_temps_of(path)
    return _Targets(src, dst, fmt, subtype, error, err_fmt, reports, gain)


def error_gain_db(value, bits):
    """The error signal's gain: ``(gain dB, rule)``, or None for the exact error.

    Parameters
    ----------
    value : float, str or None
        A gain in dB (-120 to +120; a number or its text), ``'auto'``, or None.
    bits : int
        The target word length; ``'auto'`` raises flat TPDF noise (Δ²/4,
        Lipshitz, Wannamaker & Vanderkooy 1992) of this word length to
        -40 dBFS RMS (:func:`requant.dsp.cap.raise_to_target_db`), at most +120 dB.

    Returns
    -------
    (float, str) or None
        The rule is ``'auto'`` or ``'fixed'``.

    Raises
    ------
    UsageError
        For anything else.
    """
    if value is None:
        return None
    number = value
    if isinstance(value, str):
        text = value.strip().lower()
        if text == "auto":
            return raise_to_target_db(0.25, bits), "auto"
        try:
            number = float(text)
        except ValueError:
            number = None
    if isinstance(number, bool) or not isinstance(number, (int, float)) or not (
            math.isfinite(number) and abs(number) <= MAX_GAIN_DB):
        raise UsageError(f"error gain {value!r} is not allowed: give 'auto' or a gain in dB from "
                         f"{-MAX_GAIN_DB:g} to {MAX_GAIN_DB:g}")
    return float(number), "fixed"


class _RaisedError:
    """The error file, written raised by a stated gain and hard-limited at the cap.

    The exact error stays in the block buffers (the report's analysis reads
    them after the write); each block is raised into a copy.
    """

    def __init__(self, file, gain_db):
        self._file = file
        self._gain = 10.0 ** (gain_db / 20.0)
        self.limited = 0

    def write(self, block):
        y, n = hard_limit(np.multiply(block, self._gain, dtype=np.float64))
        self.limited += n
        self._file.write(y)

    def close(self):
        self._file.close()


def _error_comment(gain):
    """The raised error file's comment: what it is and how loud it was made."""
    return (f"requant error signal (output minus input), raised by {gain[0]:+.1f} dB "
            f"({gain[1]}), hard-limited at {CAP_DBFS:.0f} dBFS sample peak")


def _open_source(f, path):
    """The input's facts; ``declared_frames`` is what a WAV/AIFF header says, which is more
    than libsndfile's count when the file was cut short."""
    declared = declared_frames(path)
    return _Source(rate=f.samplerate, channels=f.channels, frames=f.frames, subtype=f.subtype,
                   format=f.format, dtype=read_dtype_for(f.subtype),
                   declared_frames=max(f.frames, declared or 0))


def _requantizer(f, source, recipe, targets, block_frames, *, prepared=False):
    """The requantizer for this file, its coefficients, and whether the input is on the grid.

    Input already on the target grid (and in range) is written unchanged: no
    dither, no shaping, unless the recipe forces dither. ``source`` is the
    prepared input's facts (rate, channels); input changed before the
    quantizer (``prepared``) is never passed through.
    """
    if recipe.shaping.kind == "none":
        coeffs = np.zeros(0)
    else:  # the design module (and its weighting curves) only when a file is shaped
        from requant.dsp.shaping import coefficients_for

        coeffs = coefficients_for(recipe.shaping, source.rate)
    scale = float(2 ** (recipe.bits - 1))
    passthrough = (not recipe.force_dither) and not prepared and source.frames > 0 and on_grid(
        f, dtype=source.dtype, scale=scale, kmin=-(2 ** (recipe.bits - 1)),
        kmax=2 ** (recipe.bits - 1) - 1, block_frames=min(block_frames, 65536),
        subtype=source.subtype)
    applied = recipe.replace(dither="none", shaping="none") if passthrough else recipe
    rq = Requantizer.from_recipe(applied, source.channels,
                                 coeffs=np.zeros(0) if passthrough else coeffs,
                                 container_bits=container_bits_of(targets.subtype),
                                 sample_rate=source.rate)
    return rq, coeffs, passthrough


def _containers(source, targets, rq):
    """WAV outputs too large for RIFF's 32-bit sizes become RF64 (EBU Tech 3306)."""
    cbytes = container_bits_of(targets.subtype) // 8
    out_fmt = targets.fmt
    if out_fmt == "WAV" and source.frames * source.channels * cbytes > RF64_THRESHOLD:
        out_fmt = "RF64"
    e_fmt = targets.error_fmt
    if e_fmt == "WAV" and source.frames * source.channels * 4 > RF64_THRESHOLD:
        e_fmt = "RF64"
    return out_fmt, e_fmt


def _open_files(outs, source, targets, out_fmt, e_fmt, tags):
    """The output and error files, as temporaries of ``outs``."""
    import soundfile as sf

    tmp_out = outs.path_for(targets.dst)
    tmp_err = outs.path_for(targets.error) if targets.error else None
    try:
        wout = open_output(tmp_out, source.rate, source.channels, targets.subtype, out_fmt,
                           plain=not tags)
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        raise wrap_write_error(exc, targets.dst) from None
    gain = targets.error_gain
    try:
        werr = (open_output(tmp_err, source.rate, source.channels, "FLOAT", e_fmt, plain=True,
                            comment=None if gain is None else _error_comment(gain))
                if tmp_err else None)
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        wout.close()
        raise wrap_write_error(exc, targets.error) from None
    if werr is not None and gain is not None:
        werr = _RaisedError(werr, gain[0])
    for key, value in (tags or {}).items():
        try:
            setattr(wout, key, value)
        except (sf.LibsndfileError, RuntimeError, AttributeError, TypeError):
            pass
    return tmp_out, [wout] if werr is None else [wout, werr]


def _analyzer(rq, source, applied_dither, coeffs, block_frames):
    """The report's streaming analysis and the writer's consumer that feeds it."""
    from requant.dsp.analysis import ErrorAnalyzer

    analyzer = ErrorAnalyzer(source.channels, source.rate, bits=rq.bits, quantizer=rq.quantizer,
                             dither=applied_dither, coeffs=coeffs, total_frames=source.frames,
                             own_sums=False)

    def consumer(bufs, n):
        analyzer.feed(bufs[2][:n], bufs[1][:n], silent=bufs[3][:n] if len(bufs) > 3 else None)

    return analyzer, consumer


def _stream(f, rq, files, *, source, targets, analysis, block_frames, progress, prep=None,
            read=None):
    """Run every block through the requantizer and the writers; return the frames done.

    ``analysis`` is ``(analyzer, consumer)`` or None. One-block files are done
    inline (threads would cost more than they save); longer ones overlap
    reading, requantizing and writing on three threads. ``source`` holds the
    facts of what the requantizer sees; with ``prep``
    (:class:`requant.dsp.prepare.Preparer`) the blocks read (``read``: the input's facts)
    are prepared first, in pieces of at most ``block_frames``.
    """
    import soundfile as sf

    nch = source.channels
    # a block may come out with the frames the block before held back (silence kept)
    rows = block_frames + rq.hold
    layouts = [((rows, nch), rq.code_dtype), ((rows, nch), np.float32)]
    consumer = None
    if analysis is not None:
        consumer = analysis[1]
        layouts.append(((rows, nch), source.dtype))
        if rq.silence_frames:  # which samples were kept silent, for the analysis
            layouts.append(((rows, nch), np.bool_))
    else:
        layouts = layouts[:len(files)]
    want_err = len(files) > 1 or analysis is not None
    read = read or source  # the input's facts; ``source`` is what the requantizer sees
    read_dtype, read_rate = read.dtype, read.rate
    if source.frames <= block_frames:
        writer = SyncWriter(files, layouts, consumer=consumer)
        blocks = read_blocks(f, block_frames, read_dtype)
    else:
        # the analysis thread runs in bursts (true peak); deeper queues keep the
        # kernel from waiting on it: report vs none 1.49x -> 1.45x (median of 7)
        writer = BlockWriter(files, layouts, depth=4 if consumer else 2, consumer=consumer)
        blocks = None
    done = 0
    try:
        f.seek(0)
        blocks = blocks or BlockReader(f, block_frames, read_dtype)
        for y in _prepared(blocks, prep, block_frames, rate_in=read_rate, src=targets.src):
            bufs = writer.buffers()
            codes, _ = rq.process(y, codes=bufs[0], error=want_err,
                                  err_out=bufs[1] if want_err else None)
            done = _hand_over(rq, writer, bufs, codes.shape[0], done, source, targets, analysis,
                              progress)
        while rq.held:  # the frames kept back to look for silence, at the end of the file
            bufs = writer.buffers()
            codes, _ = rq.flush(codes=bufs[0], error=want_err,
                                err_out=bufs[1] if want_err else None, max_frames=block_frames)
            done = _hand_over(rq, writer, bufs, codes.shape[0], done, source, targets, analysis,
                              progress)
        writer.close()
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        # blame the file whose write failed: the error file's folder may be the full one
        failed = targets.error if writer.failed_file == 1 and targets.error else targets.dst
        raise wrap_write_error(exc, failed) from None
    finally:
        _close_quietly(writer, files, targets)
    return done


def _prepared(read, prep, block_frames, *, rate_in, src):
    """The blocks the requantizer gets: those read, or with ``prep`` the prepared frames
    in pieces of at most ``block_frames``, then what the resampler held back. A NaN or
    infinite sample stops a prepared file here, named at its place in the source (the
    resampler would spread it over the frames around it)."""
    for start, x in read:
        if prep is None:
            yield x
            continue
        if not np.isfinite(x).all():
            raise _nonfinite_error(src, x, start, rate_in)
        yield from _pieces(prep.process(x), block_frames)
    if prep is not None:
        yield from _pieces(prep.finish(), block_frames)


def _pieces(y, block_frames):
    for start in range(0, y.shape[0], block_frames):
        yield y[start:start + block_frames]


def _nonfinite_error(src, x, start, rate):
    """The one-line error for the first NaN or infinite sample of block ``x`` (frame ``start``
    of a file at ``rate``)."""
    frame, ch, kind = first_nonfinite(x, start)
    return InputError(f"{src!r} has a {kind} sample at {frame / rate:.6f} s (frame {frame}, "
                      f"channel {ch + 1}); repair the source and run again")


def _hand_over(rq, writer, bufs, n, done, source, targets, analysis, progress):
    """Check the ``n`` frames the requantizer just gave and pass them to the writer;
    returns the frames done. (With silence kept they are not the block just read: the
    requantizer holds the last few back to look ahead.)"""
    if analysis is not None:
        rq.last_input(out=bufs[2])
        if len(bufs) > 3:
            rq.silent_mask(out=bufs[3])
    if rq.acc[:, _MAX_ABS_E].max() > _ABSURD_FULL_SCALE * rq.scale:
        _refuse_absurd(rq.last_input(), done, source, targets)
    if rq.acc[:, _NONFINITE].any():
        raise _nonfinite_error(targets.src, rq.last_input(), done, source.rate)
    writer.submit(bufs, n)
    done += n
    if progress is not None:
        progress(done, source.frames)
    return done


#: Column of the count of NaN and infinite samples among the kernel's running sums.
_NONFINITE = ACC_FIELDS.index("nonfinite")
#: Column of the largest error magnitude among the kernel's running sums.
_MAX_ABS_E = ACC_FIELDS.index("max_abs_e")
#: A float sample more than this many times full scale (+80 dBFS) is not audio a delivery
#: can be made from: the file is damaged or mislabelled. Below it, samples beyond full scale
#: are clipped and counted, and every figure stays finite (the error file too).
_ABSURD_FULL_SCALE = 1e4


def _refuse_absurd(x, start, source, targets):
    """Fail with the place and size of the first sample far beyond full scale."""
    flat = np.argmax(np.abs(np.where(np.isfinite(x), x, 0.0)))
    frame, ch = divmod(int(flat), source.channels)
    value = float(x.reshape(-1)[flat])
    level = 20 * np.log10(abs(value))
    raise InputError(
        f"{targets.src!r} has a sample of {value:.3g} ({level:+.0f} dBFS) at "
        f"{(start + frame) / source.rate:.6f} s (frame {start + frame}, channel {ch + 1}); a float "
        "file this far beyond full scale is damaged or not audio; repair or rescale it and run "
        "again")


def _close_quietly(writer, files, targets):
    """Close the writer and files; a close that fails matters only if nothing else did."""
    import soundfile as sf

    try:
        writer.close()
    except BaseException:
        pass
    try:
        for fh in files:
            fh.close()
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        if sys.exc_info()[0] is None:
            raise wrap_write_error(exc, targets.dst) from None


def _metadata_carrier(src, dst, recipe, fmt):
    """(tags to write, finalize callback) when carrying the source's metadata."""
    from requant.audio_io.metadata import CarryMetadata, is_riff_wave, source_tags

    is_wav = is_riff_wave(src)
    tags = {} if (fmt == "WAV" and is_wav) else source_tags(src)
    return tags, CarryMetadata(src, dst, recipe, tags, is_wav)


def convert_file(src, dst, recipe: Recipe | None = None, *, outputs: Outputs | None = None,
                 block_frames: int = DEFAULT_BLOCK_FRAMES, analyze: bool | None = None,
                 progress: Callable[[int, int], Any] | None = None) -> Report:
    """Requantize one audio file.

    Parameters
    ----------
    src : path
        Any file libsndfile reads: integer or float, any channels and rate.
    dst : path
        The container follows the extension (.wav, .flac, .aiff) unless
        ``outputs.container`` is given.
    recipe : Recipe, optional
        What decides the output bits (default ``Recipe()``: 16 bits, round,
        TPDF, no shaping). Without a seed, a fresh one is drawn and recorded in
        the report.
    outputs : Outputs, optional
        Error signal, reports, overwrite, container, metadata.
    block_frames : int, 1..4194304, default 65536
        Frames per block; the output does not depend on it.
    analyze : bool, optional
        Measure weighted noise, error spectrum, signal-correlated error, the
        quietest passage and true peak (:mod:`requant.dsp.analysis`).
        Default: when a report is written.
    progress : callable(frames_done, frames_total), optional
        Called as blocks are done. If it has a ``stage(label)`` method, that
        is called when the work changes (``'measuring the true peak for the
        ceiling'``, ``'requantizing'``, ``'measuring and writing the report'``).

    Returns
    -------
    Report
        The report (:mod:`requant.report.model`); ``report.to_dict()`` is the
        JSON form (docs/theory.md, "The report").

    Raises
    ------
    UsageError, InputError, OutputError
        With a one-sentence message saying what to do.
    """
    import soundfile as sf  # noqa: F401  (fail here, not half-way, if it is missing)

    recipe = Recipe() if recipe is None else recipe
    if not isinstance(recipe, Recipe):
        raise TypeError(f"recipe must be a requant.Recipe, not {type(recipe).__name__}")
    outputs = Outputs() if outputs is None else outputs
    check_block_frames(block_frames)
    targets = _targets(src, dst, recipe, outputs)
    if recipe.seed is None:
        recipe = recipe.with_seed(new_seed())
    if analyze is None:
        analyze = bool(targets.reports)
    with open_input(targets.src) as f:
        source = _open_source(f, targets.src)
        prep, prepared, work = _preparation(f, source, recipe, block_frames, progress)
        rq, coeffs, passthrough = _requantizer(f, work, recipe, targets, block_frames,
                                               prepared=prep is not None)
        out_fmt, e_fmt = _containers(work, targets, rq)
        tags, finalize = (_metadata_carrier(targets.src, targets.dst, recipe, targets.fmt)
                          if outputs.metadata else (None, None))
        outs = AtomicOutputs()
        try:
            tmp_out, files = _open_files(outs, work, targets, out_fmt, e_fmt, tags)
            analysis = (_analyzer(rq, work, rq.dither, rq.coeffs, block_frames)
                        if analyze else None)
            _stage(progress, "requantizing")
            done = _stream(f, rq, files, source=work, targets=targets, analysis=analysis,
                           block_frames=block_frames, progress=progress, prep=prep,
                           read=source)
            if analysis is not None or targets.reports:
                _stage(progress, "measuring and writing the report")
                if progress is not None:
                    progress(done, work.frames)
            conv = Conversion(recipe=recipe, coeffs=coeffs, source=source, targets=targets,
                              frames=done, out_format=out_fmt, error_format=e_fmt,
                              passthrough=passthrough, block_frames=block_frames,
                              error_gain=_gain_record(targets, files), prepared=prepared,
                              frames_in=None if prep is None else f.frames)
            report = _finish(rq, conv, analysis, outs, tmp_out=tmp_out, finalize=finalize)
        except BaseException:
            outs.discard()
            raise
    return report


def _stage(progress, label):
    """Tell a progress display that supports it (``progress.stage``) what is happening."""
    stage = getattr(progress, "stage", None)
    if stage is not None:
        stage(label)


def _preparation(f, source, recipe, block_frames, progress=None):
    """The stages before the quantizer for this file: ``(preparer, facts, work)``.

    ``work`` is what the requantizer sees (the delivered rate and channels,
    float64); without a stage that applies, ``(None, None, source)``. With a
    true-peak ceiling the file is read once first to measure it
    (:func:`requant.dsp.prepare.measure_true_peak`).
    """
    from requant.dsp.prepare import Preparer, ceiling_gain_db, measure_true_peak

    prep = Preparer.for_file(recipe, source.channels, source.rate)
    if prep is None:
        return None, None, source
    tp = None
    if recipe.peak_ceiling_dbtp is not None:
        f.seek(0)
        _stage(progress, "measuring the true peak for the ceiling")

        def blocks():
            for start, x in BlockReader(f, block_frames, source.dtype):
                if progress is not None:
                    progress(start + x.shape[0], source.frames)
                yield x

        tp = measure_true_peak(blocks(), recipe, source.channels, source.rate)
        gain = ceiling_gain_db(recipe.gain_db, tp, recipe.peak_ceiling_dbtp)
        prep = Preparer(recipe, source.channels, source.rate, gain_db=gain)
    work = _Source(rate=prep.rate_out, channels=prep.channels_out,
                   frames=prep.frames_out(source.frames), subtype=source.subtype,
                   format=source.format, dtype="float64",
                   declared_frames=prep.frames_out(source.declared_frames))
    return prep, prep.facts(recipe, true_peak_before_dbtp=tp), work


def _gain_record(targets, files):
    """The report's record of the error file's gain."""
    if targets.error_gain is None:
        return ErrorGain()
    raised = next(f for f in files if isinstance(f, _RaisedError))
    return ErrorGain(gain_db=targets.error_gain[0], rule=targets.error_gain[1],
                     cap_dbfs=CAP_DBFS, limited_samples=raised.limited)


def _finish(rq, conv, analysis, outs, *, tmp_out, finalize):
    """Finish the analysis, carry metadata, build the report, write it and commit every output.

    ``conv`` is what the conversion did (:class:`requant.report.build.Conversion`);
    the report is built here, once, from it, the running sums, the analysis'
    figures and the metadata record.
    """
    analyzer = res = None
    if analysis is not None:
        analyzer = analysis[0]
        t = rq.totals()
        analyzer.use_sums(sum_x=t["sum_x"], sum_e=t["sum_e"] / rq.scale,
                          sum_xe=t["sum_xe"] / rq.scale, sum_x2=t["sum_x2"],
                          sum_e2=t["sum_e2"] / rq.scale**2)
        res = analyzer.finish()
    meta = None
    if finalize is not None:
        meta = finalize(tmp_out, conv.out_format, dither_applied=rq.dither,
                        rate_changed=conv.rate != conv.source.rate)
    report = build_report(rq, conv, analysis=res, metadata=meta)
    targets = conv.targets
    if targets.reports:
        from requant.report.write import write_report

        for path in targets.reports:
            write_report(report, analyzer, path, outs)
    try:
        outs.commit()
    except OSError as exc:
        raise wrap_write_error(exc, targets.dst) from None
    return report
