"""Listening kit: one excerpt rendered with every method, error signals made
safely audible, a quiet passage raised after requantization, and a single
self-contained page for open A/B listening and blind trials.

What :func:`make_listening_kit` writes into ``OUTDIR``
-----------------------------------------------------
``original.wav``
    The excerpt, with the same short fade at both edges that every render
    gets, as 32-bit float: exactly the samples the requantizer was given.
``mK_<method>.wav`` (program renders)
    The requantized excerpt. Integer PCM holding exactly the requantized
    codes: a 16-bit container for word lengths up to 16, 24-bit up to 24,
    32-bit above (the bits below the word length stay zero). Nothing else
    is done to them: no gain, no limiting, no second fade. So each render
    differs from ``original.wav`` only by the requantization error; this is
    checked on the written files (:func:`level_match`) and stated.
``mK_<method>_error.wav`` (error renders)
    Output minus input, faded like the excerpt, raised by one stated gain
    (the same for every method, so that their levels can be compared; see
    :func:`error_render_gain_db`) and then hard-limited so that no sample
    exceeds :data:`CAP_DBFS` (-6 dBFS). 32-bit float.
``original_quiet.wav``, ``mK_<method>_quiet.wav`` (with ``quiet_passage``)
    The quietest non-silent stretch of the source (:func:`find_quiet_passage`),
    faded, requantized with each method, then raised by a stated gain
    (:func:`quiet_gain_db`) *after* requantization and hard-limited at the
    same cap. 32-bit float.
``figures.json``
    Settings, each method's figures (from :func:`requant.dsp.analysis.analyze_arrays`),
    the level-match check, gains, cap and limiter counts.
``index.html``
    One page, no server, no network: open it from the file system.

Levels are in dBFS per AES17 (a full-scale sine is 0 dBFS): a mean square
``p`` is ``10*log10(2*p)`` dBFS; peaks are ``20*log10(|x|)`` dBFS.
"""

import datetime as _dt
import json
import math
import os
import re
import secrets
from dataclasses import dataclass
from urllib.parse import quote

import numpy as np

from requant.errors import InputError, OutputError, UsageError

__all__ = [
    "Method",
    "METHOD_HEADS",
    "METHOD_SHAPINGS",
    "parse_method",
    "parse_methods",
    "CAP_DBFS",
    "FADE_SECONDS",
    "ERROR_TARGET_DBFS",
    "MAX_GAIN_DB",
    "QUIET_TARGET_DBFS",
    "QUIET_SECONDS",
    "QUIET_FLOOR_BELOW_NOISE_DB",
    "DEFAULT_EXCERPT_SECONDS",
    "MAX_EXCERPT_SECONDS",
    "LEVEL_MATCH_FACTOR",
    "cap_value",
    "fade_envelope",
    "apply_fades",
    "hard_limit",
    "rounding_noise_dbfs",
    "error_render_gain_db",
    "quiet_gain_db",
    "level_match",
    "find_quiet_passage",
    "quiet_floor_dbfs",
    "render_method",
    "render_page",
    "make_listening_kit",
]

#: Heads of a method string and the (quantizer, dither) each stands for.
METHOD_HEADS = {
    "truncate": ("truncate", "none"),
    "round": ("round", "none"),
    "rpdf": ("round", "rpdf"),
    "tpdf": ("round", "tpdf"),
    "tpdf-hp": ("round", "tpdf-hp"),
}
#: Shapings that may follow a ``+``.
METHOD_SHAPINGS = ("first-order", "hearing")

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
#: Default length of the quiet passage, s.
QUIET_SECONDS = 2.0
#: A 0.1 s chunk counts as silent below the target's rounding-noise RMS minus this, dB.
QUIET_FLOOR_BELOW_NOISE_DB = 20.0
#: Chunk length of the quiet-passage search, s.
QUIET_CHUNK_SECONDS = 0.1
#: Default and largest excerpt, s.
DEFAULT_EXCERPT_SECONDS = 30.0
MAX_EXCERPT_SECONDS = 120.0
MIN_EXCERPT_SECONDS = 0.5
#: Level match holds when |RMS(render) - RMS(original)| <= this × predicted error RMS.
LEVEL_MATCH_FACTOR = 2.0

_ALLOWED_FORMS = ("truncate, round, rpdf, tpdf or tpdf-hp, optionally followed by "
                  "+first-order or +hearing (for example tpdf+hearing)")


# ---------------------------------------------------------------------------
# methods


@dataclass(frozen=True)
class Method:
    """One way of requantizing, as named on the command line.

    Attributes
    ----------
    label : str
        The method string in canonical form, e.g. ``'tpdf+hearing'``.
    quantizer : {'round', 'truncate'}
    dither : {'none', 'rpdf', 'tpdf', 'tpdf-hp'}
    shaping : {'none', 'first-order', 'hearing'}
    """

    label: str
    quantizer: str
    dither: str
    shaping: str

    @property
    def slug(self):
        """A file-name-safe form of the label (``tpdf+hearing`` -> ``tpdf_hearing``)."""
        return re.sub(r"[^a-z0-9-]+", "_", self.label)


def parse_method(text):
    """Parse a method string: a quantizer or a dither, optionally ``+`` a shaping.

    Parameters
    ----------
    text : str
        ``truncate``, ``round``, ``rpdf``, ``tpdf``, ``tpdf-hp``, each
        optionally followed by ``+first-order`` or ``+hearing``. A dither
        implies the ``round`` quantizer; ``truncate`` and ``round`` imply no
        dither. Case and surrounding spaces are ignored.

    Returns
    -------
    Method

    Raises
    ------
    TypeError
        If ``text`` is not a str.
    UsageError
        For anything else, in one line that lists the allowed forms.

    Examples
    --------
    >>> parse_method("tpdf+hearing")
    Method(label='tpdf+hearing', quantizer='round', dither='tpdf', shaping='hearing')
    """
    if not isinstance(text, str):
        raise TypeError(f"method must be a str, not {type(text).__name__} {text!r}")
    norm = text.strip().lower()
    head, plus, shaping = norm.partition("+")
    if head not in METHOD_HEADS or (plus and shaping not in METHOD_SHAPINGS):
        raise UsageError(f"unknown method {text!r}: use {_ALLOWED_FORMS}")
    quantizer, dither = METHOD_HEADS[head]
    return Method(label=norm, quantizer=quantizer, dither=dither,
                  shaping=shaping if plus else "none")


def parse_methods(texts):
    """Parse several method strings; refuse an empty list and repeats.

    Returns
    -------
    list of Method
    """
    if isinstance(texts, str):
        texts = [texts]
    methods = [parse_method(t) for t in texts]
    if not methods:
        raise UsageError(f"no method given: name at least one with --method, using "
                         f"{_ALLOWED_FORMS}")
    seen = set()
    for m in methods:
        if m.label in seen:
            raise UsageError(f"method {m.label!r} is given twice; name each method once")
        seen.add(m.label)
    return methods


# ---------------------------------------------------------------------------
# levels, fades, gains, the cap


def _db_power(ms):
    """Mean square -> dBFS (AES17); None for zero."""
    return None if ms <= 0.0 else 10.0 * math.log10(2.0 * ms)


def _db_peak(peak):
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
    return _db_power(delta * delta / 12.0)


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
        "original_rms_dbfs": _db_power(ms_x),
        "render_rms_dbfs": _db_power(ms_y),
        "difference_db": (20.0 * math.log10(ry / rx)) if rx > 0 and ry > 0 else None,
        "difference_lsb": diff / delta,
        "tolerance_lsb": tol / delta,
        "tolerance_db": 20.0 * math.log10(1.0 + tol / rx) if rx > 0 else None,
        "matched": bool(abs(diff) <= tol),
    }


# ---------------------------------------------------------------------------
# the quiet passage


def quiet_floor_dbfs(bits, *, below_db=QUIET_FLOOR_BELOW_NOISE_DB):
    """Level below which a chunk counts as silence for the quiet-passage search, dBFS RMS."""
    return rounding_noise_dbfs(bits) - below_db


def _chunk_mean_squares(x, chunk):
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
    ms = _chunk_mean_squares(x, chunk)
    return _quiet_from_chunks(ms, chunk, sample_rate, seconds, floor_dbfs)


def _quiet_from_chunks(ms, chunk, sample_rate, seconds, floor_dbfs):
    window = max(1, min(int(round(seconds * sample_rate / chunk)), ms.size))
    floor_ms = 10.0 ** (floor_dbfs / 10.0) / 2.0
    i = _pick_quiet(ms, window, floor_ms)
    if i is None:
        return None
    return i * chunk, window * chunk


def _find_quiet_in_file(f, *, seconds, floor_dbfs, chunk_seconds=QUIET_CHUNK_SECONDS):
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
        parts.append(_chunk_mean_squares(x, chunk))
        if x.shape[0] < per_block:
            break
    ms = np.concatenate(parts) if parts else np.zeros(0)
    return _quiet_from_chunks(ms, chunk, rate, seconds, floor_dbfs)


# ---------------------------------------------------------------------------
# rendering


def _container_bits(bits):
    return 16 if bits <= 16 else 24 if bits <= 24 else 32


def _subtype(bits):
    return {16: "PCM_16", 24: "PCM_24", 32: "PCM_32"}[_container_bits(bits)]


def render_method(x, sample_rate, *, bits, method, coeffs=(), seed):
    """Requantize the faded excerpt with one method.

    Parameters
    ----------
    x : ndarray, float32, (frames, channels)
        The faded excerpt (:func:`apply_fades`).
    sample_rate : float, Hz
    bits : int, 1..32
    method : Method
    coeffs : sequence of float
        Shaping coefficients already resolved for ``method.shaping``.
    seed : int

    Returns
    -------
    codes : ndarray, int16 or int32
        Left-justified codes for a 16-, 24- or 32-bit container.
    y : ndarray, float64
        The requantized signal, full scale 1.0 (exactly what the file reads back as).
    err : ndarray, float64
        ``y - x``.
    """
    from requant.dsp.quantizer import Requantizer

    cbits = _container_bits(bits)
    rq = Requantizer(x.shape[1], bits=bits, quantizer=method.quantizer, dither=method.dither,
                     coeffs=coeffs, seed=seed, container_bits=cbits)
    codes, _ = rq.process(np.ascontiguousarray(x), error=False)
    full = 32768.0 if codes.dtype == np.int16 else 2.0**31
    y = codes.astype(np.float64) / full
    return codes, y, y - x.astype(np.float64)


def _read_excerpt(f, start_frame, frames):
    f.seek(start_frame)
    x = f.read(frames, dtype="float64", always_2d=True)
    if not np.all(np.isfinite(x)):
        bad = np.argwhere(~np.isfinite(x))[0]
        t = (start_frame + int(bad[0])) / f.samplerate
        raise InputError(f"{f.name!r} has a NaN or infinite sample at {t:.6f} s; repair the "
                         "source and run again")
    return x


def _check_number(name, value, *, low, high=None, allow_none=False):
    if value is None and allow_none:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise TypeError(f"{name} must be a number of seconds, not {type(value).__name__}")
    v = float(value)
    if not math.isfinite(v) or v < low or (high is not None and v > high):
        rng = f"from {low:g} to {high:g}" if high is not None else f"of at least {low:g}"
        raise UsageError(f"{name}={value!r} is out of range: give a number of seconds {rng}")
    return v


def _fmt(v, spec=".1f", none="n/a"):
    return none if v is None else format(v, spec)


def _write_wav(path, data, rate, subtype):
    import soundfile as sf

    try:
        sf.write(path, data, rate, subtype=subtype, format="WAV")
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        raise OutputError(f"writing {path!r} failed ({exc}); check the destination "
                          "folder") from None


def _verify(path, expected):
    """Read a written render back and require it to hold exactly ``expected``."""
    import soundfile as sf

    got, _ = sf.read(path, dtype="float64", always_2d=True)
    if got.shape != expected.shape or not np.array_equal(got, expected):
        raise OutputError(f"{path!r} did not read back exactly as written; the kit was not "
                          "saved (check the disk and run again)")
    return got


def _analyze(x, err, rate, *, bits, method, coeffs):
    from requant.dsp.analysis import analyze_arrays

    res = analyze_arrays(x, err, rate, bits=bits, quantizer=method.quantizer,
                         dither=method.dither, coeffs=coeffs)
    keep = ("snr_db", "error_power_lsb2", "a_weighted_noise_dbfs", "itu468_noise_dbfs",
            "predicted_a_weighted_noise_dbfs", "predicted_itu468_noise_dbfs",
            "correlated_error_fraction", "signal_correlated", "warnings")
    out = {k: res.get(k) for k in keep}
    out["signal_correlated"] = bool(out["signal_correlated"])
    out["warnings"] = [str(w) for w in (out["warnings"] or [])]
    return _jsonable(out)


def _jsonable(obj):
    """Plain Python numbers (non-finite floats become None) for JSON."""
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if math.isfinite(v) else None
    return obj


def render_page(kit):
    """The listening page for a kit's figures, as HTML text.

    Every value goes through jinja2 with autoescaping; the figures reach the
    page's script only through an escaped ``data-`` attribute, never as
    script text.
    """
    from importlib import resources

    import jinja2

    folder = resources.files("requant") / "templates"
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(folder)), autoescape=True,
                             undefined=jinja2.StrictUndefined, trim_blocks=True,
                             lstrip_blocks=True)
    env.filters["num"] = _fmt
    env.filters["url"] = lambda name: quote(name)
    template = env.get_template("listen.html.j2")
    kit_json = json.dumps(kit, allow_nan=False, ensure_ascii=True, separators=(",", ":"))
    return template.render(kit=kit, kit_json=kit_json)


def _quiet_setup(quiet_x, rate, *, bits, error_gain_db):
    """Fade the quiet passage, choose its gain, raise the original. Returns (qx, gain, info)."""
    qx, _ = apply_fades(quiet_x, rate)
    chunk = max(1, int(round(QUIET_CHUNK_SECONDS * rate)))
    chunks = _chunk_mean_squares(quiet_x, chunk)
    loudest = _db_power(float(np.max(chunks)))
    g_db = quiet_gain_db(loudest, error_gain_db=error_gain_db)
    g = 10.0 ** (g_db / 20.0)
    raised, limited = hard_limit(qx.astype(np.float64) * g)
    info = {
        "rms_dbfs": _db_power(float(np.mean(qx.astype(np.float64) ** 2))),
        "loudest_chunk_dbfs": loudest,
        "quietest_chunk_dbfs": _db_power(float(np.min(chunks))),
        "gain_db": g_db,
        "gain_rule": (f"the loudest {QUIET_CHUNK_SECONDS:g} s plays at {QUIET_TARGET_DBFS:.0f} "
                      "dBFS RMS; never more than the error renders' gain, never below 0 dB"),
        "original_limited_samples": limited,
        "original_peak_dbfs": _db_peak(float(np.max(np.abs(raised)))),
    }
    return qx, g, raised, info


def _render_one(m, *, key, names, tmp, x, orig, rate, bits, coeffs, seed, env, gain, quiet):
    """Render, write and verify one method's files; return its figures row."""
    from requant.dsp.quantizer import predicted_error_power_lsb2

    predicted = predicted_error_power_lsb2(m.quantizer, m.dither, coeffs)
    codes, y, err = render_method(x, rate, bits=bits, method=m, coeffs=coeffs, seed=seed)
    _write_wav(tmp[key], codes, rate, _subtype(bits))
    del codes
    y = _verify(tmp[key], y)
    level = level_match(orig, y, bits=bits, predicted_power_lsb2=predicted)
    del y
    err_r, limited = hard_limit(err * env * gain)
    _write_wav(tmp[f"{key}_error"], err_r, rate, "FLOAT")
    peak = float(np.max(np.abs(err_r))) if err_r.size else 0.0
    del err_r
    figures = _analyze(orig, err, rate, bits=bits, method=m, coeffs=coeffs)
    del err
    row = {
        "id": key,
        "method": m.label,
        "quantizer": m.quantizer,
        "dither": m.dither,
        "shaping": m.shaping,
        "coefficients": [float(v) for v in coeffs],
        "file": names[key],
        "error_file": names[f"{key}_error"],
        "predicted_error_power_lsb2": predicted,
        "predicted_error_dbfs": _db_power(predicted * 4.0 ** -(bits - 1)),
        "figures": figures,
        "level": level,
        "error_render": {
            "gain_db": 20.0 * math.log10(gain),
            "peak_dbfs": _db_peak(peak),
            "limited_samples": limited,
            "limited_fraction": limited / max(x.size, 1),
        },
        "quiet": None,
    }
    if quiet is not None:
        qx, q_gain = quiet
        _, qy, _ = render_method(qx, rate, bits=bits, method=m, coeffs=coeffs, seed=seed)
        raised, q_limited = hard_limit(qy * q_gain)
        _write_wav(tmp[f"{key}_quiet"], raised, rate, "FLOAT")
        row["quiet"] = {
            "file": names[f"{key}_quiet"],
            "limited_samples": q_limited,
            "peak_dbfs": _db_peak(float(np.max(np.abs(raised)))),
            "level": level_match(qx, qy, bits=bits, predicted_power_lsb2=predicted),
        }
    return row


def make_listening_kit(src, outdir, *, bits=16, methods=("truncate", "tpdf", "tpdf+hearing"),
                       start_s=0.0, duration_s=None, quiet_passage=False,
                       quiet_seconds=QUIET_SECONDS, seed=None, shaping_order=None,
                       shaping_limit_db=None, overwrite=False):
    """Render a listening kit: every method on one excerpt, and the page.

    Parameters
    ----------
    src : path
        Any audio file libsndfile reads.
    outdir : path
        Created if missing. Existing kit files are replaced only with ``overwrite``.
    bits : int, 1..32, default 16
    methods : sequence of str
        Method strings (:func:`parse_method`).
    start_s : float, s, default 0
    duration_s : float, s, 0.5..120, optional
        Default :data:`DEFAULT_EXCERPT_SECONDS` or to the end of the file.
    quiet_passage : bool, default False
        Also render the quietest non-silent stretch of the whole source,
        raised after requantization.
    quiet_seconds : float, s, 0.5..60, default 2
    seed : int, optional
        Dither seed, the same for every method; drawn fresh when omitted.
    shaping_order, shaping_limit_db : int, float, optional
        Order and total-gain limit of the ``hearing`` design.
    overwrite : bool, default False

    Returns
    -------
    dict
        The kit's figures, as written to ``figures.json``.

    Raises
    ------
    UsageError, InputError, OutputError

    Notes
    -----
    Methods are rendered one after another, each written, read back and
    checked before the next, so memory holds a few copies of the excerpt
    whatever the number of methods. All files appear together at the end
    (:class:`requant.audio_io.atomic.AtomicOutputs`), or none on failure.
    """
    from requant import __version__
    from requant.audio_io.atomic import AtomicOutputs, check_outputs
    from requant.audio_io.reader import open_input
    from requant.convert import resolve_shaping_spec
    from requant.dsp.quantizer import check_settings, new_seed

    check_settings(bits, "round", "none")
    parsed = parse_methods(list(methods))
    start_s = _check_number("start", start_s, low=0.0)
    duration_s = _check_number("duration", duration_s, low=MIN_EXCERPT_SECONDS,
                               high=MAX_EXCERPT_SECONDS, allow_none=True)
    quiet_seconds = _check_number("quiet_seconds", quiet_seconds, low=MIN_EXCERPT_SECONDS,
                                  high=60.0)
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, (int, np.integer))
                             or seed < 0):
        raise UsageError(f"seed={seed!r} must be a whole number of at least 0")
    seed = new_seed() if seed is None else int(seed)
    src = os.fspath(src)
    outdir = os.fspath(outdir)
    if os.path.exists(outdir) and not os.path.isdir(outdir):
        raise OutputError(f"{outdir!r} exists and is not a folder; give a folder for the kit")

    def kit_names(with_quiet):
        names = {"original": "original.wav", "page": "index.html", "figures": "figures.json"}
        for i, m in enumerate(parsed, 1):
            names[f"m{i}"] = f"m{i}_{m.slug}.wav"
            names[f"m{i}_error"] = f"m{i}_{m.slug}_error.wav"
            if with_quiet:
                names[f"m{i}_quiet"] = f"m{i}_{m.slug}_quiet.wav"
        if with_quiet:
            names["original_quiet"] = "original_quiet.wav"
        return names, {k: os.path.join(outdir, v) for k, v in names.items()}

    if os.path.isdir(outdir):  # fail early, before any work
        check_outputs([src], list(kit_names(False)[1].values()), overwrite=overwrite)

    with open_input(src) as f:
        rate, nch, total = f.samplerate, f.channels, f.frames
        src_subtype = f.subtype
        start_frame = int(round(start_s * rate))
        if start_frame >= total:
            raise UsageError(f"start={start_s:g} s is past the end of {src!r} "
                             f"({total / rate:.3f} s); choose an earlier --start")
        want = DEFAULT_EXCERPT_SECONDS if duration_s is None else duration_s
        frames = min(int(round(want * rate)), total - start_frame)
        if frames < MIN_EXCERPT_SECONDS * rate:
            raise UsageError(f"the excerpt from {start_s:g} s is only {frames / rate:.3f} s long; "
                             f"listening needs at least {MIN_EXCERPT_SECONDS:g} s: choose an "
                             "earlier --start or a longer file")
        x, fade_frames = apply_fades(_read_excerpt(f, start_frame, frames), rate)
        found = quiet_x = None
        floor = quiet_floor_dbfs(bits)
        if quiet_passage:
            found = _find_quiet_in_file(f, seconds=quiet_seconds, floor_dbfs=floor)
            if found is not None:
                quiet_x = _read_excerpt(f, *found)

    gain_db = error_render_gain_db(bits)
    gain = 10.0 ** (gain_db / 20.0)
    env = fade_envelope(frames, fade_frames=fade_frames)[:, None]
    q_info = quiet = None
    if found is not None:
        qx, q_gain, q_raised, q_figs = _quiet_setup(quiet_x, rate, bits=bits,
                                                    error_gain_db=gain_db)
        quiet = (qx, q_gain)
        q_info = {"found": True, "start_s": found[0] / rate, "duration_s": found[1] / rate,
                  "start_frame": found[0], "frames": found[1], "silence_floor_dbfs": floor,
                  "original_file": "original_quiet.wav", **q_figs}
    elif quiet_passage:
        q_info = {"found": False, "silence_floor_dbfs": floor,
                  "note": (f"no stretch of {quiet_seconds:g} s was found in which every "
                           f"{QUIET_CHUNK_SECONDS:g} s is above {floor:.1f} dBFS; "
                           "the source is silent or too short")}

    names, finals = kit_names(quiet is not None)
    os.makedirs(outdir, exist_ok=True)
    check_outputs([src], list(finals.values()), overwrite=overwrite)
    created = _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()
    shapings = {}
    with AtomicOutputs() as outs:
        tmp = {k: outs.path_for(p) for k, p in finals.items()}
        _write_wav(tmp["original"], x, rate, "FLOAT")
        orig = _verify(tmp["original"], x.astype(np.float64))
        if quiet is not None:
            _write_wav(tmp["original_quiet"], q_raised, rate, "FLOAT")
        rows, comparisons = [], []
        for i, m in enumerate(parsed, 1):
            if m.shaping not in shapings:
                shapings[m.shaping] = resolve_shaping_spec(m.shaping, rate, order=shaping_order,
                                                           limit_db=shaping_limit_db)[1]
            row = _render_one(m, key=f"m{i}", names=names, tmp=tmp, x=x, orig=orig, rate=rate,
                              bits=bits, coeffs=shapings[m.shaping], seed=seed, env=env,
                              gain=gain, quiet=quiet)
            rows.append(row)
            comparisons.append({"id": row["id"], "label": f"original vs {m.label}",
                                "a": names["original"], "b": row["file"]})
            if quiet is not None:
                comparisons.append({"id": f"{row['id']}q",
                                    "label": (f"original vs {m.label}, quiet passage "
                                              f"(+{q_info['gain_db']:.1f} dB)"),
                                    "a": names["original_quiet"], "b": row["quiet"]["file"]})
        kit = _jsonable({
            "format": "requant-listening-kit",
            "version": 1,
            "requant_version": __version__,
            "created": created,
            "kit_id": secrets.token_hex(8),
            "source": {"name": os.path.basename(src), "sample_rate": rate, "channels": nch,
                       "frames": total, "subtype": src_subtype},
            "excerpt": {"start_s": start_frame / rate, "duration_s": frames / rate,
                        "start_frame": start_frame, "frames": frames,
                        "fade_s": fade_frames / rate, "fade_frames": fade_frames,
                        "fade_shape": "raised cosine, sin² over each fade"},
            "bits": bits,
            "seed": seed,
            "files": {"original": names["original"], "page": names["page"],
                      "figures": names["figures"]},
            "formats": {
                "original": "32-bit float WAV: the faded excerpt exactly as requantized",
                "program": (f"{_container_bits(bits)}-bit integer WAV holding exactly "
                            f"the {bits}-bit codes (no gain, no limiting)"),
                "raised": "32-bit float WAV (error renders and quiet passage)",
            },
            "cap_dbfs": CAP_DBFS,
            "cap_value": float(cap_value()),
            "error_gain": {
                "gain_db": gain_db,
                "rule": (f"plain rounding noise at {bits} bits "
                         f"({rounding_noise_dbfs(bits):.1f} dBFS RMS) plays at "
                         f"{ERROR_TARGET_DBFS:.1f} dBFS RMS; at most {MAX_GAIN_DB:.0f} dB; "
                         "one gain for every method"),
            },
            "level_match": {
                "rule": (f"|RMS(render) - RMS(original)| <= {LEVEL_MATCH_FACTOR:g} x the "
                         "predicted error RMS; renders get no gain, so they differ from the "
                         "original only by the requantization error"),
                "held": all(row["level"]["matched"] for row in rows),
            },
            "methods": rows,
            "quiet_passage": q_info,
            "comparisons": comparisons,
        })
        with open(tmp["figures"], "w", encoding="utf-8") as fh:
            json.dump(kit, fh, indent=2, allow_nan=False)
            fh.write("\n")
        with open(tmp["page"], "w", encoding="utf-8") as fh:
            fh.write(render_page(kit))
    return kit
