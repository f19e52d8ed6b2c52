"""A batch's state in DST: the run seed and the claimed outputs, the lock, stale temporaries.

``DST/requant-batch.json`` holds the run seed and the *claims*: the outputs a run may
write before it records them. Claims make ``kill -9`` safe: an output renamed into place
by a worker whose result never reached the manifest is claimed, so the next run
converts it again (to the same bytes) instead of refusing it as somebody else's file.
A run claims its tasks' outputs before any work starts and, at its end, keeps only what
it did not record; a run's start drops the claims the manifest has since recorded. The
file is written with one claimed name per line and read a line at a time
(:func:`read_state`), so a million claims never sit in memory at once.
"""

from __future__ import annotations

import json
import os
import time

from requant import __version__
from requant.audio_io.atomic import AtomicOutputs, is_stale_temp
from requant.dsp.quantizer import new_seed
from requant.errors import OutputError, UsageError
from requant.library.manifest import escape_name, unescape_name
from requant.recipe import SEED_MAX

__all__ = ["STATE_NAME", "LOCK_NAME", "read_state", "write_state", "choose_run_seed",
           "take_lock", "remove_stale_temps"]


STATE_NAME = "requant-batch.json"


LOCK_NAME = ".requant-batch.lock"


_CLAIMS_OPEN = b'"claimed_outputs": ['


def _state_problem(problems, path, what):
    if problems is not None and not problems:
        problems.append(f"the batch state {path!r} is damaged ({what}); what it held was "
                        "ignored (a new run seed may be drawn, and outputs not in the manifest "
                        "are refused rather than replaced); move it aside to silence this")


def _valid_seed(seed):
    return isinstance(seed, int) and not isinstance(seed, bool) and 0 <= seed <= SEED_MAX


def _stream_claims(fh):
    """Claimed names after the header line of our own layout; raises ValueError elsewhere."""
    for raw in fh:
        line = raw.strip()
        if line in (b"]}", b"]"):
            return
        try:
            name = json.loads(line[:-1] if line.endswith(b",") else line)
        except RecursionError:
            raise ValueError("nested absurdly deep") from None
        if not isinstance(name, str):
            raise ValueError("not a name")
        yield unescape_name(name)
    raise ValueError("cut short")


def read_state(dst, problems=None, *, claims=False):
    """The batch state in DST, with only fields of the right type.

    A missing file is an empty state. A damaged one (not JSON, nested absurdly
    deep, a folder, fields of the wrong type) is read as far as it is usable,
    and a sentence naming it and the way out goes to ``problems``. Losing the
    claims is safe: outputs not in the manifest are then refused, not replaced.

    Parameters
    ----------
    dst : str
    problems : list, optional
        Receives at most one sentence.
    claims : bool, default False
        Also return the claimed names, as ``claimed_outputs``: a list. The
        batch streams them instead (:func:`iter_claims`).

    Returns
    -------
    dict
        ``run_seed`` when valid; ``claimed_outputs`` when asked for and valid.
    """
    state, names = _read(dst, problems)
    if claims and names is not None:
        try:
            state["claimed_outputs"] = list(names)
        except ValueError:
            _state_problem(problems, os.path.join(dst, STATE_NAME),
                           "claimed_outputs is not a list of names")
    return state


def iter_claims(dst, problems=None):
    """The claimed output names, streamed (nothing when the state is missing or damaged)."""
    _, names = _read(dst, problems)
    if names is None:
        return
    try:
        yield from names
    except ValueError:
        _state_problem(problems, os.path.join(dst, STATE_NAME),
                       "claimed_outputs is not a list of names")


def _read(dst, problems):
    """(state dict, iterator of claimed names or None)."""
    path = os.path.join(dst, STATE_NAME)
    try:
        fh = open(path, "rb")
    except FileNotFoundError:
        return {}, None
    except OSError as exc:
        _state_problem(problems, path, exc.strerror or str(exc))
        return {}, None
    try:
        head = fh.readline(1 << 16)
        if head.rstrip().endswith(_CLAIMS_OPEN):  # our layout: one name per line
            try:
                state = json.loads(head.rstrip()[:-len(_CLAIMS_OPEN)].rstrip().rstrip(b",")
                                   + b"}")
            except (ValueError, RecursionError):
                state = None
            if isinstance(state, dict):
                return _checked(state, path, problems), _claims_of(fh)
        fh.seek(0)
        try:
            state = json.loads(fh.read())
        except (ValueError, RecursionError):
            _state_problem(problems, path, "not valid JSON")
            fh.close()
            return {}, None
        except OSError as exc:
            _state_problem(problems, path, exc.strerror or str(exc))
            fh.close()
            return {}, None
    except BaseException:
        fh.close()
        raise
    fh.close()
    if not isinstance(state, dict):
        _state_problem(problems, path, "not a JSON object")
        return {}, None
    clean = _checked(state, path, problems)
    claims = state.get("claimed_outputs")
    if isinstance(claims, list) and all(isinstance(c, str) for c in claims):
        return clean, iter([unescape_name(c) for c in claims])
    if claims is not None:
        _state_problem(problems, path, "claimed_outputs is not a list of names")
    return clean, None


def _claims_of(fh):
    with fh:
        yield from _stream_claims(fh)


def _checked(state, path, problems):
    clean = {}
    seed = state.get("run_seed")
    if _valid_seed(seed):
        clean["run_seed"] = seed
    elif seed is not None:
        _state_problem(problems, path, f"run_seed is {seed!r}")
    return clean


def write_state(dst, run_seed, claims=()):
    """Write the state atomically: the run seed and the claimed names (streamed, one per
    line).

    Raises
    ------
    OutputError
        The destination cannot be written.
    """
    from requant.library.task import now_iso

    path = os.path.join(dst, STATE_NAME)
    head = {"format": "requant-batch-state", "version": 2, "requant_version": __version__,
            "run_seed": run_seed, "updated": now_iso()}
    try:
        with AtomicOutputs() as outs:
            tmp = outs.path_for(path)
            with open(tmp, "wb") as fh:
                fh.write(json.dumps(head)[:-1].encode("ascii") + b", " + _CLAIMS_OPEN + b"\n")
                first = True
                for name in claims:
                    text = json.dumps(escape_name(name), ensure_ascii=False).encode("utf-8")
                    fh.write(text if first else b",\n" + text)
                    first = False
                fh.write(b"\n]}\n" if not first else b"]}\n")
    except OSError as exc:
        raise OutputError(f"cannot write in the destination {dst!r} ({exc.strerror or exc}); "
                          "free some space or choose a writable folder") from None


def choose_run_seed(settings, dst):
    """The run seed and where it came from: ``given``, ``previous run`` or ``fresh``."""
    if settings.recipe.seed is not None:
        return settings.recipe.seed, "given"
    prev = read_state(dst).get("run_seed")
    if _valid_seed(prev):
        return prev, "previous run"
    return new_seed(), "fresh"


def take_lock(dst):
    """Lock DST for this process (``flock``; the kernel releases it when the process dies)."""
    import fcntl

    path = os.path.join(dst, LOCK_NAME)
    try:
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    except OSError as exc:
        raise OutputError(f"cannot write in the destination {dst!r} ({exc.strerror or exc}); "
                          "choose a writable folder") from None
    deadline = time.monotonic() + 3.0  # workers of a killed run may still be cleaning up
    while True:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            return fd
        except OSError:
            if time.monotonic() > deadline:
                os.close(fd)
                raise UsageError(f"another requant batch is writing to {dst!r}; wait for it to "
                                 "finish or choose another destination") from None
            time.sleep(0.05)


def _is_stale_temp(name):
    return name.startswith(".") and (name.endswith(".requant-part")
                                     or (".requant-part." in name and name.endswith(".part")))


def remove_stale_temps(dst):
    """Remove the temporary files killed runs left in DST; returns their relative names."""
    removed = []
    for root, _dirs, files in os.walk(dst, followlinks=False):
        for name in files:
            if _is_stale_temp(name) and is_stale_temp(os.path.join(root, name)):
                try:
                    os.unlink(os.path.join(root, name))
                    removed.append(os.path.relpath(os.path.join(root, name), dst))
                except OSError:
                    pass
    return removed
