"""One file of a batch: :func:`convert_task`, plain dict in, plain dict (an event) out.

It never raises for a bad file: it returns ``status: failed`` with the one-line
message the user sees, so any executor can run it, in this process, in a worker
process or on a cluster.
"""

import datetime as _dt
import os
import socket
import stat
import threading
import time

from requant.audio_io.atomic import pending_path
from requant.audio_io.formats import LOSSY_SUBTYPES
from requant.convert import Outputs, convert_file
from requant.errors import InputError, OutputError, RequantError
from requant.library.executors.base import WORKER, Terminated
from requant.library.manifest import sha256_file
from requant.recipe import Recipe

__all__ = ["convert_task", "source_check", "task_settings", "now_iso",
           "worker_label"]


HOST = socket.gethostname()


def now_iso():
    return _dt.datetime.now(_dt.UTC).isoformat(timespec="milliseconds")


def worker_label():
    return f"{HOST}:{os.getpid()}"


def task_settings(settings):
    """What every task of a batch carries of its settings, as plain data: the recipe
    (its seed replaced by each file's own), the block size and whether to analyze."""
    return {"recipe": settings.recipe.to_dict(), "block_frames": settings.block_frames,
            "analyze": settings.analyze}


def _classify(report, meta):
    """Warning kinds of a converted file, from its report and metadata record.

    Parameters
    ----------
    report : requant.report.model.Report
    meta : requant.report.model.MetadataRecord or None

    Returns
    -------
    list of str
    """
    m, out = report.measured, report.output
    kinds = []
    if m.clipped_samples or m.over_full_scale_samples:
        kinds.append("clipping")
    if report.analysis is not None:  # measured (analyze=True)
        if m.signal_correlated:
            kinds.append("correlated-error")
    elif report.settings.dither_applied == "none" and not out.passthrough and out.bits < 24:
        kinds.append("correlated-error")  # by rule: undithered requantization
    tp = m.output_true_peak_dbtp
    if tp is not None and tp > 0.0:
        kinds.append("true-peak")
    if m.shaping_overloads:
        kinds.append("shaping-overload")
    if m.error_peak_dbfs is not None and m.error_peak_dbfs > -20.0:
        kinds.append("loud-error")
    if meta is not None and meta.dropped:
        kinds.append("metadata-dropped")
    if meta is not None and meta.error:
        kinds.append("metadata-error")
    if report.input.truncated:
        kinds.append("truncated")
    if report.input.subtype in LOSSY_SUBTYPES:
        kinds.append("lossy-source")
    return kinds


def _figures(report):
    """The event's ``figures``: plain data from the report (None where not measured)."""
    m, p, i, o, s = (report.measured, report.predicted, report.input, report.output,
                     report.settings)
    return {
        "sample_rate": i.sample_rate, "channels": i.channels, "frames": i.frames,
        "input_format": i.format, "input_subtype": i.subtype,
        "output_format": o.format, "output_subtype": o.subtype, "bits": o.bits,
        "passthrough": o.passthrough, "dither_applied": s.dither_applied,
        "shaping": s.shaping,
        "snr_predicted_db": p.snr_db,
        "error_power_lsb2": m.error_power_lsb2,
        "error_power_predicted_lsb2": p.error_power_lsb2,
        "error_peak_dbfs": m.error_peak_dbfs,
        "signal_rms_dbfs": m.signal_rms_dbfs,
        "clipped_samples": m.clipped_samples,
        "over_full_scale_samples": m.over_full_scale_samples,
        "shaping_overloads": m.shaping_overloads,
        "correlated_error_fraction": m.correlated_error_fraction,
        "a_weighted_noise_dbfs": m.a_weighted_noise_dbfs,
        "a_weighted_noise_predicted_dbfs": p.a_weighted_noise_dbfs,
        "output_true_peak_dbtp": m.output_true_peak_dbtp,
    }


#: Sources at least this big are hashed on a thread of their own while they convert
#: (hashlib releases the GIL); smaller ones after, from the page cache.
_HASH_ON_THREAD_BYTES = 4 << 20


def _stat_identity(path):
    st = os.stat(path)
    return {"size": st.st_size, "mtime_ns": st.st_mtime_ns}


def source_check(task):
    """Whether a previously converted source changed: a reason, or None when it did not.

    Compares the source's size and modification time with the recorded ones;
    when those differ (a copy may keep the content and change the time), or
    when the plan asks to verify every source, compares the SHA-256 of its
    bytes. Sets ``task["source_identity"]`` to what was found.
    """
    expected = task.get("expect_source")
    if not expected:
        return None
    try:
        now = _stat_identity(task["source_path"])
    except OSError:
        return None  # the conversion says what is wrong with it
    same_stat = (now["size"], now["mtime_ns"]) == (expected.get("size"),
                                                    expected.get("mtime_ns"))
    if same_stat and not expected.get("check"):
        task["source_identity"] = dict(now, sha256=expected.get("sha256"))
        return None
    digest = sha256_file(task["source_path"])
    task["source_identity"] = dict(now, sha256=digest)
    if digest == expected.get("sha256"):
        return None  # touched or copied, same bytes
    return "source changed since it was converted"


def _converted_with_identity(src, convert):
    """Run ``convert()`` and measure the source's identity around it: size and time before
    and after (a source that changes meanwhile fails the file), SHA-256 of its bytes."""
    before = _stat_identity(src)
    hasher = None
    if before["size"] >= _HASH_ON_THREAD_BYTES:
        box = {}
        hasher = threading.Thread(target=lambda: box.setdefault("d", sha256_file(src)),
                                  name="requant-source-hash", daemon=True)
        hasher.start()
    report = convert()
    if hasher is not None:
        hasher.join()
        digest = box.get("d")
    else:
        digest = sha256_file(src)
    if _stat_identity(src) != before or digest is None:
        raise InputError(f"{src!r} changed while it was being converted; the output was not "
                         "kept; run the batch again")
    return report, dict(before, sha256=digest)


def _output_stat(path):
    """[size, mtime_ns] of an output that is a regular file (not a link), else None."""
    try:
        st = os.lstat(path)
    except OSError:
        return None
    return [st.st_size, st.st_mtime_ns] if stat.S_ISREG(st.st_mode) else None


def _still_up_to_date(task):
    """The skipped event when the output is still the recorded one, else None.

    The output counts as unchanged when its size and time are the recorded ones
    (``expect_output_stat``) and the plan did not ask to verify; otherwise its
    SHA-256 is compared with ``expect_sha256``.
    """
    out = task["output_path"]
    now = _output_stat(out)
    if now is None:
        return None
    expect = task["expect_sha256"]
    verify = bool((task.get("expect_source") or {}).get("check"))
    if now == task.get("expect_output_stat") and not verify:
        digest = expect
    else:
        digest = sha256_file(out)
    if digest != expect:
        return None
    return {"status": "skipped", "reason": "up to date", "output_sha256": digest,
            "source_identity": task.get("source_identity"), "output_stat": now}


_RECIPE = {}  # the last settings dict seen and its recipe: a batch sends the same one


def _recipe(settings):
    cached = _RECIPE.get("for")
    if cached is not settings:
        _RECIPE["recipe"] = Recipe.from_dict(settings["recipe"])
        _RECIPE["for"] = settings  # held, so its id cannot be reused meanwhile
    return _RECIPE["recipe"]


def _convert_one(task):
    src, out = task["source_path"], task["output_path"]
    expect = task.get("expect_sha256")
    reason = task.get("reason")
    changed = source_check(task) if expect else None
    if changed:
        expect, reason = None, changed
    if expect:
        skipped = _still_up_to_date(task)
        if skipped is not None:
            return skipped
        if os.path.lexists(out):
            reason = "output changed since it was written"
    folder = os.path.dirname(out)
    try:
        if not os.path.isdir(folder):
            os.makedirs(folder, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the folder {folder!r} ({exc.strerror or exc}); check "
                          "that the destination is writable") from None
    if not task["overwrite"] and os.path.lexists(out):
        raise OutputError(f"{out!r} already exists and was not written by requant batch; "
                          "move it away or pass --overwrite to replace it")
    s = task["settings"]
    recipe = _recipe(s).with_seed(task["seed"])
    report, identity = _converted_with_identity(src, lambda: convert_file(
        src, out, recipe, outputs=Outputs(overwrite=task["overwrite"], metadata=True),
        block_frames=s["block_frames"], analyze=s["analyze"]))
    meta = report.output.metadata
    warnings = list(report.warnings)
    kinds = _classify(report, meta)
    if "correlated-error" in kinds and report.analysis is None:
        warnings.append("Without dither the error follows the signal (signal-correlated error); "
                        "add dither, or measure it with --analyze.")
    notes = list(report.notes)
    if task.get("note"):
        notes.append(task["note"])
    written = pending_path(out)  # a CommitGroup may hold it; the rename keeps size and time
    return {
        "status": "converted",
        "reason": reason,
        "output_sha256": sha256_file(written),
        "source_identity": identity,
        "output_stat": _output_stat(written),
        "snr_db": report.measured.snr_db,
        "duration_s": report.input.duration_s,
        "warnings": warnings,
        "warning_kinds": kinds,
        "notes": notes,
        "metadata": {} if meta is None else meta.to_dict(),
        "figures": _figures(report),
    }


def convert_task(task):
    """Convert one file of a batch; never raises for a bad file.

    Parameters
    ----------
    task : dict
        Plain data: ``source``/``output`` (relative, POSIX), ``source_path``
        and ``output_path`` (absolute str), ``seed`` (int), ``settings``
        (dict), ``overwrite`` (bool), ``expect_sha256`` (str or None: skip
        when the output still has this hash), ``expect_source`` (the
        recorded ``size``, ``mtime_ns`` and ``sha256`` of the source, and
        ``check``: hash it even if size and time match), ``expect_output_stat``
        ([size, mtime_ns] recorded for the output: when it still has them the
        output is not hashed, unless ``check``), ``reason`` and ``note``
        (str or None). Other keys (the batch's ``n`` and ``prev``) are
        carried along untouched.

    Returns
    -------
    dict
        An event: ``source``, ``output``, ``status`` (``converted``,
        ``skipped``, ``failed``, or ``interrupted`` when a worker was asked
        to stop), ``error`` (the one-line message), ``seed``, ``seconds``,
        ``worker`` (host:pid); when converted or skipped ``output_sha256``,
        ``output_stat`` ([size, mtime_ns]) and ``source_identity``; when
        converted also ``snr_db``, ``duration_s``, ``warnings``,
        ``warning_kinds``, ``notes``, ``metadata`` and ``figures``.

    Notes
    -----
    In a worker process (set up by :class:`ProcessExecutor`), SIGINT stops
    the conversion in progress (its temporary files are removed) and the
    event says ``interrupted``; in the calling process KeyboardInterrupt
    propagates as usual.
    """
    t0 = time.perf_counter()
    base = {"source": task["source"], "output": task["output"], "seed": task["seed"]}
    st = WORKER
    st["in_task"], st["interrupted"] = True, False
    try:
        try:
            event = _convert_one(task)
        finally:
            st["in_task"] = False
    except KeyboardInterrupt:
        if not st["worker"]:
            raise
        event = {"status": "interrupted", "error": "interrupted before it finished"}
    except Terminated:
        os._exit(143)  # convert_file has removed its temporary files on the way out
    except RequantError as exc:
        event = {"status": "failed", "error": str(exc)}
    except MemoryError:
        event = {"status": "failed", "error": f"{task['source_path']!r} ran out of memory; "
                                              "use fewer --jobs"}
    except Exception as exc:  # a bug or an unforeseen library error: isolate it
        event = {"status": "failed",
                 "error": f"{task['source_path']!r} failed with an unexpected "
                          f"{type(exc).__name__} ({exc}); the batch went on; please report "
                          "this with the file"}
    base.update(event)
    base["seconds"] = time.perf_counter() - t0
    base["worker"] = worker_label()
    return base
