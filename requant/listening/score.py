"""Scoring blind listening trials: right answers against guessing.

A listener who hears no difference answers each trial right with
probability 1/2, independently, so the number right of ``n`` trials is
binomial(n, 1/2). The p-value of a score ``k`` is the chance of doing at
least as well by guessing::

    p = P(K >= k) = sum_{i=k}^{n} C(n, i) / 2**n

computed exactly here with integers (no approximation, no scipy), then
rounded once to float. It is one-sided: only scores above chance count as
evidence of hearing a difference.

The page saves the kit's seed as a decimal string, since JavaScript numbers
lose digits past 2**53; :func:`read_seed` reads that and the plain number
older pages saved.
"""

import json
import math
import os

from requant.errors import InputError

__all__ = ["guessing_p_value", "load_results", "score_results", "format_scores", "read_seed",
           "RESULTS_FORMAT", "RESULTS_VERSIONS"]

#: Value of the ``format`` key of a results file written by the listening page.
RESULTS_FORMAT = "requant-listening-results"

#: Versions of the results file this module reads (2 saves the seed as a string, the
#: level each player was played at and the session).
RESULTS_VERSIONS = (1, 2)

_EXACT_LIMIT = 2**53
#: Largest results file read: a page saves a few hundred trials in a few kilobytes.
MAX_RESULTS_BYTES = 64 << 20
#: Most trials scored from one file.
MAX_TRIALS = 200_000


def _printable(text):
    """``text`` safe for a terminal: control characters (escape sequences that could clear
    the screen or forge a line) shown as escapes."""
    text = str(text)
    if text.isprintable():
        return text
    return "".join(ch if ch.isprintable() else repr(ch)[1:-1] for ch in text)


def guessing_p_value(correct, total):
    """One-sided binomial p-value of ``correct`` right answers in ``total`` trials.

    Parameters
    ----------
    correct : int, 0..total
        Trials answered right.
    total : int, >= 0
        Trials answered.

    Returns
    -------
    float, 0..1
        ``sum(C(total, i) for i >= correct) / 2**total``; 1.0 when ``correct``
        is 0 (or no trials were answered).

    Raises
    ------
    TypeError
        If either count is not an int.
    ValueError
        If ``total < 0`` or ``correct`` is outside ``0..total``.

    Examples
    --------
    >>> guessing_p_value(9, 10)  # 11/1024
    0.0107421875
    """
    for name, v in (("correct", correct), ("total", total)):
        if isinstance(v, bool) or not isinstance(v, int):
            raise TypeError(f"{name} must be an int, not {type(v).__name__} {v!r}")
    if total < 0:
        raise ValueError(f"total={total!r} must be at least 0")
    if not 0 <= correct <= total:
        raise ValueError(f"correct={correct!r} must lie between 0 and total={total!r}")
    if correct == 0:
        return 1.0
    # Sum the shorter tail exactly, each term from the one before (C(n, i+1) =
    # C(n, i)·(n − i)/(i + 1), exact in integers): linear in the trials, where one
    # math.comb per term was quadratic (30,000 trials took 20 s).
    if correct > total // 2:
        tail = _comb_sum(total, correct, total)
    else:
        tail = (1 << total) - _comb_sum(total, 0, correct - 1)
    return tail / (1 << total)  # int / int: correctly rounded


def _comb_sum(n, lo, hi):
    """sum(C(n, i) for i in lo..hi), exactly."""
    term = math.comb(n, lo)
    total = term
    for i in range(lo, hi):
        term = term * (n - i) // (i + 1)
        total += term
    return total


def load_results(path):
    """Read a results file saved by the listening page.

    Returns
    -------
    dict

    Raises
    ------
    InputError
        If the file is missing, not JSON, or not a results file.
    """
    p = os.fspath(path)
    try:
        if os.path.getsize(p) > MAX_RESULTS_BYTES:
            raise InputError(f"{p!r} is larger than {MAX_RESULTS_BYTES >> 20} MiB, far more than "
                             "a listening page saves; give the file saved by the page")
        with open(p, encoding="utf-8") as fh:
            data = json.load(fh)
    except FileNotFoundError:
        raise InputError(f"{p!r}: no such file; give the JSON saved by the listening "
                         "page") from None
    except IsADirectoryError:
        raise InputError(f"{p!r} is a folder; give the JSON file saved by the listening "
                         "page") from None
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"{p!r} is not valid JSON ({exc}); give the file saved by the "
                         "listening page") from None
    except RecursionError:
        raise InputError(f"{p!r} is nested too deeply to be a results file; give the file "
                         "saved by the listening page") from None
    except OSError as exc:
        raise InputError(f"{p!r} cannot be read ({exc.strerror or exc})") from None
    if not isinstance(data, dict) or data.get("format") != RESULTS_FORMAT:
        raise InputError(f"{p!r} is not a listening-results file (its \"format\" is not "
                         f"{RESULTS_FORMAT!r}); give the file saved by the listening page")
    if not isinstance(data.get("trials"), list):
        raise InputError(f"{p!r} has no list of \"trials\"; give the file saved by the "
                         "listening page")
    if len(data["trials"]) > MAX_TRIALS:
        raise InputError(f"{p!r} holds {len(data['trials'])} trials, more than the {MAX_TRIALS} "
                         "requant scores from one file")
    if data.get("version", 1) not in RESULTS_VERSIONS:
        raise InputError(f"{p!r} is a results file of version {data.get('version')!r}, which "
                         "this requant does not know; score it with the requant that made the kit")
    read_seed(data)  # refuse a damaged seed here, in one line
    return data


def read_seed(results):
    """The kit's seed as saved in a results file, in either form.

    Parameters
    ----------
    results : dict
        As returned by :func:`load_results`.

    Returns
    -------
    seed : int or None
        None when the file names no seed.
    exact : bool
        False when the seed was saved as a JSON number above 2**53 (pages
        before version 2): a browser stores it as a double, so its last digits
        may have been lost.

    Raises
    ------
    InputError
        For a seed that is neither a whole number nor a string of decimal digits.
    """
    kit = results.get("kit")
    seed = kit.get("seed") if isinstance(kit, dict) else None
    if seed is None:
        return None, True
    if isinstance(seed, str) and seed.isascii() and seed.isdigit():
        return int(seed), True
    if isinstance(seed, int) and not isinstance(seed, bool) and seed >= 0:
        return seed, seed <= _EXACT_LIMIT
    raise InputError(f"the kit's seed {seed!r} is not a whole number; the results file is "
                     "damaged")


def score_results(results):
    """Count right answers per comparison and attach the p-value.

    A trial is right when its ``answer`` equals its ``x`` (both ``"A"`` or
    ``"B"``); the stored ``correct`` flag is checked against that.

    Parameters
    ----------
    results : dict
        As returned by :func:`load_results`.

    Returns
    -------
    list of dict
        One per comparison, in order of first trial: ``comparison`` (id),
        ``label``, ``correct``, ``total``, ``p_value``.

    Raises
    ------
    InputError
        For a trial that is malformed or inconsistent.
    """
    labels = results.get("comparisons") or {}
    rows = {}
    for i, t in enumerate(results["trials"], 1):
        if not isinstance(t, dict):
            raise InputError(f"trial {i} is not an object; the results file is damaged")
        cid, x, ans = t.get("comparison"), t.get("x"), t.get("answer")
        if not isinstance(cid, str) or x not in ("A", "B") or ans not in ("A", "B"):
            raise InputError(f"trial {i} lacks a comparison, or its x/answer are not 'A' or 'B' "
                             f"(x={x!r}, answer={ans!r}); the results file is damaged")
        right = x == ans
        if "correct" in t and t["correct"] is not right:
            raise InputError(f"trial {i} says correct={t['correct']!r} but x={x!r} and "
                             f"answer={ans!r}; the results file was altered or damaged")
        if cid not in rows:
            info = labels.get(cid) if isinstance(labels, dict) else None
            label = info.get("label") if isinstance(info, dict) else None
            rows[cid] = {"comparison": cid, "label": str(label) if label else cid,
                         "correct": 0, "total": 0}
        rows[cid]["total"] += 1
        rows[cid]["correct"] += int(right)
    out = list(rows.values())
    for r in out:
        r["p_value"] = guessing_p_value(r["correct"], r["total"])
    return out


def format_scores(rows, results=None):
    """Lines for the terminal: the kit (when ``results`` is given), then
    ``label: k/n right, p = ...`` per comparison."""
    lines = []
    if results is not None:
        lines.extend(_kit_lines(results))
    if not rows:
        return "\n".join(lines + ["no trials were answered; nothing to score"])
    for r in rows:
        lines.append(f"{_printable(r['label'])}: {r['correct']}/{r['total']} correct, "
                     f"p = {r['p_value']:.4g}")
    lines.append("p: the chance of scoring at least this well by guessing "
                 "(one-sided binomial, 1/2 per trial).")
    return "\n".join(lines)


def _kit_lines(results):
    kit = results.get("kit") if isinstance(results.get("kit"), dict) else {}
    seed, exact = read_seed(results)
    parts = [_printable(kit["source"])] if kit.get("source") else []
    if seed is not None:
        parts.append(f"seed {seed}")
    lines = [f"kit {_printable(kit.get('id', '?'))}: " + ", ".join(parts)] if parts else []
    if not exact:
        lines.append("note: the seed was saved as a number above 2^53 by an older page; its "
                     "last digits may be wrong (figures.json beside the page has it exactly)")
    session = results.get("session")
    if isinstance(session, dict) and session.get("hide_answers"):
        lines.append(f"session: answers hidden until the end; "
                     f"{_printable(session.get('answered', '?'))} of "
                     f"{_printable(session.get('planned_trials', '?'))} trials answered")
    return lines
