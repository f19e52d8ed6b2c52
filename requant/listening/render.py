"""Rendering a listening kit's files: one method on the excerpt, written and verified."""

import math
from dataclasses import dataclass

import numpy as np

from requant.dsp.analysis import analyze_arrays
from requant.dsp.quantizer import Requantizer, predicted_error_power_lsb2
from requant.errors import InputError, OutputError
from requant.listening.levels import (
    LOUDNESS_TOLERANCE_DB,
    MAX_GAIN_DB,
    QUIET_CHUNK_SECONDS,
    QUIET_TARGET_DBFS,
    apply_fades,
    chunk_mean_squares,
    db_peak,
    db_power,
    hard_limit,
    level_in,
    level_match,
    measure_level,
    quiet_gain_db,
)

__all__ = ["container_bits", "render_method", "read_excerpt", "write_wav", "verify", "jsonable",
           "quiet_setup", "quiet_render_gain_db", "Material", "render_one"]


def container_bits(bits):
    """The WAV container of a kit's renders: 16, 24 or 32 bits."""
    return 16 if bits <= 16 else 24 if bits <= 24 else 32


def _subtype(bits):
    return {16: "PCM_16", 24: "PCM_24", 32: "PCM_32"}[container_bits(bits)]


def render_method(x, recipe, *, coeffs=(), sample_rate):
    """Requantize the faded excerpt with one method's recipe.

    Parameters
    ----------
    x : ndarray, float32, (frames, channels)
        The faded excerpt (:func:`~requant.listening.levels.apply_fades`).
    recipe : requant.recipe.Recipe
        The method's recipe, with its seed.
    coeffs : sequence of float
        The recipe's shaping coefficients at the excerpt's rate.
    sample_rate : int, Hz
        The excerpt's rate (the recipe's shortest silent run is in ms).

    Returns
    -------
    codes : ndarray, int16 or int32
        Left-justified codes for a 16-, 24- or 32-bit container.
    y : ndarray, float64
        The requantized signal, full scale 1.0 (exactly what the file reads back as).
    err : ndarray, float64
        ``y - x``.
    """
    rq = Requantizer.from_recipe(recipe, x.shape[1], coeffs=coeffs,
                                 container_bits=container_bits(recipe.bits),
                                 sample_rate=sample_rate)
    codes = rq.run_all(np.ascontiguousarray(x))
    full = 32768.0 if codes.dtype == np.int16 else 2.0**31
    y = codes.astype(np.float64) / full
    return codes, y, y - x.astype(np.float64)


def read_excerpt(f, start_frame, frames):
    f.seek(start_frame)
    x = f.read(frames, dtype="float64", always_2d=True)
    if not np.all(np.isfinite(x)):
        bad = np.argwhere(~np.isfinite(x))[0]
        t = (start_frame + int(bad[0])) / f.samplerate
        raise InputError(f"{f.name!r} has a NaN or infinite sample at {t:.6f} s; repair the "
                         "source and run again")
    return x


def write_wav(path, data, rate, subtype):
    import soundfile as sf

    try:
        sf.write(path, data, rate, subtype=subtype, format="WAV")
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        raise OutputError(f"writing {path!r} failed ({exc}); check the destination "
                          "folder") from None


def verify(path, expected):
    """Read a written render back and require it to hold exactly ``expected``."""
    import soundfile as sf

    got, _ = sf.read(path, dtype="float64", always_2d=True)
    if got.shape != expected.shape or not np.array_equal(got, expected):
        raise OutputError(f"{path!r} did not read back exactly as written; the kit was not "
                          "saved (check the disk and run again)")
    return got


def _analyze(x, err, rate, recipe, coeffs):
    res = analyze_arrays(x, err, rate, bits=recipe.bits, quantizer=recipe.quantizer,
                         dither=recipe.dither, coeffs=coeffs)
    keep = ("snr_db", "error_power_lsb2", "a_weighted_noise_dbfs", "itu468_noise_dbfs",
            "predicted_a_weighted_noise_dbfs", "predicted_itu468_noise_dbfs",
            "correlated_error_fraction", "signal_correlated", "warnings")
    out = {k: res.get(k) for k in keep}
    out["signal_correlated"] = bool(out["signal_correlated"])
    out["warnings"] = [str(w) for w in (out["warnings"] or [])]
    return jsonable(out)


def jsonable(obj):
    """Plain Python numbers (non-finite floats become None) for JSON."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if math.isfinite(v) else None
    return obj


def quiet_setup(quiet_x, rate):
    """Fade the quiet passage, choose its gain, raise the original.

    Returns
    -------
    qx : ndarray, float32
        The faded passage, as requantized.
    gain : float
        The original's linear gain.
    raised : ndarray, float32
        The raised, capped original, as written.
    info : dict
        Its figures for ``figures.json``.
    """
    qx, _ = apply_fades(quiet_x, rate)
    chunk = max(1, int(round(QUIET_CHUNK_SECONDS * rate)))
    chunks = chunk_mean_squares(quiet_x, chunk)
    loudest = db_power(float(np.max(chunks)))
    g_db = quiet_gain_db(loudest)
    g = 10.0 ** (g_db / 20.0)
    raised, limited = hard_limit(qx.astype(np.float64) * g)
    info = {
        "rms_dbfs": db_power(float(np.mean(qx.astype(np.float64) ** 2))),
        "loudest_chunk_dbfs": loudest,
        "quietest_chunk_dbfs": db_power(float(np.min(chunks))),
        "gain_db": g_db,
        "gain_rule": (f"the loudest {QUIET_CHUNK_SECONDS:g} s of the original plays at "
                      f"{QUIET_TARGET_DBFS:.0f} dBFS RMS (never below 0 dB, at most "
                      f"{MAX_GAIN_DB:.0f} dB); each render starts from the same gain and, if "
                      f"it would then play more than {LOUDNESS_TOLERANCE_DB:g} dB louder or "
                      "quieter than the raised original, is raised by its own stated gain "
                      "instead, to the original's loudness"),
        "original_limited_samples": limited,
        "original_peak_dbfs": db_peak(float(np.max(np.abs(raised)))),
        **measure_level(raised, rate),
    }
    return qx, g, raised, info


@dataclass(frozen=True)
class Material:
    """What every method's render shares: the faded excerpt and how renders are raised.

    Attributes
    ----------
    x : ndarray, float32
        The faded excerpt, as requantized.
    orig : ndarray, float64
        The same, as read back from ``original.wav``.
    rate : int, Hz
    env : ndarray
        The fade envelope, (frames, 1).
    gain : float
        The error renders' linear gain.
    quiet : (ndarray, float, dict) or None
        The faded quiet passage, the original's linear gain and the raised
        original's :func:`~requant.listening.levels.measure_level`, when rendered.
    """

    x: np.ndarray
    orig: np.ndarray
    rate: int
    env: np.ndarray
    gain: float
    quiet: tuple | None


def render_one(method, recipe, coeffs, *, key, files, material):
    """Render, write and verify one method's files; return its figures row.

    ``files`` is ``(names, temporary paths)``, both keyed by ``key``,
    ``key_error`` and ``key_quiet``.
    """
    names, tmp = files
    mat = material
    bits = recipe.bits
    predicted = predicted_error_power_lsb2(recipe.quantizer, recipe.dither, coeffs)
    codes, y, err = render_method(mat.x, recipe, coeffs=coeffs, sample_rate=mat.rate)
    write_wav(tmp[key], codes, mat.rate, _subtype(bits))
    del codes
    y = verify(tmp[key], y)
    level = level_match(mat.orig, y, bits=bits, predicted_power_lsb2=predicted)
    loudness = measure_level(y, mat.rate)
    del y
    err_r, limited = hard_limit(err * mat.env * mat.gain)
    write_wav(tmp[f"{key}_error"], err_r, mat.rate, "FLOAT")
    peak = float(np.max(np.abs(err_r))) if err_r.size else 0.0
    err_loudness = measure_level(err_r, mat.rate)
    del err_r
    figures = _analyze(mat.orig, err, mat.rate, recipe, coeffs)
    del err
    row = {
        "id": key,
        "method": method.label,
        "bits": bits,
        "quantizer": method.quantizer,
        "dither": method.dither,
        "shaping": method.shaping,
        "coefficients": [float(v) for v in coeffs],
        "file": names[key],
        "error_file": names[f"{key}_error"],
        "predicted_error_power_lsb2": predicted,
        "predicted_error_dbfs": db_power(predicted * 4.0 ** -(bits - 1)),
        "figures": figures,
        "level": level,
        **loudness,
        "error_render": {
            "gain_db": 20.0 * math.log10(mat.gain),
            "peak_dbfs": db_peak(peak),
            "limited_samples": limited,
            "limited_fraction": limited / max(mat.x.size, 1),
            **err_loudness,
        },
        "quiet": None,
    }
    if mat.quiet is not None:
        row["quiet"] = _render_quiet(recipe, coeffs, key=key, files=files, material=mat,
                                     predicted=predicted)
    return row


def quiet_render_gain_db(qy, rate, *, shared_gain_db, original):
    """The gain of one method's quiet render, and what it would play at the shared gain.

    Parameters
    ----------
    qy : ndarray
        The requantized quiet passage (not raised).
    rate : float, Hz
    shared_gain_db : float, dB
        The original quiet passage's gain.
    original : dict
        The raised original's :func:`~requant.listening.levels.measure_level`.

    Returns
    -------
    gain_db : float, dB
        ``shared_gain_db``, unless the render raised by it would play more than
        :data:`~requant.listening.levels.LOUDNESS_TOLERANCE_DB` from the raised
        original: then the gain that brings it to the original's loudness
        (at most :data:`~requant.listening.levels.MAX_GAIN_DB`).
    measure : str
        'LUFS' or 'dBFS RMS' (RMS when either loudness is undefined).
    difference_db : float or None, dB
        The render at the shared gain minus the raised original.
    """
    at_shared = measure_level(qy * 10.0 ** (shared_gain_db / 20.0), rate)
    measure = ("LUFS" if at_shared["lufs"] is not None and original["lufs"] is not None
               else "dBFS RMS")
    mine, theirs = level_in(at_shared, measure), level_in(original, measure)
    if mine is None or theirs is None:
        return shared_gain_db, measure, None
    diff = mine - theirs
    if abs(diff) <= LOUDNESS_TOLERANCE_DB:
        return shared_gain_db, measure, diff
    return min(shared_gain_db - diff, MAX_GAIN_DB), measure, diff


def _render_quiet(recipe, coeffs, *, key, files, material, predicted):
    """The quiet passage requantized with one method, then raised and capped."""
    names, tmp = files
    qx, q_gain, original = material.quiet
    _, qy, _ = render_method(qx, recipe, coeffs=coeffs, sample_rate=material.rate)
    shared_db = 20.0 * math.log10(q_gain)
    gain_db, measure, diff = quiet_render_gain_db(qy, material.rate, shared_gain_db=shared_db,
                                                  original=original)
    raised, q_limited = hard_limit(qy * 10.0 ** (gain_db / 20.0))
    write_wav(tmp[f"{key}_quiet"], raised, material.rate, "FLOAT")
    return {
        "file": names[f"{key}_quiet"],
        "gain_db": gain_db,
        "own_gain": gain_db != shared_db,
        "measure": measure,
        "difference_at_shared_gain_db": diff,
        "limited_samples": q_limited,
        "peak_dbfs": db_peak(float(np.max(np.abs(raised)))),
        **measure_level(raised, material.rate),
        "level": level_match(qx, qy, bits=recipe.bits, predicted_power_lsb2=predicted),
    }
