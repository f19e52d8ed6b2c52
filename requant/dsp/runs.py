"""Runs of digital silence (exact zeros), found while a file streams past.

:class:`SilentRuns` is fed blocks of samples in order and lists, per channel
and for the whole frame (every channel at once), the runs of exact zeros at
least ``min_frames`` long: the same rule by which ``--silence keep`` leaves a
run silent in a conversion (:meth:`requant.recipe.Recipe.silence_frames`).
A run that crosses block boundaries is found whole, so the list does not
depend on the block size. Memory is flat: at most ``limit`` runs are kept per
list (the count of all of them is kept too).
"""

from __future__ import annotations

import numpy as np

__all__ = ["SilentRuns", "DEFAULT_LIMIT"]

#: Runs listed per channel (and for all channels together) at most; the rest are counted.
DEFAULT_LIMIT = 1000


class SilentRuns:
    """Streaming finder of runs of exact zeros.

    Parameters
    ----------
    channels : int
        Channel count.
    min_frames : int, >= 1
        Shortest run listed.
    limit : int, >= 0, default :data:`DEFAULT_LIMIT`
        Runs kept per list; :attr:`counts` and :attr:`frames` count them all.

    Attributes
    ----------
    runs : list of list of (int, int)
        ``(start, length)`` in frames, per channel, then one more list for the
        frames silent in every channel.
    counts, frames : numpy.ndarray of int64
        Per list (channels, then all channels): runs found, frames in them.
    """

    def __init__(self, channels, min_frames, limit=DEFAULT_LIMIT):
        if min_frames < 1:
            raise ValueError(f"min_frames must be at least 1; got {min_frames}")
        self.channels = int(channels)
        self.min_frames = int(min_frames)
        self.limit = int(limit)
        k = self.channels + 1
        self.runs = [[] for _ in range(k)]
        self.counts = np.zeros(k, dtype=np.int64)
        self.frames = np.zeros(k, dtype=np.int64)
        self._open = np.full(k, -1, dtype=np.int64)  # start of a run still open, or -1
        self._pos = 0

    def _emit(self, i, start, end):
        if end - start >= self.min_frames:
            self.counts[i] += 1
            self.frames[i] += end - start
            if len(self.runs[i]) < self.limit:
                self.runs[i].append((int(start), int(end - start)))

    def _column(self, i, z):
        n = z.shape[0]
        pos = self._pos
        if not z.any():
            if self._open[i] >= 0:
                self._emit(i, self._open[i], pos)
                self._open[i] = -1
            return
        edges = np.flatnonzero(np.diff(z.view(np.int8), prepend=0, append=0))
        starts, ends = edges[0::2], edges[1::2]
        if self._open[i] >= 0:
            if starts[0] == 0:
                starts = starts.copy()
                starts[0] = self._open[i] - pos  # the open run goes on
            else:
                self._emit(i, self._open[i], pos)
            self._open[i] = -1
        if ends[-1] == n:  # the last run reaches the block's end: it may go on
            self._open[i] = pos + starts[-1]
            starts, ends = starts[:-1], ends[:-1]
        for s, e in zip((starts + pos).tolist(), (ends + pos).tolist()):
            self._emit(i, s, e)

    def feed(self, x, zeros=None):
        """Take the next block, ``x`` of shape (frames, channels). ``zeros`` may say
        how many exact zeros it holds, if known (0 skips the search)."""
        n = x.shape[0]
        if n == 0:
            return
        if zeros == 0 and not (self._open >= 0).any():
            self._pos += n
            return
        z = x == 0
        for c in range(self.channels):
            self._column(c, z[:, c])
        self._column(self.channels, z.all(axis=1))
        self._pos += n

    def finish(self):
        """Close the runs still open at the end of the file."""
        for i in np.flatnonzero(self._open >= 0):
            self._emit(i, self._open[i], self._pos)
            self._open[i] = -1
