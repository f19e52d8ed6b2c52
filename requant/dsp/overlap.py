"""A second thread for one call at a time, so that two compiled kernels use both cores.

The compiled kernels (:mod:`requant.dsp.native`) release the GIL, so a kernel
started here runs beside the caller's own work on the same block. The caller
owns the buffers: it must :meth:`SideThread.join` before it lets a buffer go.
"""

import queue
import threading

__all__ = ["SideThread"]


class SideThread:
    """Run one call at a time on a thread of its own.

    Examples
    --------
    >>> side = SideThread()
    >>> side.start(print, "on the side")   # doctest: +SKIP
    >>> side.join()                        # waits; re-raises what the call raised
    >>> side.close()
    """

    def __init__(self, name="requant-side"):
        self._todo = queue.SimpleQueue()
        self._done = queue.SimpleQueue()
        self._busy = False
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)
        self._thread.start()

    def _run(self):
        while True:
            item = self._todo.get()
            if item is None:
                return
            fn, args = item
            try:
                fn(*args)
            except BaseException as exc:  # handed to the caller at join()
                self._done.put(exc)
            else:
                self._done.put(None)

    def start(self, fn, *args):
        """Run ``fn(*args)`` on the thread, after the call before it has finished."""
        self.join()
        self._busy = True
        self._todo.put((fn, args))

    def join(self):
        """Wait for the running call; raise what it raised."""
        if self._busy:
            self._busy = False
            exc = self._done.get()
            if exc is not None:
                raise exc

    def close(self):
        """Wait for the running call, then stop the thread (safe to call twice)."""
        try:
            self.join()
        finally:
            if self._thread.is_alive():
                self._todo.put(None)
                self._thread.join()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        try:
            self.close()
        except BaseException:
            if exc[0] is None:
                raise
