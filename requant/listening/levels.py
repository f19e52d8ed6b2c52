"""Levels for listening: fades, the cap, gains for error renders and quiet passages,
the level-match check, and the search for the quietest passage.

Levels are in dBFS per AES17 (a full-scale sine is 0 dBFS): a mean square ``p``
is ``10*log10(2*p)`` dBFS; peaks are ``20*log10(|x|)`` dBFS.
"""

import math

import numpy as np

from requant.errors import InputError
from requant.listening.excerpt import QUIET_SECONDS

__all__ = ["CAP_DBFS", "FADE_SECONDS", "ERROR_TARGET_DBFS", "MAX_GAIN_DB", "QUIET_TARGET_DBFS",
           "QUIET_SECONDS", "QUIET_FLOOR_BELOW_NOISE_DB", "QUIET_CHUNK_SECONDS",
           "LEVEL_MATCH_FACTOR", "cap_value", "fade_envelope", "apply_fades", "hard_limit",
           "rounding_noise_dbfs", "error_render_gain_db", "quiet_gain_db", "level_match",
           "quiet_floor_dbfs", "find_quiet_passage", "db_power", "db_peak",
           "chunk_mean_squares", "find_quiet_in_file"]


#: Hard limit on every raised render (error renders, quiet passage), dBFS sample peak.
CAP_DBFS = -6.0


#: Length of the raised-cosine fade at each edge of every render, s.
FADE_SECONDS = 0.05


#: Level at which plain rounding noise (Δ²/12) of the target word length plays in
#: the error renders, dBFS RMS. Other methods play above or below it by their
#: own noise power, so their loudness can be compared.
ERROR_TARGET_DBFS = -40.0


#: Most gain applied to any render, dB.
MAX_GAIN_DB = 120.0


#: Level the loudest tenth of a second of the quiet passage is raised towards, dBFS RMS.
QUIET_TARGET_DBFS = -24.0




#: A 0.1 s chunk counts as silent below the target's rounding-noise RMS minus this, dB.
QUIET_FLOOR_BELOW_NOISE_DB = 20.0


#: Chunk length of the quiet-passage search, s.
QUIET_CHUNK_SECONDS = 0.1


#: Level match holds when |RMS(render) - RMS(original)| <= this × predicted error RMS.
LEVEL_MATCH_FACTOR = 2.0


def db_power(ms):
    """Mean square -> dBFS (AES17); None for zero."""
    return None if ms <= 0.0 else 10.0 * math.log10(2.0 * ms)


def db_peak(peak):
    return None if peak <= 0.0 else 20.0 * math.log10(peak)


def cap_value(cap_dbfs=CAP_DBFS):
    """The largest float32 magnitude that does not exceed ``cap_dbfs``.

    Returns
    -------
    numpy.float32
        ``10**(cap_dbfs/20)`` rounded down to float32, so that the written
        32-bit float samples never read above the cap.
    """
    exact = 10.0 ** (cap_dbfs / 20.0)
    c = np.float32(exact)
    while float(c) > exact:
        c = np.nextafter(c, np.float32(0.0))
    return c


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


def hard_limit(x, *, cap_dbfs=CAP_DBFS):
    """Clip to the cap and return float32 samples whose peak is <= the cap.

    Returns
    -------
    y : ndarray, float32
    limited : int
        Samples that had to be clipped.
    """
    c = cap_value(cap_dbfs)
    x = np.asarray(x, dtype=np.float64)
    limited = int(np.count_nonzero(np.abs(x) > float(c)))
    y = np.clip(x, -float(c), float(c)).astype(np.float32)
    np.clip(y, -c, c, out=y)  # the cast could round a clipped value up
    return y, limited


def rounding_noise_dbfs(bits):
    """Level of plain rounding noise (Δ²/12) at ``bits``, dBFS RMS (AES17).

    16 bits: -98.09 dBFS, the familiar 6.02·N + 1.76 dB below a full-scale sine.
    """
    delta = 2.0 ** -(bits - 1)
    return db_power(delta * delta / 12.0)


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
    return min(target_dbfs - rounding_noise_dbfs(bits), max_gain_db)


def quiet_gain_db(loudest_dbfs, *, error_gain_db, target_dbfs=QUIET_TARGET_DBFS):
    """Gain applied to the quiet passage after requantization, dB.

    Parameters
    ----------
    loudest_dbfs : float, dBFS RMS
        Level of the loudest chunk (:data:`QUIET_CHUNK_SECONDS`) of the passage.
        A fade tail spans tens of dB; its loudest part sets the gain so that
        the limiter has nothing to do in normal cases.
    error_gain_db : float, dB
        The error renders' gain (:func:`error_render_gain_db`).
    target_dbfs : float, dBFS RMS

    Returns
    -------
    float, dB
        ``target_dbfs - loudest_dbfs``, but never more than ``error_gain_db``
        (the requantization noise then plays no louder than in the error
        renders) and never below 0 (the passage is never turned down).
    """
    want = target_dbfs - loudest_dbfs
    return max(0.0, min(want, error_gain_db, MAX_GAIN_DB))


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
        ``tolerance_db`` (the largest level rise allowed), ``matched``.
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
        "matched": bool(abs(diff) <= tol),
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


