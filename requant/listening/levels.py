"""Levels for listening: fades, the cap, gains for error renders and quiet passages,
loudness and the level plan of a comparison, the check that a render differs
from the original only by its error, and the search for the quietest passage.

Levels are in dBFS per AES17 (a full-scale sine is 0 dBFS): a mean square ``p``
is ``10*log10(2*p)`` dBFS; peaks are ``20*log10(|x|)`` dBFS.
"""

import math

import numpy as np

from requant.dsp.cap import (
    CAP_DBFS,
    ERROR_TARGET_DBFS,
    MAX_GAIN_DB,
    cap_value,
    hard_limit,
    noise_dbfs,
    raise_to_target_db,
)
from requant.errors import InputError
from requant.listening.excerpt import QUIET_SECONDS

__all__ = ["CAP_DBFS", "FADE_SECONDS", "ERROR_TARGET_DBFS", "MAX_GAIN_DB", "QUIET_TARGET_DBFS",
           "QUIET_SECONDS", "QUIET_FLOOR_BELOW_NOISE_DB", "QUIET_CHUNK_SECONDS",
           "LEVEL_MATCH_FACTOR", "LOUDNESS_TOLERANCE_DB", "MAX_MATCH_DB", "CROSSFADE_SECONDS",
           "STATED_FADE_SECONDS", "cap_value", "fade_envelope", "apply_fades", "hard_limit",
           "rounding_noise_dbfs", "error_render_gain_db", "quiet_gain_db", "level_match",
           "measure_level", "level_in", "plan_levels", "quiet_floor_dbfs",
           "find_quiet_passage", "db_power", "db_peak", "chunk_mean_squares",
           "find_quiet_in_file"]


#: Length of the raised-cosine fade at each edge of every render, s.
FADE_SECONDS = 0.05


#: Level the loudest tenth of a second of the quiet passage is raised towards, dBFS RMS.
QUIET_TARGET_DBFS = -24.0


#: A 0.1 s chunk counts as silent below the target's rounding-noise RMS minus this, dB.
QUIET_FLOOR_BELOW_NOISE_DB = 20.0


#: Chunk length of the quiet-passage search, s.
QUIET_CHUNK_SECONDS = 0.1


#: A render differs from the original only by its error when
#: |RMS(render) - RMS(original)| <= this × predicted error RMS.
LEVEL_MATCH_FACTOR = 2.0


#: Players one can switch between within a comparison play within this of each other:
#: ITU-R BS.1770-4 integrated loudness, or RMS where that is undefined, dB.
LOUDNESS_TOLERANCE_DB = 1.0


#: Most attenuation the page applies to bring players within the tolerance, dB; players
#: further apart keep their levels, and the page states the difference.
MAX_MATCH_DB = 40.0


#: Crossfade when switching between players of matched loudness, s.
CROSSFADE_SECONDS = 0.04


#: Fade when switching to or from a player whose level differs by a stated amount, s.
STATED_FADE_SECONDS = 0.6


def db_power(ms):
    """Mean square -> dBFS (AES17); None for zero."""
    return None if ms <= 0.0 else 10.0 * math.log10(2.0 * ms)


def db_peak(peak):
    return None if peak <= 0.0 else 20.0 * math.log10(peak)


def fade_envelope(frames, *, fade_frames):
    """Gain curve with a raised-cosine fade-in and fade-out.

    Parameters
    ----------
    frames : int
        Length of the render.
    fade_frames : int, >= 0
        Length of each fade; at most ``frames // 2``.

    Returns
    -------
    ndarray, float64, (frames,)
        ``w[n] = sin²(π (n + 1/2) / (2 L))`` over the first ``L`` frames, its
        mirror image over the last ``L``, 1 in between. Neither end reaches
        exactly 0 or 1, and ``w[n] + w[L-1-n] = 1``.
    """
    fade_frames = int(min(max(fade_frames, 0), frames // 2))
    w = np.ones(int(frames), dtype=np.float64)
    if fade_frames:
        n = np.arange(fade_frames)
        ramp = np.sin(np.pi * (n + 0.5) / (2 * fade_frames)) ** 2
        w[:fade_frames] = ramp
        w[frames - fade_frames:] = ramp[::-1]
    return w


def apply_fades(x, sample_rate, *, fade_seconds=FADE_SECONDS):
    """Fade both edges of ``x`` and round to float32.

    Parameters
    ----------
    x : ndarray, (frames, channels), full scale 1.0
    sample_rate : float, Hz
    fade_seconds : float, s

    Returns
    -------
    faded : ndarray, float32, (frames, channels)
        The samples every render starts from.
    fade_frames : int
    """
    frames = x.shape[0]
    fade_frames = int(min(round(fade_seconds * sample_rate), frames // 2))
    w = fade_envelope(frames, fade_frames=fade_frames)
    return np.ascontiguousarray(x * w[:, None], dtype=np.float32), fade_frames


def rounding_noise_dbfs(bits):
    """Level of plain rounding noise (Δ²/12) at ``bits``, dBFS RMS (AES17).

    16 bits: -98.09 dBFS, the familiar 6.02·N + 1.76 dB below a full-scale sine.
    """
    return noise_dbfs(1.0 / 12.0, bits)


def error_render_gain_db(bits, *, target_dbfs=ERROR_TARGET_DBFS, max_gain_db=MAX_GAIN_DB):
    """Gain of the error renders: plain rounding noise of ``bits`` plays at ``target_dbfs``.

    Parameters
    ----------
    bits : int, 1..32
    target_dbfs : float, dBFS RMS
    max_gain_db : float, dB

    Returns
    -------
    float, dB
        ``min(target_dbfs - rounding_noise_dbfs(bits), max_gain_db)``. At
        few bits this is negative: the error is loud already and is turned down.
    """
    return raise_to_target_db(1.0 / 12.0, bits, target_dbfs=target_dbfs, max_gain_db=max_gain_db)


def quiet_gain_db(loudest_dbfs, *, target_dbfs=QUIET_TARGET_DBFS, max_gain_db=MAX_GAIN_DB):
    """Gain applied to the original quiet passage, dB.

    Parameters
    ----------
    loudest_dbfs : float, dBFS RMS
        Level of the loudest chunk (:data:`QUIET_CHUNK_SECONDS`) of the passage.
        A fade tail spans tens of dB; its loudest part sets the gain so that
        the limiter has nothing to do in normal cases.
    target_dbfs : float, dBFS RMS
    max_gain_db : float, dB

    Returns
    -------
    float, dB
        ``target_dbfs - loudest_dbfs``, never more than ``max_gain_db`` and
        never below 0 (the passage is never turned down). Each render of the
        passage starts from the same gain and is then brought to the raised
        original's loudness (:func:`plan_levels`, ``render.py``).
    """
    return max(0.0, min(target_dbfs - loudest_dbfs, max_gain_db))


def measure_level(x, sample_rate):
    """Loudness and RMS of a signal as it will play.

    Parameters
    ----------
    x : ndarray, (frames, channels), full scale 1.0
    sample_rate : float, Hz

    Returns
    -------
    dict
        ``lufs``: ITU-R BS.1770-4 integrated loudness, LUFS, None when undefined
        (:func:`requant.dsp.loudness.integrated_loudness`, every channel weighted
        1.0); ``rms_dbfs``: AES17 RMS of all channels, None for digital silence.
    """
    from requant.dsp.loudness import integrated_loudness

    x = np.asarray(x, dtype=np.float64)
    ms = float(np.mean(x * x)) if x.size else 0.0
    return {"lufs": integrated_loudness(x, sample_rate) if x.size else None,
            "rms_dbfs": db_power(ms)}


def level_in(levels, measure):
    """The value of a :func:`measure_level` result in ``measure`` ('LUFS' or 'dBFS RMS')."""
    return levels["lufs"] if measure == "LUFS" else levels["rms_dbfs"]


def plan_levels(players, *, tolerance_db=LOUDNESS_TOLERANCE_DB, max_match_db=MAX_MATCH_DB):
    """How the players of one comparison play, so that none jumps in loudness.

    The rule: every player one can switch between plays within
    ``tolerance_db`` of the others, or its difference is stated before it
    plays (and the page fades when switching to or from it). Players already
    within the tolerance play as written; otherwise each is turned down to
    the quietest (playback attenuation, never more than ``max_match_db``).

    Parameters
    ----------
    players : sequence of dict
        In order, the first being the reference: ``player`` (id), ``lufs``,
        ``rms_dbfs`` (:func:`measure_level`) and ``stated`` (True for a player
        whose difference is the point, like an error render: never matched,
        always stated).

    Returns
    -------
    dict
        ``measure``: 'LUFS' when every non-silent player has a loudness, else
        'dBFS RMS'; ``tolerance_db``; ``matched``: whether every player not
        stated plays within the tolerance; ``spread_db``: the largest
        difference between those players as written; ``players``: per player
        ``player``, ``level`` (as written), ``gain_db`` (applied when playing,
        <= 0), ``played`` (level + gain), ``difference_db`` (played minus the
        reference as played; None if either is silent) and ``state``
        ('matched', 'stated' or 'silent').
    """
    players = list(players)
    live = [p for p in players if p["rms_dbfs"] is not None]
    measure = "LUFS" if all(p["lufs"] is not None for p in live) else "dBFS RMS"
    core = [p for p in live if not p["stated"]]
    vals = [level_in(p, measure) for p in core]
    spread = (max(vals) - min(vals)) if vals else 0.0
    matched = spread <= tolerance_db
    gains = dict.fromkeys((p["player"] for p in players), 0.0)
    if not matched and spread <= max_match_db:
        for p, v in zip(core, vals):
            gains[p["player"]] = min(vals) - v
        matched = True
    rows = []
    for p in players:
        level = level_in(p, measure)
        state = ("silent" if level is None else
                 "stated" if p["stated"] or not matched else "matched")
        rows.append({"player": p["player"], "level": level, "gain_db": gains[p["player"]],
                     "played": None if level is None else level + gains[p["player"]],
                     "state": state})
    ref = rows[0]["played"]
    for r in rows:
        r["difference_db"] = (None if r["played"] is None or ref is None
                              else r["played"] - ref)
    return {"measure": measure, "tolerance_db": tolerance_db, "matched": matched,
            "spread_db": spread, "players": rows}


def level_match(x, y, *, bits, predicted_power_lsb2, factor=LEVEL_MATCH_FACTOR):
    """Check that a render differs from the original only by requantization error.

    The renders get no gain, so ``y = x + ε`` and, by Minkowski's inequality,
    ``|RMS(y) - RMS(x)| <= RMS(ε)``. The check allows ``factor`` times the
    *predicted* error RMS: it fails if any gain or extra processing touched
    the render, or if the error is far above its prediction (clipping).

    Parameters
    ----------
    x, y : ndarray, full scale 1.0
        Original and render, the same shape.
    bits : int
    predicted_power_lsb2 : float, LSB²
    factor : float

    Returns
    -------
    dict
        ``original_rms_dbfs``, ``render_rms_dbfs``, ``difference_db``
        (render minus original), ``difference_lsb`` (of RMS), ``tolerance_lsb``,
        ``tolerance_db`` (the largest level rise allowed), ``consistent``
        (the difference is within the tolerance). This is not a loudness
        match: at few bits the error itself makes a render louder
        (:func:`plan_levels` decides how renders play).
    """
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    delta = 2.0 ** -(bits - 1)
    ms_x = float(np.mean(x * x)) if x.size else 0.0
    ms_y = float(np.mean(y * y)) if y.size else 0.0
    rx, ry = math.sqrt(ms_x), math.sqrt(ms_y)
    tol = factor * math.sqrt(predicted_power_lsb2) * delta
    diff = ry - rx
    return {
        "original_rms_dbfs": db_power(ms_x),
        "render_rms_dbfs": db_power(ms_y),
        "difference_db": (20.0 * math.log10(ry / rx)) if rx > 0 and ry > 0 else None,
        "difference_lsb": diff / delta,
        "tolerance_lsb": tol / delta,
        "tolerance_db": 20.0 * math.log10(1.0 + tol / rx) if rx > 0 else None,
        "consistent": bool(abs(diff) <= tol),
    }


def quiet_floor_dbfs(bits, *, below_db=QUIET_FLOOR_BELOW_NOISE_DB):
    """Level below which a chunk counts as silence for the quiet-passage search, dBFS RMS."""
    return rounding_noise_dbfs(bits) - below_db


def chunk_mean_squares(x, chunk):
    n = x.shape[0] // chunk
    if n == 0:
        return np.zeros(0)
    x = np.asarray(x[: n * chunk], dtype=np.float64)
    return np.mean(x.reshape(n, chunk, -1) ** 2, axis=(1, 2))


def _pick_quiet(chunk_ms, window, floor_ms):
    """Index of the first chunk of the quietest all-non-silent window, or None."""
    ms = np.asarray(chunk_ms, dtype=np.float64)
    if window < 1 or ms.size < window:
        return None
    loud = ms >= floor_ms
    ok = np.convolve(loud.astype(np.int64), np.ones(window, dtype=np.int64), "valid") == window
    if not ok.any():
        return None
    sums = np.convolve(ms, np.ones(window), "valid")
    sums[~ok] = np.inf
    return int(np.argmin(sums))


def find_quiet_passage(x, sample_rate, *, seconds=QUIET_SECONDS, floor_dbfs,
                       chunk_seconds=QUIET_CHUNK_SECONDS):
    """Find the quietest stretch of ``x`` in which nothing is silent.

    The signal is cut into chunks of ``chunk_seconds``; a chunk is silent when
    its RMS (all channels) is below ``floor_dbfs``. Among the stretches of
    ``seconds`` made of whole chunks, none of them silent, the one with the
    least energy is chosen. In a fade into digital silence that is the
    stretch ending where the fade sinks below the floor.

    Parameters
    ----------
    x : ndarray, (frames,) or (frames, channels), full scale 1.0
    sample_rate : float, Hz
    seconds : float, s
        Length of the stretch (shortened to the signal if longer).
    floor_dbfs : float, dBFS RMS
        Silence threshold; :func:`quiet_floor_dbfs` gives the one used by the kit.
    chunk_seconds : float, s

    Returns
    -------
    (start_frame, frames) or None
        None when no stretch qualifies (the signal is silent throughout).
    """
    x = np.asarray(x)
    if x.ndim == 1:
        x = x[:, None]
    chunk = max(1, int(round(chunk_seconds * sample_rate)))
    ms = chunk_mean_squares(x, chunk)
    return _quiet_from_chunks(ms, chunk, sample_rate, seconds, floor_dbfs)


def _quiet_from_chunks(ms, chunk, sample_rate, seconds, floor_dbfs):
    window = max(1, min(int(round(seconds * sample_rate / chunk)), ms.size))
    floor_ms = 10.0 ** (floor_dbfs / 10.0) / 2.0
    i = _pick_quiet(ms, window, floor_ms)
    if i is None:
        return None
    return i * chunk, window * chunk


def find_quiet_in_file(f, *, seconds, floor_dbfs, chunk_seconds=QUIET_CHUNK_SECONDS):
    """:func:`find_quiet_passage` over an open SoundFile, reading it in blocks."""
    rate = f.samplerate
    chunk = max(1, int(round(chunk_seconds * rate)))
    per_block = max(1, 65536 // chunk) * chunk
    parts = []
    f.seek(0)
    while True:
        x = f.read(per_block, dtype="float64", always_2d=True)
        if x.shape[0] == 0:
            break
        if not np.all(np.isfinite(x)):
            raise InputError(f"{f.name!r} holds NaN or infinite samples; repair the source "
                             "and run again")
        parts.append(chunk_mean_squares(x, chunk))
        if x.shape[0] < per_block:
            break
    ms = np.concatenate(parts) if parts else np.zeros(0)
    return _quiet_from_chunks(ms, chunk, rate, seconds, floor_dbfs)


