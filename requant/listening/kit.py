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
    checked on the written files (:func:`~requant.listening.levels.level_match`) and stated.
``mK_<method>_error.wav`` (error renders)
    Output minus input, faded like the excerpt, raised by one stated gain
    (the same for every method, so that their levels can be compared; see
    :func:`~requant.listening.levels.error_render_gain_db`) and then hard-limited so that no sample
    exceeds :data:`~requant.listening.levels.CAP_DBFS` (-6 dBFS). 32-bit float.
``original_quiet.wav``, ``mK_<method>_quiet.wav`` (with ``quiet``)
    The quietest non-silent stretch of the source
    (:func:`~requant.listening.levels.find_quiet_passage`),
    faded, requantized with each method, then raised by a stated gain
    (:func:`~requant.listening.levels.quiet_gain_db`) *after* requantization and hard-limited at the
    same cap. 32-bit float.
``figures.json``
    Settings, each method's figures (from :func:`requant.dsp.analysis.analyze_arrays`),
    the level-match check, gains, cap and limiter counts.
``index.html``
    One page, no server, no network: open it from the file system.

Levels are in dBFS per AES17 (a full-scale sine is 0 dBFS): a mean square
``p`` is ``10*log10(2*p)`` dBFS; peaks are ``20*log10(|x|)`` dBFS.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import secrets
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from requant import __version__
from requant.audio_io.atomic import AtomicOutputs, check_outputs
from requant.audio_io.reader import open_input
from requant.dsp.quantizer import new_seed
from requant.dsp.shaping import coefficients_for
from requant.errors import OutputError, UsageError
from requant.listening.excerpt import (
    DEFAULT_EXCERPT_SECONDS,
    MIN_EXCERPT_SECONDS,
    Excerpt,
    check_seconds,
)
from requant.listening.levels import (
    CAP_DBFS,
    ERROR_TARGET_DBFS,
    LEVEL_MATCH_FACTOR,
    MAX_GAIN_DB,
    QUIET_CHUNK_SECONDS,
    apply_fades,
    cap_value,
    error_render_gain_db,
    fade_envelope,
    find_quiet_in_file,
    quiet_floor_dbfs,
    rounding_noise_dbfs,
)
from requant.listening.methods import DEFAULT_METHODS, parse_methods
from requant.listening.page import render_page
from requant.listening.render import (
    Material,
    container_bits,
    jsonable,
    quiet_setup,
    read_excerpt,
    render_one,
    verify,
    write_wav,
)
from requant.recipe import Recipe

__all__ = ["make_listening_kit"]

@dataclass
class _Read:
    """What a kit reads from its source."""

    rate: int
    channels: int
    total: int
    subtype: str
    start_frame: int
    frames: int
    x: np.ndarray
    fade_frames: int
    found: tuple | None
    quiet_x: np.ndarray | None
    floor: float


def _kit_names(methods, outdir, with_quiet):
    """(file names, final paths) of a kit, keyed by role."""
    names = {"original": "original.wav", "page": "index.html", "figures": "figures.json"}
    for i, m in enumerate(methods, 1):
        names[f"m{i}"] = f"m{i}_{m.slug}.wav"
        names[f"m{i}_error"] = f"m{i}_{m.slug}_error.wav"
        if with_quiet:
            names[f"m{i}_quiet"] = f"m{i}_{m.slug}_quiet.wav"
    if with_quiet:
        names["original_quiet"] = "original_quiet.wav"
    return names, {k: os.path.join(outdir, v) for k, v in names.items()}


def _read_source(src, excerpt, *, bits, quiet_seconds):
    """Read the excerpt (faded) and, when asked, find and read the quietest passage."""
    with open_input(src) as f:
        rate, total = f.samplerate, f.frames
        start_frame = int(round(excerpt.start_s * rate))
        if start_frame >= total:
            raise UsageError(f"start={excerpt.start_s:g} s is past the end of {src!r} "
                             f"({total / rate:.3f} s); choose an earlier --start")
        want = DEFAULT_EXCERPT_SECONDS if excerpt.duration_s is None else excerpt.duration_s
        frames = min(int(round(want * rate)), total - start_frame)
        if frames < MIN_EXCERPT_SECONDS * rate:
            raise UsageError(f"the excerpt from {excerpt.start_s:g} s is only "
                             f"{frames / rate:.3f} s long; listening needs at least "
                             f"{MIN_EXCERPT_SECONDS:g} s: choose an earlier --start or a "
                             "longer file")
        x, fade_frames = apply_fades(read_excerpt(f, start_frame, frames), rate)
        found = quiet_x = None
        floor = quiet_floor_dbfs(bits)
        if quiet_seconds is not None:
            found = find_quiet_in_file(f, seconds=quiet_seconds, floor_dbfs=floor)
            if found is not None:
                quiet_x = read_excerpt(f, *found)
        return _Read(rate, f.channels, total, f.subtype, start_frame, frames, x, fade_frames,
                     found, quiet_x, floor)


def _quiet_passage(got, *, bits, gain_db, quiet_seconds):
    """(quiet material or None, the raised original or None, the kit's quiet_passage entry)."""
    if got.found is not None:
        qx, q_gain, q_raised, q_figs = quiet_setup(got.quiet_x, got.rate, bits=bits,
                                                   error_gain_db=gain_db)
        info = {"found": True, "start_s": got.found[0] / got.rate,
                "duration_s": got.found[1] / got.rate, "start_frame": got.found[0],
                "frames": got.found[1], "silence_floor_dbfs": got.floor,
                "original_file": "original_quiet.wav", **q_figs}
        return (qx, q_gain), q_raised, info
    if quiet_seconds is not None:
        return None, None, {
            "found": False, "silence_floor_dbfs": got.floor,
            "note": (f"no stretch of {quiet_seconds:g} s was found in which every "
                     f"{QUIET_CHUNK_SECONDS:g} s is above {got.floor:.1f} dBFS; "
                     "the source is silent or too short")}
    return None, None, None


def _render_methods(methods, base, coeffs, *, names, tmp, material, q_info):
    """Every method's files and figures row, and the page's comparisons."""
    rows, comparisons = [], []
    for i, m in enumerate(methods, 1):
        recipe = m.recipe(base)
        row = render_one(m, recipe, coeffs[m.shaping], key=f"m{i}", files=(names, tmp),
                         material=material)
        rows.append(row)
        comparisons.append({"id": row["id"], "label": f"original vs {m.label}",
                            "a": names["original"], "b": row["file"]})
        if material.quiet is not None:
            comparisons.append({"id": f"{row['id']}q",
                                "label": (f"original vs {m.label}, quiet passage "
                                          f"(+{q_info['gain_db']:.1f} dB)"),
                                "a": names["original_quiet"], "b": row["quiet"]["file"]})
    return rows, comparisons


def _kit_figures(src, got, base, *, names, gain_db, rows, comparisons, q_info):
    """The kit's figures, as written to ``figures.json`` and shown by the page."""
    bits, rate = base.bits, got.rate
    return jsonable({
        "format": "requant-listening-kit",
        "version": 1,
        "requant_version": __version__,
        "created": _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat(),
        "kit_id": secrets.token_hex(8),
        "source": {"name": os.path.basename(src), "sample_rate": rate,
                   "channels": got.channels, "frames": got.total, "subtype": got.subtype},
        "excerpt": {"start_s": got.start_frame / rate, "duration_s": got.frames / rate,
                    "start_frame": got.start_frame, "frames": got.frames,
                    "fade_s": got.fade_frames / rate, "fade_frames": got.fade_frames,
                    "fade_shape": "raised cosine, sin² over each fade"},
        "bits": bits,
        "seed": base.seed,
        "files": {"original": names["original"], "page": names["page"],
                  "figures": names["figures"]},
        "formats": {
            "original": "32-bit float WAV: the faded excerpt exactly as requantized",
            "program": (f"{container_bits(bits)}-bit integer WAV holding exactly "
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


def make_listening_kit(src: str | os.PathLike, outdir: str | os.PathLike, *,
                       recipe: Recipe | None = None, methods: Sequence[str] = DEFAULT_METHODS,
                       excerpt: Excerpt | None = None, quiet: float | None = None,
                       overwrite: bool = False) -> dict:
    """Render a listening kit: every method on one excerpt, and the page.

    Parameters
    ----------
    src : path
        Any audio file libsndfile reads.
    outdir : path
        Created if missing. Existing kit files are replaced only with ``overwrite``.
    recipe : Recipe, optional
        What every method shares: the word length (default 16), the seed
        (drawn fresh when None, the same for every method) and the ``hearing``
        design (when its shaping is ``hearing``). Each method sets its own
        quantizer, dither and shaping kind (:meth:`Method.recipe`).
    methods : sequence of str
        Method strings (:func:`~requant.listening.methods.parse_method`).
    excerpt : Excerpt, optional
        Start and length of the excerpt (default: 30 s from the start).
    quiet : float, s, 0.5..60, optional
        Also render the quietest non-silent stretch of this length from the
        whole source, raised after requantization.
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
    base = Recipe() if recipe is None else recipe
    if not isinstance(base, Recipe):
        raise TypeError(f"recipe must be a requant.Recipe, not {type(base).__name__}")
    base = base.with_seed(new_seed()) if base.seed is None else base
    parsed = parse_methods(list(methods))
    excerpt = Excerpt() if excerpt is None else excerpt
    if quiet is not None:
        quiet = check_seconds("quiet_seconds", quiet, low=MIN_EXCERPT_SECONDS, high=60.0)
    src, outdir = os.fspath(src), os.fspath(outdir)
    if os.path.exists(outdir) and not os.path.isdir(outdir):
        raise OutputError(f"{outdir!r} exists and is not a folder; give a folder for the kit")
    if os.path.isdir(outdir):  # fail early, before any work
        check_outputs([src], list(_kit_names(parsed, outdir, False)[1].values()),
                      overwrite=overwrite)

    got = _read_source(src, excerpt, bits=base.bits, quiet_seconds=quiet)
    gain_db = error_render_gain_db(base.bits)
    q_material, q_raised, q_info = _quiet_passage(got, bits=base.bits, gain_db=gain_db,
                                                  quiet_seconds=quiet)
    names, finals = _kit_names(parsed, outdir, q_material is not None)
    os.makedirs(outdir, exist_ok=True)
    check_outputs([src], list(finals.values()), overwrite=overwrite)
    coeffs = {m.shaping: coefficients_for(m.recipe(base).shaping, got.rate) for m in parsed}
    with AtomicOutputs() as outs:
        tmp = {k: outs.path_for(p) for k, p in finals.items()}
        write_wav(tmp["original"], got.x, got.rate, "FLOAT")
        orig = verify(tmp["original"], got.x.astype(np.float64))
        if q_material is not None:
            write_wav(tmp["original_quiet"], q_raised, got.rate, "FLOAT")
        material = Material(x=got.x, orig=orig, rate=got.rate,
                            env=fade_envelope(got.frames, fade_frames=got.fade_frames)[:, None],
                            gain=10.0 ** (gain_db / 20.0), quiet=q_material)
        rows, comparisons = _render_methods(parsed, base, coeffs, names=names, tmp=tmp,
                                            material=material, q_info=q_info)
        kit = _kit_figures(src, got, base, names=names, gain_db=gain_db, rows=rows,
                           comparisons=comparisons, q_info=q_info)
        with open(tmp["figures"], "w", encoding="utf-8") as fh:
            json.dump(kit, fh, indent=2, allow_nan=False)
            fh.write("\n")
        with open(tmp["page"], "w", encoding="utf-8") as fh:
            fh.write(render_page(kit))

    return kit
