"""What every executor shares: the protocols, the worker's state, and the one chunk runner.

An executor runs :func:`requant.library.task.convert_task` on plain-dict items and
yields ``(item, result)`` pairs as they finish (:class:`Executor`). Items travel in
chunks (:func:`chunk_items`), and every executor runs a chunk with
:func:`run_chunk`, so that a chunk's outputs reach the disk together before any of
its results is recorded. Progress goes to a :class:`Reporter`; the library never
prints.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Iterator
from typing import Any, Protocol, runtime_checkable

from requant.audio_io.atomic import CommitGroup, commit_pairs
from requant.audio_io.writers import wrap_write_error

__all__ = ["Executor", "Reporter", "BatchReporter", "WorkerLost", "Terminated", "WORKER",
           "run_chunk", "commit_chunk", "chunk_items", "warm_kernel"]

#: A worker's task state, shared by :func:`~requant.library.task.convert_task` and the
#: worker's signal handlers: ``worker`` (this is a worker process), ``in_task`` (a
#: conversion runs now), ``interrupted``/``terminating`` (SIGINT/SIGTERM arrived during
#: it), ``stop`` (start no further file of this chunk).
WORKER = {"worker": False, "in_task": False, "interrupted": False, "terminating": False,
          "stop": False}


class Terminated(BaseException):
    """Raised in a worker by SIGTERM (also sent when the batch process dies)."""


class WorkerLost(Exception):
    """A worker process died while running a task (crash, out of memory, killed)."""


@runtime_checkable
class Executor(Protocol):
    """Where a batch's files are converted.

    ``imap_unordered(fn, items, tick)`` yields ``(item, result)`` as tasks
    finish, in any order; ``result`` is ``fn(item)`` (a plain dict) or an
    exception instance (e.g. :class:`WorkerLost`). ``tick()``, when given, is
    called now and then while waiting. ``drain()`` runs after Ctrl-C: cancel
    what has not started, stop what runs, yield what comes back. ``start()``
    is idempotent; ``forks`` is True when starting forks this process, so the
    reporter must not run threads of its own.
    """

    workers: int
    description: str
    forks: bool

    def start(self) -> None: ...

    def imap_unordered(self, fn: Callable[[dict], dict], items: Iterable[dict],
                       tick: Callable[[], None] | None = None) -> Iterator[tuple[dict, Any]]: ...

    def drain(self) -> Iterator[tuple[dict, Any]]: ...

    def close(self) -> None: ...


@runtime_checkable
class Reporter(Protocol):
    """Receives a batch's progress (see :class:`BatchReporter` for each call)."""

    def started(self, info: dict) -> None: ...

    def tick(self) -> None: ...

    def message(self, kind: str, text: str) -> None: ...

    def file_done(self, event: dict, progress: dict) -> None: ...

    def finished(self, summary: dict) -> None: ...


def warm_kernel():
    """Load what every file needs: the modules of a conversion and the compiled kernel
    most batches use (float32 in, 16-bit codes, unshaped); cheap once loaded. Forked
    workers inherit it all."""
    import numpy as np
    import soundfile  # noqa: F401

    from requant import convert  # noqa: F401
    from requant.audio_io import (
        riff,  # noqa: F401
        wavwrite,  # noqa: F401
    )
    from requant.dsp.quantizer import Requantizer

    Requantizer(1, bits=16, dither="tpdf", seed=0).process(np.zeros((16, 1), np.float32))


def run_chunk(fn, items, *, flush=True, stamp=None, whole_fs=False):
    """Run ``fn`` on each item of a chunk; stop after an interrupt (SIGINT).

    Parameters
    ----------
    fn : callable(dict) -> dict
        The task, :func:`~requant.library.task.convert_task`.
    items : list of dict
    flush : bool, default True
        The chunk's outputs wait as temporary files
        (:class:`~requant.audio_io.atomic.CommitGroup`). With ``flush`` they are
        flushed to disk together and renamed into place here (:func:`commit_chunk`)
        before the results go back. Without it, this returns ``(results, pairs)``
        and the caller commits the (temporary, final) pairs: the local pool does
        that in its parent, so the workers never wait for the disk. Either way the
        manifest never names an output that is not on disk.
    stamp : dict, optional
        Fields set on every result (a cluster worker's address).
    whole_fs : bool, default False
        Flush with one ``syncfs`` (see :func:`commit_chunk`).

    Returns
    -------
    list of dict, or (list of dict, list of (str, str)) without ``flush``
    """
    out = []
    with CommitGroup() as group:
        for item in items:
            if WORKER["stop"]:
                break
            res = fn(item)
            if stamp and isinstance(res, dict):
                res.update(stamp)
            out.append(res)
            if isinstance(res, dict) and res.get("status") == "interrupted":
                break
        pairs = group.detach()
    if not flush:
        return out, pairs
    return commit_chunk(items, out, pairs, whole_fs=whole_fs)


def commit_chunk(items, results, pairs, *, whole_fs=False):
    """Flush a chunk's outputs to disk, then rename them into place; returns ``results``.

    If that fails, the files it held are reported failed (and nothing
    partial stays: :func:`~requant.audio_io.atomic.commit_pairs`). With
    ``whole_fs`` (this machine's executors) the chunk is flushed with one
    ``syncfs`` of its file system rather than one ``fsync`` per file, which
    on ext4 is one journal commit instead of sixteen.
    """
    waiting = {os.path.abspath(final) for _, final in pairs}
    try:
        commit_pairs(pairs, whole_fs=whole_fs)
    except OSError as exc:
        for item, res in zip(items, results):
            path = item.get("output_path") if isinstance(item, dict) else None
            if path and isinstance(res, dict) and os.path.abspath(path) in waiting:
                res.update(status="failed", error=str(wrap_write_error(exc, path)),
                           output_sha256=None)
    return results


def chunk_items(items, *, per, chunk_bytes, taper=None):
    """Yield lists of up to ``per`` items, or fewer once their ``size`` reaches ``chunk_bytes``.

    Executors send small files in chunks, so the per-task cost of a process
    pool or a cluster is paid once per chunk; a big file travels alone.
    With ``taper`` (a number of chunks, e.g. 4 per worker), a chunk holds at
    most ``ceil(remaining / taper)`` items, so the chunks shrink towards the
    end of the list and the workers finish together (guided scheduling).
    ``items`` may be any iterable; with ``taper`` it must have a length (a
    list, or the batch's :class:`~requant.library.spool.TaskSpool`, which
    reads its tasks from disk as they are chunked), else it is made a list.
    """
    if taper and not hasattr(items, "__len__"):
        items = list(items)
    left = len(items) if taper else 0
    chunk, size, cap = [], 0, per
    for it in items:
        if not chunk and taper:
            cap = max(1, min(per, -(-left // taper)))
        chunk.append(it)
        size += it.get("size", 0) if isinstance(it, dict) else 0
        if len(chunk) >= cap or size >= chunk_bytes:
            left -= len(chunk)
            yield chunk
            chunk, size = [], 0
    if chunk:
        yield chunk


class BatchReporter:
    """Receives a batch's progress; does nothing. The CLI subclasses it.

    :func:`run_batch` never prints: everything the user sees goes through
    these methods.
    """

    def started(self, info):
        """The run begins. ``info``: files, audio_files, bytes, jobs, executor, run_seed,
        seed_origin, settings_id, src, dst, and ``threads_ok``: False when the
        executor forks worker processes, so the reporter must not start threads
        (refresh in :meth:`file_done` and :meth:`tick` instead)."""

    def tick(self):
        """Called about twice a second while waiting for workers (refresh a display)."""

    def message(self, kind, text):
        """A note ('note') or warning ('warning') not tied to one file."""

    def file_done(self, event, progress):
        """One file event recorded. ``progress``: files_done, files_total, bytes_done,
        bytes_total, audio_s_done."""

    def finished(self, summary):
        """The run ended (also after an interrupt); ``summary`` as written to disk."""


