"""Safe outputs: never replace an input, never leave a partial file.

Every output is written to a hidden temporary file in its destination folder
and renamed over the final name only when the whole job has succeeded
(``os.replace`` is atomic within one file system). On any failure, including
Ctrl-C, the temporary files are removed.

Each temporary file is flushed to disk (``fsync``) before its rename, so a
power loss leaves either the old state or the whole new file. A
:class:`CommitGroup` defers the flushes and renames of many small outputs to
one moment: on ext4 and most journalling file systems every ``fsync`` forces
a journal commit, and two batch workers that each commit once per one-second
clip spend much of their time waiting for each other's commits. The first
flush of a group writes out the data of every file in it; the later ones find
little left to do. The guarantee is unchanged: nothing is renamed into place
before it is on disk.
"""

import fcntl
import os
import secrets
import threading
import time

from requant.errors import OutputError, UsageError

__all__ = ["check_outputs", "AtomicOutputs", "CommitGroup", "pending_path", "same_file",
           "temp_name", "temp_stem", "remove_stale_temps_of", "is_stale_temp", "TEMP_SUFFIX",
           "in_commit_group"]

#: What every temporary name ends with (the batch's clean-up looks for it too).
TEMP_SUFFIX = ".requant-part"
#: Longest file name most file systems take, in bytes, when the folder does not say.
_NAME_MAX = 255

_local = threading.local()  # the active CommitGroup of this thread, if any


def same_file(a, b):
    """True when two paths reach the same file (symlinks, hard links)."""
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False


def check_outputs(inputs, outputs, *, overwrite=False):
    """Refuse outputs that would destroy an input or each other.

    Parameters
    ----------
    inputs : sequence of path
    outputs : sequence of path or None
        None entries are ignored.
    overwrite : bool
        Allow replacing an existing output (never an input).

    Raises
    ------
    OutputError
        An output is an input (also through a link), exists without
        ``overwrite``, repeats another output, or its folder is missing.
    """
    outs = [os.fspath(o) for o in outputs if o is not None]
    for i, out in enumerate(outs):
        for other in outs[:i]:
            if os.path.abspath(other) == os.path.abspath(out) or same_file(other, out):
                raise UsageError(f"{out!r} is named for two outputs; give each output its own name")
        for src in inputs:
            if os.path.abspath(os.fspath(src)) == os.path.abspath(out) or same_file(src, out):
                raise OutputError(
                    f"{out!r} is the input file {os.fspath(src)!r} (or a link to it); "
                    "choose another output name: requant never writes onto its input"
                )
        folder = os.path.dirname(os.path.abspath(out))
        if not os.path.isdir(folder):
            raise OutputError(f"the folder {folder!r} for {out!r} does not exist; create it first")
        if os.path.isdir(out):
            raise OutputError(f"{out!r} is a folder; give a file name")
        if os.path.lexists(out) and not overwrite:
            raise OutputError(f"{out!r} already exists; pass --overwrite to replace it")


def _name_max(folder):
    try:
        return os.pathconf(folder, "PC_NAME_MAX")
    except (OSError, ValueError):
        return _NAME_MAX


def temp_name(folder, name):
    """A hidden temporary name for ``name`` in ``folder`` that the file system accepts.

    ``.NAME.XXXXXXXX.requant-part``; when that would be longer than the
    folder's name limit (a legal name near 255 bytes), the copy of ``name`` in
    it is shortened (to a whole character) so that the write does not fail.
    """
    return f".{temp_stem(folder, name)}.{secrets.token_hex(4)}{TEMP_SUFFIX}"


def temp_stem(folder, name):
    """``name``, shortened if needed so that a temporary name made from it (with a dot
    before, and a dot, eight random characters and :data:`TEMP_SUFFIX` after) fits the
    folder's name limit."""
    room = _name_max(folder) - len(f"..{'0' * 8}{TEMP_SUFFIX}")
    stem = name
    while len(os.fsencode(stem)) > room and stem:
        stem = stem[:-1]
    return stem


def is_stale_temp(path):
    """True when ``path`` is one of our temporary files that no running process writes.

    A writer holds an exclusive ``flock`` on its temporary files until they are
    renamed or removed, so a temporary file that can be locked was left by a
    process that was killed (SIGKILL, a power cut).
    """
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW)
    except OSError:
        return False
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        return False  # held: a live writer
    finally:
        os.close(fd)
    return True


def in_commit_group():
    """True inside a :class:`CommitGroup` (a batch chunk, whose batch cleans its destination
    under its own lock before any work)."""
    return getattr(_local, "group", None) is not None


def remove_stale_temps_of(final):
    """Remove temporary files a killed run left for output ``final``; return their names.

    Does nothing inside a :class:`CommitGroup`: a batch has cleaned its whole
    destination already, and listing a folder of thousands of outputs per file
    would cost more than converting a short clip.
    """
    if in_commit_group():
        return []
    folder, name = os.path.split(os.path.abspath(os.fspath(final)))
    prefix = f".{temp_stem(folder, name)}."
    removed = []
    try:
        entries = os.listdir(folder)
    except OSError:
        return removed
    for entry in entries:
        if (entry.startswith(prefix) and entry.endswith(TEMP_SUFFIX)
                and len(entry) == len(prefix) + 8 + len(TEMP_SUFFIX)):
            path = os.path.join(folder, entry)
            if is_stale_temp(path):
                try:
                    os.unlink(path)
                    removed.append(entry)
                except OSError:
                    pass
    return removed


class AtomicOutputs:
    """Context manager handing out temporary paths that become final together.

    Examples
    --------
    >>> with AtomicOutputs() as outs:                     # doctest: +SKIP
    ...     tmp = outs.path_for("take.wav")
    ...     write(tmp)
    ... # on success tmp is renamed to take.wav; on error it is removed
    """

    def __init__(self):
        self._pairs = []
        self._held = []

    def path_for(self, final):
        """A temporary path in ``final``'s folder, renamed to ``final`` on success.

        The file is created here and locked (``flock``) until it is renamed or
        removed, so that a later run can tell it from one a killed run left
        behind (:func:`is_stale_temp`).
        """
        final = os.fspath(final)
        folder, name = os.path.split(os.path.abspath(final))
        tmp = os.path.join(folder, temp_name(folder, name))
        self._pairs.append((tmp, final))
        if in_commit_group():
            return tmp  # a batch chunk: its owner holds the destination's lock and cleans it
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        except OSError:
            return tmp  # the writer will say what is wrong with the folder
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            pass
        self._held.append(fd)
        return tmp

    def _release(self):
        fds, self._held = self._held, []
        for fd in fds:
            try:
                os.close(fd)
            except OSError:
                pass

    def discard(self):
        """Remove every temporary file (errors while removing are ignored)."""
        _remove_temps(self._pairs)
        self._release()

    def commit(self):
        """Flush each temporary file to disk and rename it to its final name.

        Inside a :class:`CommitGroup` the flush and rename wait for the group.
        """
        group = getattr(_local, "group", None)
        if group is not None:
            # hand over first: an interrupt from here on cannot make discard() remove a file
            # the group will rename (at worst a temporary is left for the next run to remove)
            pairs, self._pairs = self._pairs, []
            group.add(pairs)
            self._release()  # the group's owner (a batch, under its own lock) renames them
            return
        _fsync_temps(self._pairs)
        for tmp, final in self._pairs:
            os.replace(tmp, final)
        self._pairs = []
        self._release()

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            try:
                self.commit()
            except BaseException:
                self.discard()
                raise
        else:
            self.discard()
        return False


class CommitGroup:
    """Defer the commits of the :class:`AtomicOutputs` made in this thread.

    Examples
    --------
    >>> with CommitGroup() as group:                       # doctest: +SKIP
    ...     for job in jobs:
    ...         convert_file(...)        # its outputs wait as temporary files
    ...     group.flush()                # fsync them all, then rename them all
    ... # leaving without flush() removes whatever still waits
    """

    def __init__(self):
        self.pairs = []

    def add(self, pairs):
        """Let (temporary, final) pairs wait for :meth:`flush`."""
        self.pairs.extend(pairs)

    def __enter__(self):
        self._outer = getattr(_local, "group", None)
        _local.group = self
        return self

    def __exit__(self, exc_type, exc, tb):
        _local.group = self._outer
        self.discard()
        return False

    def pending(self, final):
        """Where ``final``'s data is until :meth:`flush`, or None if it does not wait here."""
        final = os.path.abspath(os.fspath(final))
        for tmp, f in self.pairs:
            if os.path.abspath(f) == final:
                return tmp
        return None

    def flush(self):
        """fsync every waiting file, then rename each into place.

        Raises
        ------
        OSError
            From the first failing flush or rename; the files not yet renamed
            are removed (see :meth:`discard`).
        """
        pairs, self.pairs = self.pairs, []
        commit_pairs(pairs)

    def detach(self):
        """Take the waiting (temporary, final) pairs out of the group, to commit elsewhere
        (:func:`commit_pairs`, e.g. in another process); the group then holds nothing."""
        pairs, self.pairs = self.pairs, []
        return pairs

    def discard(self):
        """Remove every waiting temporary file."""
        _remove_temps(self.pairs)
        self.pairs = []


def commit_pairs(pairs, *, whole_fs=False):
    """fsync every temporary file of (temporary, final) pairs, then rename each into place.

    Parameters
    ----------
    pairs : iterable of (str, str)
    whole_fs : bool, default False
        Flush them with one ``syncfs`` of their file system (Linux), when they
        all lie on one, instead of one ``fsync`` each (:func:`_sync_whole_fs`).

    Raises
    ------
    OSError
        From the first failing flush or rename; the temporary files not yet
        renamed are removed (as they are after any other exception).
    """
    pairs = list(pairs)
    try:
        if not (whole_fs and _sync_whole_fs(pairs)):
            _fsync_temps(pairs)
        while pairs:
            tmp, final = pairs[0]
            os.replace(tmp, final)
            pairs.pop(0)
    except BaseException:
        _remove_temps(pairs)
        raise


#: ``syncfs`` for commit groups: None until tried, then the libc function, or False when it
#: is missing or once a call took longer than :data:`_SYNCFS_SLOW_S`.
_SYNCFS = {"fn": None}
_SYNCFS_SLOW_S = 0.25


def _sync_whole_fs(pairs):
    """Flush the temporary files of ``pairs`` with one ``syncfs(2)``; True when done.

    On ext4 every ``fsync`` of a new file forces its own journal commit, and a batch
    that flushes sixteen small outputs one by one spends more time in those commits
    (and makes its workers' file creations wait for them) than in converting;
    ``syncfs`` writes the file system's dirty data and commits the journal once. It
    also waits for data other programs left unwritten on that file system, so when a
    call takes longer than :data:`_SYNCFS_SLOW_S` this process goes back to one
    ``fsync`` per file. False (the caller then fsyncs each file) when there is one
    file, the files lie on different file systems, or ``syncfs`` is not there or
    fails.
    """
    fn = _SYNCFS["fn"]
    if fn is False or len(pairs) < 2:
        return False
    if fn is None:
        fn = _syncfs_function()
        _SYNCFS["fn"] = fn
        if fn is False:
            return False
    try:
        devices = {os.stat(folder).st_dev for folder in {os.path.dirname(t) for t, _ in pairs}}
    except OSError:
        return False
    if len(devices) != 1:
        return False
    fd = os.open(pairs[0][0], os.O_RDONLY)
    try:
        t0 = time.monotonic()
        done = fn(fd) == 0
        if time.monotonic() - t0 > _SYNCFS_SLOW_S:
            _SYNCFS["fn"] = False
    finally:
        os.close(fd)
    return done


def _syncfs_function():
    """libc's ``syncfs``, or False: not Linux, or a kernel older than 5.8 (whose ``syncfs``
    does not report a failed write-back, which one ``fsync`` per file would)."""
    import sys

    if not sys.platform.startswith("linux"):
        return False
    try:
        version = tuple(int(p) for p in os.uname().release.split("-")[0].split(".")[:2])
        if version < (5, 8):
            return False
        import ctypes

        fn = ctypes.CDLL(None, use_errno=True).syncfs
        fn.argtypes = [ctypes.c_int]
    except (OSError, AttributeError, ValueError):
        return False
    return fn


def _fsync_temps(pairs):
    """Flush each temporary file of (temporary, final) pairs to disk."""
    for tmp, _ in pairs:
        fd = os.open(tmp, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _remove_temps(pairs):
    for tmp, _ in pairs:
        try:
            os.unlink(tmp)
        except OSError:
            pass


def pending_path(final):
    """Where the data of output ``final`` is now: its temporary file while it
    waits in this thread's :class:`CommitGroup`, else ``final`` itself."""
    group = getattr(_local, "group", None)
    tmp = group.pending(final) if group is not None else None
    return final if tmp is None else tmp
