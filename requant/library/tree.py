"""The source tree: which files a batch sees, and where each output goes.

:func:`walk_tree` uses :func:`os.walk` with ``followlinks=False``: a symbolic link to a
folder is listed and not entered (so link loops cannot hang the walk), a symbolic link
to a file is read like a file. Hidden files are skipped and listed; hidden folders are
not entered. Order is sorted, so nothing depends on the file system's order.
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

__all__ = ["OUTPUT_CHOICES", "AUDIO_EXTENSIONS", "output_name", "walk_tree", "check_folders"]


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
    """
    src = os.path.abspath(src)
    prune = {os.path.normcase(os.path.abspath(p)) for p in prune}
    entries, excluded = [], 0

    def onerror(exc):
        rel = os.path.relpath(getattr(exc, "filename", None) or src, src)
        rel = "." if rel == "." else rel.replace(os.sep, "/")
        entries.append({"source": rel + "/", "kind": "unreadable-folder", "size": 0,
                        "reason": f"the folder {rel!r} cannot be read "
                                  f"({exc.strerror or exc}); check its permissions"})

    for root, dirs, files in os.walk(src, followlinks=False, onerror=onerror):
        reldir = os.path.relpath(root, src)
        reldir = "" if reldir == "." else reldir.replace(os.sep, "/") + "/"
        keep = []
        for d in sorted(dirs):
            full = os.path.join(root, d)
            if os.path.normcase(full) in prune:
                continue
            if os.path.islink(full):
                rel = reldir + d
                if not (include and not _matches(rel, include)) and not _matches(rel, exclude):
                    entries.append({"source": rel + "/", "kind": "other", "size": 0,
                                    "reason": "a link to a folder; links to folders are not "
                                              "followed"})
                continue
            if d.startswith("."):
                continue
            keep.append(d)
        dirs[:] = keep
        for name in sorted(files):
            rel = reldir + name
            if (include and not _matches(rel, include)) or _matches(rel, exclude):
                excluded += 1
                continue
            full = os.path.join(root, name)
            try:
                st = os.stat(full)
                size, mtime, regular = st.st_size, st.st_mtime_ns, stat.S_ISREG(st.st_mode)
            except OSError:
                size, mtime, regular = 0, None, True  # the conversion names what is wrong
            ext = posixpath.splitext(name)[1].lower()
            if name.startswith("."):
                entries.append({"source": rel, "kind": "other", "size": size,
                                "reason": "a hidden file"})
            elif not regular:  # reading a FIFO would wait forever
                entries.append({"source": rel, "kind": "other", "size": 0,
                                "reason": f"{non_regular_kind(full) or 'not a file'}, not a "
                                          "regular file"})
            elif ext in AUDIO_EXTENSIONS:
                entries.append({"source": rel, "kind": "audio", "size": size, "reason": None,
                                "mtime_ns": mtime})
            else:
                entries.append({"source": rel, "kind": "other", "size": size,
                                "reason": f"not an audio file ({ext or 'no extension'})"})
    entries.sort(key=lambda e: e["source"])
    return entries, excluded


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


