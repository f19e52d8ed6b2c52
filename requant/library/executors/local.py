"""Executors on this machine: in this process, or in local worker processes."""

import contextlib
import os
import signal
import sys
import threading
import time

from requant.errors import RequantError
from requant.library.executors.base import (
    WORKER,
    Terminated,
    WorkerLost,
    chunk_items,
    commit_chunk,
    run_chunk,
    warm_kernel,
)

__all__ = ["SerialExecutor", "ProcessExecutor", "default_jobs"]


def _ping():
    return os.getpid()


@contextlib.contextmanager
def _sigint_deferred():
    """Hold back Ctrl-C (SIGINT) in this process while a chunk is handed over or committed.

    Between a worker's result arriving and its outputs being renamed (or removed),
    and between submitting a chunk and recording it as in flight, an interrupt would
    leave temporary files nobody owns. Inside this block SIGINT is noted and
    raised as KeyboardInterrupt at its end. Only the main thread can swap handlers;
    elsewhere the block does nothing.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    caught = []
    previous = signal.signal(signal.SIGINT, lambda signum, frame: caught.append(signum))
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
    if caught and previous is signal.default_int_handler:
        raise KeyboardInterrupt
    if caught and callable(previous):
        previous(signal.SIGINT, None)


def _run_chunk_deferred(fn, items):
    """A pool worker's chunk: outputs left temporary for the parent to commit."""
    return run_chunk(fn, items, flush=False)


def default_jobs():
    """Worker processes by default: every core this process may run on."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


class SerialExecutor:
    """Run tasks one by one in this process (``--jobs 1``).

    The executor protocol (what :func:`run_batch` calls): :meth:`start`,
    :meth:`imap_unordered` yielding ``(item, result)`` where the result is
    the task's dict or an exception instance, :meth:`drain` after an
    interrupt, :meth:`close`; attributes ``workers`` and ``description``.
    """

    workers = 1
    description = "this process"
    forks = False
    max_chunk = 16
    chunk_bytes = 64 * 2**20

    def start(self):
        """Nothing to start."""

    def imap_unordered(self, fn, items, tick=None):
        """Yield (item, fn(item)) in order, in chunks whose outputs reach the disk together
        (as a worker's chunk does, see :func:`run_chunk`)."""
        for chunk in chunk_items(items, per=self.max_chunk, chunk_bytes=self.chunk_bytes):
            yield from zip(chunk, run_chunk(fn, chunk, whole_fs=True))

    def drain(self):
        """Nothing runs after an interrupt here."""
        return iter(())

    def close(self):
        """Nothing to stop."""


def _set_parent_death_signal():
    """Ask Linux to send SIGTERM when the parent dies (prctl PR_SET_PDEATHSIG)."""
    if not sys.platform.startswith("linux"):
        return
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, int(signal.SIGTERM), 0, 0, 0)  # 1 = PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass


def _on_sigint(signum, frame):
    WORKER["stop"] = True  # start no further file of this chunk
    if WORKER["in_task"] and not WORKER["interrupted"]:
        WORKER["interrupted"] = True
        raise KeyboardInterrupt


def _on_sigterm(signum, frame):
    if WORKER["in_task"] and not WORKER["terminating"]:
        WORKER["terminating"] = True
        raise Terminated
    if not WORKER["in_task"]:
        os._exit(143)


def _worker_init():
    """Worker set-up: signal handling, die with the parent, warm the kernel."""
    WORKER["worker"] = True
    signal.signal(signal.SIGINT, _on_sigint)
    signal.signal(signal.SIGTERM, _on_sigterm)
    _set_parent_death_signal()
    if os.getppid() == 1:  # the parent is already gone
        os._exit(143)
    warm_kernel()


class ProcessExecutor:
    """Run tasks in local worker processes, started once and reused.

    Parameters
    ----------
    workers : int
        Number of processes.
    start_method : {'fork', 'forkserver', 'spawn'}, optional
        Default 'fork' on Linux (fastest; the workers inherit the loaded
        modules), 'spawn' elsewhere. A forked child inherits locks held by
        other threads, so :meth:`start` must run before this process starts
        any thread: :func:`run_batch` starts the executor before the
        reporter, and asks the reporter not to run a refresh thread (see
        ``BatchReporter.started``). After a worker crash the broken pool is
        shut down (its manager thread joined) before a new one is forked.
        'forkserver' and 'spawn' import the caller's main script in each
        worker, which must then be guarded by ``if __name__ == "__main__"``.
    window : int, optional
        Chunks in flight at once (default 3 per worker): enough to keep the
        workers busy, few enough that an interrupt has little to cancel.
    max_chunk : int, default 16
        Most files per chunk. Small files travel in chunks (fewer round trips
        between processes); a chunk holds at most ``chunk_bytes`` of source
        and about 1/8 of a worker's share of the files, so the load stays
        balanced; files bigger than that travel alone.
    chunk_bytes : int, bytes, default 8 MiB
    drain_timeout_s : float, s, default 20
        After an interrupt, how long to wait for running tasks to stop
        before the workers are terminated.

    Notes
    -----
    Workers ignore SIGINT between tasks; during a task it stops the
    conversion (temporary files removed). SIGTERM, which Linux also sends
    when this process dies (``PR_SET_PDEATHSIG``), makes a worker clean up
    and exit, so a ``kill -9`` of the batch leaves no worker behind. If a
    worker dies, the tasks in flight are run again one at a time in a fresh
    pool; a task that kills its worker alone is reported as
    :class:`WorkerLost`.
    """

    forks = True

    def __init__(self, workers, *, start_method=None, window=None, max_chunk=16,
                 chunk_bytes=8 << 20, drain_timeout_s=20.0, start_timeout_s=120.0):
        self.workers = int(workers)
        if start_method is None:
            start_method = "fork" if sys.platform.startswith("linux") else "spawn"
        self.start_method = start_method
        self.forks = start_method == "fork"
        self.start_timeout_s = start_timeout_s
        self.window = window or max(2, 3 * self.workers)
        self.max_chunk = max_chunk
        self.chunk_bytes = chunk_bytes
        self.drain_timeout_s = drain_timeout_s
        self.description = f"{self.workers} local worker processes"
        self._pool = None
        self._inflight = {}

    def start(self):
        """Create the pool and start the workers (before any thread of ours); idempotent."""
        if self._pool is not None:
            return
        import multiprocessing as mp
        from concurrent.futures import ProcessPoolExecutor, wait

        ctx = mp.get_context(self.start_method)
        if self.start_method == "fork":
            warm_kernel()  # once, here: every forked worker inherits the loaded kernel
        if self.start_method == "forkserver":
            ctx.set_forkserver_preload(["requant.library", "requant.convert",
                                        "requant.audio_io.riff"])
        self._pool = ProcessPoolExecutor(self.workers, mp_context=ctx, initializer=_worker_init)
        pings = [self._pool.submit(_ping) for _ in range(self.workers)]
        wait(pings, timeout=self.start_timeout_s)
        for p in pings:
            exc = p.exception(timeout=0) if p.done() else TimeoutError("no answer")
            if exc is not None:
                self._pool.shutdown(wait=False, cancel_futures=True)
                self._pool = None
                raise RequantError(f"the worker processes could not start ({exc}); run with "
                                   "--jobs 1 to convert in this process")

    def _restart(self):
        try:
            self._pool.shutdown(wait=True, cancel_futures=True)  # joins its manager thread
        except Exception:
            pass
        self._pool = None
        self.start()

    def _chunks(self, items):
        """Group items into chunks: small files travel together, big ones alone (``items``
        is read as it is chunked when it has a length, see :func:`chunk_items`)."""
        if not hasattr(items, "__len__"):
            items = list(items)
        per = max(1, min(self.max_chunk, len(items) // (self.workers * 8)))
        return chunk_items(items, per=per, chunk_bytes=self.chunk_bytes,
                           taper=self.workers * 4)

    @staticmethod
    def _pairs(chunk, fut):
        """(item, result) pairs of a finished chunk, its outputs committed here (the workers
        leave them temporary: :func:`run_chunk` with ``flush=False``); items never started
        are left out."""
        exc = fut.exception()
        if exc is not None:
            return [(item, exc) for item in chunk]
        results, pending = fut.result()
        # take the pairs out of the stored result first, so a chunk processed again (after
        # an interrupt during its commit) is not committed twice
        pairs, pending[:] = list(pending), []
        return list(zip(chunk, commit_chunk(chunk, results, pairs, whole_fs=True)))

    def _finished(self, fut):
        """A finished future's pairs, its outputs committed, with Ctrl-C held back meanwhile
        (an interrupt half-way would leave the chunk's temporary files behind)."""
        with _sigint_deferred():
            pairs = self._pairs(self._inflight[fut], fut)
            del self._inflight[fut]
        return pairs

    def _submit(self, fn, chunk):
        """Send a chunk to the pool and record it as in flight, with Ctrl-C held back
        (a chunk sent but not recorded would run unseen and leave its temporary files)."""
        from concurrent.futures.process import BrokenProcessPool

        with _sigint_deferred():
            try:
                fut = self._pool.submit(_run_chunk_deferred, fn, chunk)
            except BrokenProcessPool:
                self._restart()
                fut = self._pool.submit(_run_chunk_deferred, fn, chunk)
            self._inflight[fut] = chunk

    def _collect_broken(self):
        """After a worker death: results of finished chunks, and the items to retry."""
        from concurrent.futures import wait
        from concurrent.futures.process import BrokenProcessPool

        wait(list(self._inflight))
        done, retry = [], []
        for fut, chunk in list(self._inflight.items()):
            if isinstance(fut.exception(), BrokenProcessPool):
                retry.extend(chunk)
            else:
                done.extend(self._pairs(chunk, fut))
        self._inflight = {}
        return done, retry

    def _isolate(self, fn, items):
        """Run items one at a time in a fresh pool; one that kills its worker is WorkerLost."""
        from concurrent.futures.process import BrokenProcessPool

        self._restart()
        for item in items:
            fut = self._pool.submit(_run_chunk_deferred, fn, [item])
            self._inflight = {fut: [item]}
            try:
                fut.result()
                pairs = self._pairs([item], fut)
            except BrokenProcessPool:
                pairs = [(item, WorkerLost(
                    "the worker process died while converting this file (it crashed or was "
                    "killed, e.g. for lack of memory); check the file, or convert it alone with "
                    "requant convert"))]
                self._restart()
            except Exception as exc:
                pairs = [(item, exc)]
            self._inflight = {}
            yield from pairs

    def imap_unordered(self, fn, items, tick=None):
        """Yield (item, result) as tasks finish; at most ``window`` chunks in flight.

        ``tick`` (optional) is called about twice a second while waiting.
        """
        from concurrent.futures import FIRST_COMPLETED, wait
        from concurrent.futures.process import BrokenProcessPool

        chunks = self._chunks(items)
        more = True
        while True:
            while more and len(self._inflight) < self.window:
                chunk = next(chunks, None)
                if chunk is None:
                    more = False
                    break
                self._submit(fn, chunk)
            if not self._inflight:
                return
            done, _ = wait(list(self._inflight), timeout=0.5, return_when=FIRST_COMPLETED)
            if not done:
                if tick is not None:
                    tick()
                continue
            broken = False
            for fut in done:
                if isinstance(fut.exception(), BrokenProcessPool):
                    broken = True
                    continue
                yield from self._finished(fut)
            if broken:
                finished, retry = self._collect_broken()
                yield from finished
                yield from self._isolate(fn, retry)

    def _signal_workers(self, sig):
        procs = getattr(self._pool, "_processes", None) or {}
        for pid in list(procs):
            try:
                os.kill(pid, sig)
            except OSError:
                pass

    def drain(self):
        """After an interrupt: cancel queued tasks, stop running ones, yield what comes back."""
        from concurrent.futures import FIRST_COMPLETED, wait

        for fut in list(self._inflight):
            if fut.cancel():
                del self._inflight[fut]
        self._signal_workers(signal.SIGINT)
        deadline = time.monotonic() + self.drain_timeout_s
        while self._inflight:
            left = deadline - time.monotonic()
            if left <= 0:
                self._signal_workers(signal.SIGTERM)
                wait(list(self._inflight), timeout=5.0)
                for fut, chunk in list(self._inflight.items()):
                    if fut.done():
                        yield from self._pairs(chunk, fut)
                self._inflight = {}
                break
            done, _ = wait(list(self._inflight), timeout=left, return_when=FIRST_COMPLETED)
            for fut in done:
                yield from self._finished(fut)

    def close(self):
        """Stop the workers (waits for them)."""
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None


