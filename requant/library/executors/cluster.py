"""Run a library batch on an existing Dask distributed cluster.

``DaskExecutor(address)`` has the executor protocol of
:class:`requant.library.executors.base.Executor` protocol (``workers``, ``description``,
``forks``; ``start``, ``imap_unordered``, ``drain``, ``close``), so
:func:`requant.library.run.run_batch` runs a batch on it exactly as on local
processes: the plan, the claims, per-file seeds, resume and the summary are
the batch's own; only where :func:`requant.library.task.convert_task` runs changes.

How it works:

* **Connect.** :meth:`DaskExecutor.start` first opens a plain TCP
  connection to the scheduler's host and port (a refused or silent address
  fails at once, with the reason), then a ``distributed.Client`` with the
  same bounded timeout. It waits (bounded) for at least one worker, then
  runs :func:`_worker_hello` on every worker: it loads the compiled kernel
  and returns the worker's requant, numpy, numba and libsndfile versions,
  which must equal this machine's (the outputs are bit-identical wherever a
  file is converted only with the same code).
* **Shared paths.** Tasks carry absolute paths. Before the first task, a
  hidden check file with a random token is written into DST, and every
  worker must see SRC as a folder and read the token from DST at the same
  paths; otherwise the batch stops with one line naming the worker. A
  worker that joins later is checked once, before its first file. The check
  file's name ends in ``.requant-part``, so a killed run's leftover is
  removed by the next run like any stale temporary.
* **Tasks.** Files travel in chunks (see :meth:`DaskExecutor._chunks`); each
  chunk is one dask task running :func:`_run_chunk_on_worker`: the shared
  chunk runner (:func:`~requant.library.executors.base.run_chunk`), so the
  chunk's outputs are flushed and renamed together on the worker before its
  results return, each event's ``worker`` stamped with the dask worker's
  address. At most ``window_per_thread`` chunks per worker thread
  are in flight, so an interrupt has little to cancel. Results return to
  this process, which alone writes the manifest.
* **Lost workers.** When a worker dies, the scheduler runs its chunks again
  elsewhere (up to its ``allowed-failures`` setting, 3 by default). Files
  done by the dead worker are converted again, to the same bytes: every
  task may replace its own output, which the batch claimed before any work
  started. A chunk that ends in ``KilledWorker`` may hold innocent files
  (dask blames every task assigned to a dying worker), so its files are run
  again one at a time, with nothing else of the batch in flight; a file
  that still kills its workers alone is reported as
  :class:`requant.library.executors.base.WorkerLost`, so only that file is recorded failed.

Security: the dask protocol carries pickled Python objects without
authentication. Run the scheduler and workers only on a trusted network, or
configure TLS (``tls://`` addresses with dask's ``distributed.comm.tls``
settings).

This module imports ``distributed`` only inside functions, so importing it
is cheap and works without the ``cluster`` extra (the error then says what
to install).
"""

import itertools
import os
import queue
import re
import secrets
import socket
import threading
import time

from requant.errors import RequantError, UsageError
from requant.library.executors.base import WorkerLost, chunk_items, run_chunk, warm_kernel

__all__ = ["DaskExecutor", "parse_address", "DEFAULT_PORT", "INSTALL_HINT"]

#: The port ``dask scheduler`` listens on by default.
DEFAULT_PORT = 8786
#: What to install for ``--cluster``.
INSTALL_HINT = "pip install 'requant[cluster]'"

_PROTOCOLS = ("tcp", "tls")
_ADDRESS = re.compile(r"^(?:(?P<proto>[A-Za-z][A-Za-z0-9+.-]*)://)?"
                      r"(?P<host>\[[0-9A-Fa-f:.]+\]|[^\s:/\[\]]+)(?::(?P<port>\d+))?/?$")
#: Name of the shared-path check file in DST (a stale temporary for the next run).
_CHECK_PREFIX = ".requant-cluster-check-"
_CHECK_SUFFIX = ".requant-part"


def parse_address(address):
    """Normalize a scheduler address to ``PROTO://HOST:PORT``.

    Parameters
    ----------
    address : str
        ``tcp://HOST:PORT``, ``tls://HOST:PORT``, or ``HOST:PORT`` (tcp).
        Without a port, dask's default 8786 is used.

    Returns
    -------
    address : str
    host : str
        Without IPv6 brackets.
    port : int, 1..65535

    Raises
    ------
    UsageError
        For anything else.

    Examples
    --------
    >>> parse_address("127.0.0.1:8786")
    ('tcp://127.0.0.1:8786', '127.0.0.1', 8786)
    >>> parse_address("tls://farm-01")
    ('tls://farm-01:8786', 'farm-01', 8786)
    """
    m = _ADDRESS.match(str(address).strip()) if isinstance(address, str) else None
    if m is None:
        raise UsageError(f"--cluster {address!r} is not a scheduler address; give it as "
                         f"tcp://HOST:PORT (dask scheduler listens on port {DEFAULT_PORT} by "
                         "default)")
    proto = (m.group("proto") or "tcp").lower()
    if proto not in _PROTOCOLS:
        raise UsageError(f"--cluster {address!r}: the protocol {proto!r} is not supported; use "
                         "tcp:// or tls://")
    port = int(m.group("port") or DEFAULT_PORT)
    if not 1 <= port <= 65535:
        raise UsageError(f"--cluster {address!r}: the port {port} is not in 1..65535")
    host = m.group("host")
    return f"{proto}://{host}:{port}", host.strip("[]"), port


def _one_line(exc):
    text = " ".join(str(exc).split())
    if len(text) > 200:
        text = text[:197] + "..."
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def _import_distributed():
    try:
        import distributed
    except ImportError as exc:
        raise UsageError(f"--cluster needs dask.distributed, which is not installed here ({exc});"
                         f" install it with: {INSTALL_HINT}") from None
    return distributed


# --------------------------------------------------------------------------- worker side

def _environment():
    """What decides the output bits besides the settings: versions of the code."""
    import numba
    import numpy
    import soundfile

    from requant import __version__

    return {"requant": __version__, "numpy": numpy.__version__, "numba": numba.__version__,
            "libsndfile": soundfile.__libsndfile_version__}


def _worker_hello():
    """Run on each worker at start: load the compiled kernel, return the environment."""

    warm_kernel()
    return _environment()


def _env_problem(expected, got, where):
    diff = [f"{k} {got.get(k)} (here {v})" for k, v in expected.items() if got.get(k) != v]
    if not diff:
        return None
    return (f"the dask worker {where} runs {', '.join(diff)}; install the same requant "
            "environment on every machine, so that each file gets the same bytes wherever it is "
            "converted")


def _check_worker(ctx, where):
    """A worker's problem with this batch, or None: versions, SRC and DST at the same paths."""
    problem = _env_problem(ctx["environment"], _environment(), where)
    if problem or not ctx.get("src"):
        return problem
    if not os.path.isdir(ctx["src"]):
        return (f"the dask worker {where} does not see the source folder {ctx['src']!r}; mount "
                "the shared storage at the same path on every machine")
    try:
        with open(ctx["check_path"], "rb") as fh:
            seen = fh.read(64).decode("ascii", "replace")
    except OSError:
        seen = None
    if seen != ctx["token"]:
        return (f"the dask worker {where} does not see the destination folder {ctx['dst']!r} "
                "(the check file written there is missing); mount the shared storage at the same "
                "path on every machine")
    return None


_CHECKED = {}
_CHECKED_LOCK = threading.Lock()


def _check_worker_hello(ctx, dask_worker=None):
    """``client.run`` form of the check (dask passes the worker as ``dask_worker``)."""
    return _check_worker(ctx, dask_worker.address)


def _run_chunk_on_worker(fn, items, ctx):
    """The dask task: run ``fn`` on each item, stamp ``worker`` with this worker's address.

    The batch's checks (:func:`_check_worker`) run once per worker process
    and batch; a worker that fails them raises :class:`RequantError`, so the
    chunk's files are recorded failed with that message.
    """
    from distributed import get_worker

    w = get_worker()
    key = ctx["token"]
    with _CHECKED_LOCK:
        if key not in _CHECKED:
            if len(_CHECKED) > 64:
                _CHECKED.clear()
            _CHECKED[key] = _check_worker(ctx, w.address)
        problem = _CHECKED[key]
    if problem:
        raise RequantError(problem)
    stamp = {"worker": w.address}
    name = str(w.name) if w.name is not None else None
    if name and name != w.address:
        stamp["worker_name"] = name
    return run_chunk(fn, items, stamp=stamp)


# --------------------------------------------------------------------------- the executor

class _SchedulerLost(Exception):
    """The client lost its scheduler (internal: ends the iteration)."""


def _roots(items):
    """SRC and DST (absolute) from the batch's tasks, or (None, None) for other items."""
    for it in itertools.islice(items, 1):
        try:
            src = _strip_rel(it["source_path"], it["source"])
            dst = _strip_rel(it["output_path"], it["output"])
        except (KeyError, TypeError, ValueError):
            return None, None
        return src, dst
    return None, None


def _strip_rel(full, rel):
    native = os.path.join(*rel.split("/"))
    if not os.path.isabs(full) or not full.endswith(os.sep + native):
        raise ValueError(full)
    return full[: -len(native) - 1] or os.sep


class DaskExecutor:
    """Run a batch's tasks on an existing dask.distributed scheduler.

    Parameters
    ----------
    address : str
        The scheduler, ``tcp://HOST:PORT`` (see :func:`parse_address`).
    connect_timeout : float, s, default 10
        Bound on reaching the scheduler.
    worker_timeout_s : float, s, default 60
        How long to wait for a first worker at start, and how long the batch
        waits while no worker is left before it stops (the files in flight
        are recorded failed, the rest not started; rerun to resume).
    max_chunk : int, default 16
        Most files per dask task. On loopback (2 cores shared by scheduler,
        client and workers) a task cost about 3 ms of scheduling and a lone
        round trip 13 ms, while a one-second stereo clip converts in about
        4 ms; one file per task made a 1000-clip batch 2.0x slower than
        chunks of 16 (5.5 s against 2.75 s). So small files travel together. A chunk
        holds at most ``chunk_bytes`` of source and about 1/8 of a worker
        thread's share of the files; bigger files travel alone.
    chunk_bytes : int, bytes, default 8 MiB
    window_per_thread : int, default 3
        Chunks in flight per worker thread (queued on the scheduler beyond
        what runs), recomputed as workers come and go.
    drain_timeout_s : float, s, default 20
        After an interrupt, how long to wait for running chunks to return.

    Notes
    -----
    Each worker thread converts one file at a time; give workers as many
    threads as cores (``dask worker ADDRESS --nthreads N``) or one thread
    per process (``--nworkers N --nthreads 1``). Dask cannot stop a task
    that already runs: after Ctrl-C the chunks not yet started are cancelled
    and the running ones are awaited (bounded by ``drain_timeout_s``); a
    chunk still running after that finishes on its worker, its outputs are
    claimed by the batch and the next run converts them again, to the same
    bytes.
    """

    forks = False

    def __init__(self, address, *, connect_timeout=10.0, worker_timeout_s=60.0, max_chunk=16,
                 chunk_bytes=8 << 20, window_per_thread=3, drain_timeout_s=20.0):
        self.address, self._host, self._port = parse_address(address)
        if not connect_timeout > 0:
            raise UsageError(f"connect_timeout={connect_timeout!r} must be positive (seconds)")
        self.connect_timeout = float(connect_timeout)
        self.worker_timeout_s = float(worker_timeout_s)
        self.max_chunk = int(max_chunk)
        self.chunk_bytes = int(chunk_bytes)
        self.window_per_thread = int(window_per_thread)
        self.drain_timeout_s = float(drain_timeout_s)
        self.workers = 0
        self.description = f"dask cluster at {self.address}"
        self._client = None
        self._dist = None
        self._env = None
        self._threads = 0
        self._threads_t = 0.0
        self._inflight = {}
        self._done = None
        self._check_path = None
        self._seq = 0

    # ----------------------------------------------------------------- start

    def _unreachable(self, reason):
        return RequantError(f"cannot reach the dask scheduler at {self.address}: {reason}; check "
                            "that `dask scheduler` runs there and the address/port")

    def _probe(self):
        """A plain TCP connection first: fast, clear reasons, bounded."""
        try:
            with socket.create_connection((self._host, self._port),
                                          timeout=self.connect_timeout):
                pass
        except ConnectionRefusedError:
            raise self._unreachable("connection refused (nothing listens on that port)") from None
        except socket.gaierror as exc:
            raise self._unreachable(f"unknown host {self._host!r} ({exc.strerror or exc})") \
                from None
        except TimeoutError:
            raise self._unreachable(f"no answer within {self.connect_timeout:g} s") from None
        except OSError as exc:
            raise self._unreachable(exc.strerror or str(exc)) from None

    def _connect(self, dist):
        """``distributed.Client`` within ``connect_timeout``, whatever listens there.

        The client's own timeout bounds the TCP connection but not the wait
        for the scheduler's first reply (a server that accepts and stays
        silent held it for as long as it stayed open), so the client is
        made on a daemon thread and abandoned if it does not answer in time.
        """
        box = {}

        def make():
            try:
                box["client"] = dist.Client(self.address, timeout=self.connect_timeout,
                                            set_as_default=False)
            except BaseException as exc:  # handed to the caller
                box["error"] = exc

        t = threading.Thread(target=make, name="requant-dask-connect", daemon=True)
        t.start()
        t.join(self.connect_timeout + 0.5)
        if t.is_alive():
            raise self._unreachable(f"no dask answer within {self.connect_timeout:g} s (is it a "
                                    "dask scheduler?)")
        exc = box.get("error")
        if exc is not None:
            raise self._unreachable(f"no dask answer ({_one_line(exc)})")
        return box["client"]

    def _probe_task(self, client):
        """One task through the scheduler: recent schedulers unpickle tasks themselves."""
        try:
            client.submit(_environment, pure=False, key=f"requant-probe-{secrets.token_hex(4)}"
                          ).result(timeout=self.connect_timeout + 30)
        except Exception as exc:
            raise RequantError(f"the dask scheduler at {self.address} cannot run requant's "
                               f"tasks ({_one_line(exc)}); install requant[cluster], the same "
                               "version as here, on the scheduler's machine and on every "
                               "worker") from None

    def start(self):
        """Connect, wait for a worker, check the workers' environment; idempotent.

        Raises
        ------
        UsageError
            dask.distributed is not installed (the message says what to install).
        RequantError
            The scheduler cannot be reached within ``connect_timeout``, has
            no worker within ``worker_timeout_s``, or a worker runs other
            versions of requant, numpy, numba or libsndfile.
        """
        if self._client is not None:
            return
        dist = _import_distributed()
        self._env = _environment()
        self._probe()
        client = self._connect(dist)
        try:
            try:
                client.wait_for_workers(1, timeout=self.worker_timeout_s)
            except (TimeoutError, dist.TimeoutError) as exc:
                raise RequantError(f"the dask scheduler at {self.address} has no worker after "
                                   f"{self.worker_timeout_s:g} s; start some with `dask worker "
                                   f"{self.address}` on each machine") from exc
            try:
                hello = client.run(_worker_hello)
            except Exception as exc:
                raise RequantError(f"the dask workers of {self.address} cannot run requant "
                                   f"({_one_line(exc)}); install requant[cluster], the same "
                                   "version as here, on every worker machine") from None
            for where, env in sorted(hello.items()):
                problem = _env_problem(self._env, env, where)
                if problem:
                    raise RequantError(problem)
            self._probe_task(client)
        except BaseException:
            self._close_client(client)
            raise
        self._client, self._dist = client, dist
        self._done = queue.Queue()
        self._refresh_threads(force=True)
        n = len(hello)
        self.description = (f"dask cluster at {self.address} ({n} worker{'s' if n != 1 else ''}, "
                            f"{self.workers} thread{'s' if self.workers != 1 else ''})")

    def _refresh_threads(self, force=False):
        now = time.monotonic()
        if not force and now - self._threads_t < 1.0:
            return self._threads
        self._threads_t = now
        try:
            self._threads = sum(self._client.nthreads().values())
        except Exception:  # a transient comm problem: keep the last count
            return self._threads
        if force or not self.workers:
            self.workers = self._threads
        return self._threads

    # ----------------------------------------------------------------- running

    def _chunks(self, items):
        """Group items: small files travel together, big ones alone."""
        threads = max(1, self._threads)
        per = max(1, min(self.max_chunk, len(items) // (threads * 8)))
        return chunk_items(items, per=per, chunk_bytes=self.chunk_bytes, taper=threads * 4)

    def _context(self, items):
        """Shared-path check: write a token into DST, check every worker now."""
        ctx = {"environment": self._env, "token": secrets.token_hex(16), "src": None}
        src, dst = _roots(items)
        if src is None:
            return ctx
        path = os.path.join(dst, f"{_CHECK_PREFIX}{ctx['token'][:8]}{_CHECK_SUFFIX}")
        try:
            with open(path, "x", encoding="ascii") as fh:
                fh.write(ctx["token"])
                fh.flush()
                os.fsync(fh.fileno())
        except OSError as exc:
            raise RequantError(f"cannot write the check file {path!r} ({exc.strerror or exc}); "
                               "check that the destination is writable") from None
        self._check_path = path
        ctx.update(src=src, dst=dst, check_path=path)
        try:
            found = self._client.run(_check_worker_hello, ctx)
        except Exception as exc:
            raise RequantError(f"the dask workers of {self.address} could not be checked "
                               f"({_one_line(exc)}); run again") from None
        problems = [p for _, p in sorted(found.items()) if p]
        if problems:
            more = f" (and {len(problems) - 1} more worker(s))" if len(problems) > 1 else ""
            raise RequantError(problems[0] + more)
        return ctx

    def _submit(self, fn, chunk, ctx, alone=False):
        self._seq += 1
        fut = self._client.submit(_run_chunk_on_worker, fn, chunk, ctx, pure=False,
                                  key=f"requant-chunk-{ctx['token'][:8]}-{self._seq}")
        self._inflight[fut.key] = (fut, chunk, alone)
        fut.add_done_callback(self._done.put)
        return fut

    def _lost(self):
        return WorkerLost("the dask workers running this file died repeatedly (crashed, were "
                          "killed, or ran out of memory); check the file, or convert it alone "
                          "with requant convert")

    def _outcome(self, fut, chunk, alone=False):
        """(pairs to yield, items to run again alone) for a finished future.

        ``KilledWorker`` counts every task assigned to a dying worker, also
        those queued behind the culprit, so a file is declared lost only when
        it killed its workers while it ran alone on the cluster (``alone``).
        Raises :class:`_SchedulerLost` when the connection is gone.
        """
        dist = self._dist
        try:
            try:
                results = fut.result(timeout=5)
            except (TimeoutError, dist.TimeoutError):
                # its result was lost with a worker after it finished: dask computes it
                # again; wait for it like any task in flight (the loop keeps ticking)
                self._inflight[fut.key] = (fut, chunk, alone)
                fut.add_done_callback(self._done.put)
                return [], []
            if len(results) != len(chunk):
                raise RuntimeError(f"{len(results)} results for {len(chunk)} files")
            return list(zip(chunk, results)), []
        except dist.KilledWorker:  # the scheduler's allowed-failures are used up
            if not alone:
                return [], list(chunk)
            return [(chunk[0], self._lost())], []
        except (dist.client.FutureCancelledError, dist.client.CancelledError) as exc:
            if self._client.status != "running":  # the client cancels all on a lost connection
                self._inflight[fut.key] = (fut, chunk, alone)
                raise _SchedulerLost(exc) from None
            err = RequantError(f"the dask scheduler at {self.address} cancelled this file's "
                               "task; run the same command again to resume")
            return [(item, err) for item in chunk], []
        except RequantError as exc:  # a worker's check: one line already
            return [(item, exc) for item in chunk], []
        except Exception as exc:
            err = RequantError(f"the dask task failed with {_one_line(exc)}; the batch went on")
            return [(item, err) for item in chunk], []

    def _window(self):
        return max(2, self.window_per_thread * max(1, self._threads))

    def imap_unordered(self, fn, items, tick=None):
        """Yield ``(item, result)`` as chunks finish, in any order.

        ``result`` is ``fn(item)`` (a dict, its ``worker`` set to the dask
        worker's address) or an exception instance: :class:`WorkerLost`
        when the workers running it kept dying, :class:`RequantError` when a
        worker cannot see the shared paths or the task was cancelled.
        ``tick`` is called about twice a second while waiting.

        When the scheduler is lost (the client gives up reconnecting after
        ``connect_timeout``), or no worker is left for ``worker_timeout_s``,
        the files in flight are yielded failed with a message that says to
        run again, and the iteration ends: the files never sent are left
        out (the summary counts them as not started).
        """
        self.start()
        if not hasattr(items, "__len__"):
            items = list(items)
        if not len(items):
            return
        ctx = self._context(items)
        try:
            yield from self._run(fn, items, ctx, tick)
        finally:
            self._remove_check_file()

    def _run(self, fn, items, ctx, tick):
        pending = self._chunks(items)
        suspects = []  # files of chunks that ended in KilledWorker: rerun one at a time, alone
        more = True
        idle_since = None
        while True:
            self._refresh_threads()
            try:
                if suspects:
                    if not self._inflight:  # the rest finishes first (as ProcessExecutor does)
                        self._submit(fn, [suspects.pop(0)], ctx, alone=True)
                else:
                    while more and len(self._inflight) < self._window():
                        chunk = next(pending, None)
                        if chunk is None:
                            more = False
                            break
                        self._submit(fn, chunk, ctx)
            except Exception as exc:  # ClosedClientError and kin: the scheduler is gone
                yield from self._stop(self._scheduler_lost(exc), suspects)
                return
            if not self._inflight:
                return
            try:
                fut = self._done.get(timeout=0.5)
            except queue.Empty:
                if tick is not None:
                    tick()
                idle_since = self._watch_workers(idle_since)
                if idle_since == "gone":
                    yield from self._stop(RequantError(
                        f"no dask worker was connected to {self.address} for "
                        f"{self.worker_timeout_s:g} s; start workers and run the same command "
                        "again to resume"), suspects)
                    return
                continue
            entry = self._inflight.pop(fut.key, None)
            if entry is None:
                continue  # cancelled by us
            try:
                pairs, retry = self._outcome(fut, entry[1], entry[2])
            except _SchedulerLost as lost:
                yield from self._stop(self._scheduler_lost(lost.args[0]), suspects)
                return
            if fut.key not in self._inflight:
                fut.release()
            suspects.extend(retry)
            yield from pairs

    def _scheduler_lost(self, exc):
        return RequantError(f"the connection to the dask scheduler at {self.address} was lost "
                            f"({_one_line(exc)}) while this file was on the cluster; run the "
                            "same command again to resume")

    def _watch_workers(self, idle_since):
        """Track how long no worker has been connected; "gone" after worker_timeout_s."""
        if self._refresh_threads() > 0:
            return None
        now = time.monotonic()
        if idle_since is None:
            return now
        return "gone" if now - idle_since > self.worker_timeout_s else idle_since

    def _stop(self, err, suspects):
        """Fail the files in flight (and those waiting to run alone) with ``err``."""
        left = [it for entry in self._inflight.values() for it in entry[1]] + list(suspects)
        self._cancel(list(self._inflight))
        for item in left:
            yield item, err

    def _cancel(self, keys):
        futs = [self._inflight.pop(k)[0] for k in keys if k in self._inflight]
        if futs:
            try:
                self._client.cancel(futs)
            except Exception:
                pass

    def drain(self):
        """After an interrupt: cancel chunks not started, await running ones (bounded)."""
        if self._client is None or not self._inflight:
            return
        try:
            running = {k for keys in self._client.processing().values() for k in keys}
        except Exception:
            running = set()
        self._cancel([k for k in self._inflight if k not in running])
        deadline = time.monotonic() + self.drain_timeout_s
        while self._inflight:
            left = deadline - time.monotonic()
            if left <= 0:
                self._cancel(list(self._inflight))
                return
            try:
                fut = self._done.get(timeout=min(left, 0.5))
            except queue.Empty:
                continue
            entry = self._inflight.pop(fut.key, None)
            if entry is None:
                continue
            try:
                pairs, _ = self._outcome(fut, entry[1], entry[2])  # no reruns while draining
            except _SchedulerLost as lost:
                yield from self._stop(self._scheduler_lost(lost.args[0]), [])
                return
            yield from pairs

    # ----------------------------------------------------------------- closing

    @staticmethod
    def _close_client(client):
        try:
            client.close(timeout=5)
        except Exception:
            pass

    def close(self):
        """Cancel what is left, remove the check file, disconnect (safe to call twice)."""
        if self._client is not None:
            self._cancel(list(self._inflight))
            self._close_client(self._client)
            self._client = None
        self._remove_check_file()

    def _remove_check_file(self):
        if self._check_path is not None:
            try:
                os.unlink(self._check_path)
            except OSError:
                pass
            self._check_path = None
