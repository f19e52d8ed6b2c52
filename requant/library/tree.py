"""The source tree: which files a batch sees, and where each output goes.

:func:`iter_folders` walks with :func:`os.scandir`, a folder at a time, without following
links: a symbolic link to a folder is listed and not entered (so link loops cannot hang
the walk), a symbolic link to a file is read like a file. Hidden files are skipped and
listed; hidden folders are not entered. Order is sorted, so nothing depends on the file
system's order. :func:`walk_tree` is the whole tree as one sorted list.
"""

import fnmatch
import os
import posixpath
import stat

from requant.audio_io.probe import non_regular_kind
from requant.errors import InputError, UsageError

#: Allowed values of a batch's ``format`` (``same`` keeps WAV, FLAC and AIFF sources in
#: their format and writes anything else as WAV).
OUTPUT_CHOICES = ("same", "wav", "flac", "aiff")

__all__ = ["OUTPUT_CHOICES", "AUDIO_EXTENSIONS", "output_name", "walk_tree", "iter_folders",
           "WalkCount", "check_folders"]


#: Extensions (lower case) of files libsndfile reads; everything else is "not audio".
AUDIO_EXTENSIONS = frozenset({
    ".wav", ".wave", ".bwf", ".rf64", ".w64", ".flac", ".aif", ".aiff", ".aifc", ".caf",
    ".au", ".snd", ".ogg", ".oga", ".opus", ".mp3", ".voc", ".paf", ".svx", ".8svx", ".sds",
    ".sd2", ".nist", ".sph", ".avr", ".htk", ".xi", ".wve", ".pvf",
})


#: Source extensions that ``format='same'`` keeps (requant writes these containers).
_KEEP_EXTENSIONS = {".wav": "WAV", ".wave": "WAV", ".flac": "FLAC", ".aif": "AIFF",
                    ".aiff": "AIFF", ".aifc": "AIFF"}


_FORMAT_EXTENSIONS = {"wav": ".wav", "flac": ".flac", "aiff": ".aiff"}


def output_name(relpath, fmt):
    """The output path (relative, ``/`` separators) for a source, and a note.

    ``fmt='same'`` keeps ``.wav``, ``.wave``, ``.flac``, ``.aif``, ``.aiff``
    and ``.aifc`` names unchanged; any other source becomes ``.wav`` (with a
    note saying so). ``wav``, ``flac``, ``aiff`` give that extension.

    Examples
    --------
    >>> output_name("drums/kick.caf", "same")
    ('drums/kick.wav', 'written as WAV: requant does not write .caf files')
    >>> output_name("drums/kick.WAV", "flac")
    ('drums/kick.flac', None)
    """
    stem, ext = posixpath.splitext(relpath)
    if fmt == "same":
        if ext.lower() in _KEEP_EXTENSIONS:
            return relpath, None
        return stem + ".wav", f"written as WAV: requant does not write {ext.lower()} files"
    return stem + _FORMAT_EXTENSIONS[fmt], None


def _matches(rel, patterns):
    name = posixpath.basename(rel)
    for p in patterns:
        if fnmatch.fnmatchcase(rel, p) or ("/" not in p and fnmatch.fnmatchcase(name, p)):
            return True
    return False


def _entry(full, rel, name):
    """The entry of one file: audio, or other with the reason."""
    try:
        st = os.stat(full)
        size, mtime, regular = st.st_size, st.st_mtime_ns, stat.S_ISREG(st.st_mode)
    except OSError:
        size, mtime, regular = 0, None, True  # the conversion names what is wrong
    ext = posixpath.splitext(name)[1].lower()
    if name.startswith("."):
        return {"source": rel, "kind": "other", "size": size, "reason": "a hidden file"}
    if not regular:  # reading a FIFO would wait forever
        return {"source": rel, "kind": "other", "size": 0,
                "reason": f"{non_regular_kind(full) or 'not a file'}, not a regular file"}
    if ext in AUDIO_EXTENSIONS:
        return {"source": rel, "kind": "audio", "size": size, "reason": None, "mtime_ns": mtime}
    return {"source": rel, "kind": "other", "size": size,
            "reason": f"not an audio file ({ext or 'no extension'})"}


def _unreadable(rel, exc):
    return {"source": rel + "/", "kind": "unreadable-folder", "size": 0,
            "reason": f"the folder {rel!r} cannot be read ({exc.strerror or exc}); check its "
                      "permissions"}


class WalkCount:
    """What a walk left out: ``excluded``, the files the patterns removed."""

    def __init__(self):
        self.excluded = 0


def iter_folders(src, *, include=(), exclude=(), prune=(), count=None):
    """Walk ``src`` one folder at a time: yield ``(folder, entries)``.

    ``folder`` is the folder's path relative to ``src`` (``""`` for ``src``,
    else ending in ``/``); ``entries`` are its files, and its links to folders,
    as :func:`walk_tree` describes them, sorted by name. Folders come depth
    first, each before its subfolders, subfolders in sorted order; a folder
    that cannot be read comes as one entry of kind ``unreadable-folder``.
    Only one folder's listing is held at a time (and the names of the
    folders still to visit), so memory does not grow with the tree.

    Parameters
    ----------
    src : str
    include, exclude, prune : see :func:`walk_tree`
    count : WalkCount, optional
        Receives the number of files the patterns left out.
    """
    src = os.path.abspath(src)
    prune = {os.path.normcase(os.path.abspath(p)) for p in prune}
    count = count if count is not None else WalkCount()
    stack = [("", src)]
    while stack:
        reldir, full = stack.pop()
        try:
            with os.scandir(full) as it:
                listing = [(e.name, e.is_dir()) for e in it]
        except OSError as exc:
            rel = reldir.rstrip("/") or "."
            yield reldir, [_unreadable(rel, exc)]
            continue
        entries, subdirs = [], []
        for name, is_dir in sorted(listing):
            path, rel = os.path.join(full, name), reldir + name
            if is_dir:
                if os.path.normcase(path) in prune:
                    continue
                if os.path.islink(path):
                    if not (include and not _matches(rel, include)) and not _matches(rel,
                                                                                     exclude):
                        entries.append({"source": rel + "/", "kind": "other", "size": 0,
                                        "reason": "a link to a folder; links to folders are "
                                                  "not followed"})
                elif not name.startswith("."):
                    subdirs.append((rel + "/", path))
                continue
            if (include and not _matches(rel, include)) or _matches(rel, exclude):
                count.excluded += 1
                continue
            entries.append(_entry(path, rel, name))
        entries.sort(key=lambda e: e["source"])
        yield reldir, entries
        stack.extend(reversed(subdirs))


def walk_tree(src, *, include=(), exclude=(), prune=()):
    """List the files under ``src``, sorted by relative path.

    Parameters
    ----------
    src : str
        Source folder.
    include, exclude : sequence of str
        fnmatch patterns on the relative path (``/`` separators; ``*`` also
        matches ``/``). A pattern without ``/`` also matches the file name
        alone. With include patterns, only matching files are listed;
        exclude patterns then remove files.
    prune : sequence of str
        Absolute folders not to enter (the destination, when it lies
        inside the source).

    Returns
    -------
    entries : list of dict
        ``source`` (relative, POSIX), ``kind`` (``audio``, ``other``,
        ``unreadable-folder``), ``size`` (bytes), ``reason`` for the others,
        and for audio files ``mtime_ns`` (the modification time, ns).
    excluded : int
        Files left out by the patterns.

    Notes
    -----
    This holds the whole tree; a batch walks it a folder at a time
    (:func:`iter_folders`).
    """
    count = WalkCount()
    entries = [e for _, folder in iter_folders(src, include=include, exclude=exclude,
                                               prune=prune, count=count) for e in folder]
    entries.sort(key=lambda e: e["source"])
    return entries, count.excluded


def check_folders(src, dst):
    src = os.path.abspath(os.fspath(src))
    dst = os.path.abspath(os.fspath(dst))
    if not os.path.exists(src):
        raise InputError(f"the source folder {src!r} does not exist; check the path")
    if not os.path.isdir(src):
        raise UsageError(f"{src!r} is a file, not a folder; use 'requant convert' for one file")
    if os.path.exists(dst) and not os.path.isdir(dst):
        raise UsageError(f"the destination {dst!r} is a file; give a folder")
    rs, rd = os.path.realpath(src), os.path.realpath(dst)
    if rs == rd:
        raise UsageError(f"the destination {dst!r} is the source folder; give a separate "
                         "destination folder")
    if rs.startswith(rd.rstrip(os.sep) + os.sep):
        raise UsageError(f"the source {src!r} lies inside the destination {dst!r}; the outputs "
                         "would land among the sources; choose another destination")
    prune = [dst] if rd.startswith(rs.rstrip(os.sep) + os.sep) else []
    if prune and rd != dst:
        prune.append(rd)
    return src, dst, prune


