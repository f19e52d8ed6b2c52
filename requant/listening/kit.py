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
    :func:`~requant.listening.levels.error_render_gain_db`, from the fewest bits
    of the kit) and then hard-limited so that no sample exceeds
    :data:`~requant.listening.levels.CAP_DBFS` (-6 dBFS). 32-bit float.
``original_quiet.wav``, ``mK_<method>_quiet.wav`` (with ``quiet``)
    The quietest non-silent stretch of the source
    (:func:`~requant.listening.levels.find_quiet_passage`), faded,
    requantized with each method, then raised *after* requantization: the
    original by a stated gain (:func:`~requant.listening.levels.quiet_gain_db`),
    each render by the same gain unless that would leave it more than 1 dB
    from the raised original, in which case by its own stated gain, to the
    original's loudness (:func:`~requant.listening.render.quiet_render_gain_db`);
    hard-limited at the same cap. 32-bit float.
``figures.json``
    Settings, each method's figures (from :func:`requant.dsp.analysis.analyze_arrays`),
    loudness of every file, gains, cap and limiter counts, and the
    comparisons with the level plan of each
    (:func:`~requant.listening.levels.plan_levels`).
``index.html``
    One page, no server, no network: open it from the file system.

Loudness: within one comparison every player the listener can switch between
plays within 1 dB of the others (ITU-R BS.1770-4 integrated loudness over the
excerpt, or RMS where that is undefined): as written when they already are,
otherwise with a stated playback attenuation. Error renders are the
exception, their loudness being the point: the page states the difference
before they play and fades when switching to or from them.

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
    CROSSFADE_SECONDS,
    ERROR_TARGET_DBFS,
    LEVEL_MATCH_FACTOR,
    LOUDNESS_TOLERANCE_DB,
    MAX_GAIN_DB,
    MAX_MATCH_DB,
    QUIET_CHUNK_SECONDS,
    STATED_FADE_SECONDS,
    apply_fades,
    cap_value,
    error_render_gain_db,
    fade_envelope,
    find_quiet_in_file,
    measure_level,
    plan_levels,
    quiet_floor_dbfs,
    rounding_noise_dbfs,
)
from requant.listening.methods import plan_methods
from requant.listening.page import render_page
from requant.listening.render import (
    Material,
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


def _quiet_passage(got, *, quiet_seconds):
    """(quiet material or None, the raised original or None, the kit's quiet_passage entry)."""
    if got.found is not None:
        qx, q_gain, q_raised, q_figs = quiet_setup(got.quiet_x, got.rate)
        info = {"found": True, "start_s": got.found[0] / got.rate,
                "duration_s": got.found[1] / got.rate, "start_frame": got.found[0],
                "frames": got.found[1], "silence_floor_dbfs": got.floor,
                "original_file": "original_quiet.wav", **q_figs}
        original = {"lufs": q_figs["lufs"], "rms_dbfs": q_figs["rms_dbfs"]}
        return (qx, q_gain, original), q_raised, info
    if quiet_seconds is not None:
        return None, None, {
            "found": False, "silence_floor_dbfs": got.floor,
            "note": (f"no stretch of {quiet_seconds:g} s was found in which every "
                     f"{QUIET_CHUNK_SECONDS:g} s is above {got.floor:.1f} dBFS; "
                     "the source is silent or too short")}
    return None, None, None


def _players(rows, names, orig_levels, q_info):
    """Every file the page plays, by player id, with its loudness and RMS as written."""
    def entry(file, kind, label, levels, method=None):
        return {"file": file, "kind": kind, "label": label, "method": method,
                "lufs": levels["lufs"], "rms_dbfs": levels["rms_dbfs"]}

    players = {"original": entry(names["original"], "original", "Original", orig_levels)}
    if q_info is not None and q_info["found"]:
        players["original-quiet"] = entry(names["original_quiet"], "quiet-original",
                                          "Original, raised", q_info)
    for row in rows:
        k, label = row["id"], row["method"]
        players[k] = entry(row["file"], "program", label, row, k)
        players[f"{k}-error"] = entry(row["error_file"], "error", f"Error of {label}",
                                      row["error_render"], k)
        if row["quiet"] is not None:
            players[f"{k}-quiet"] = entry(row["quiet"]["file"], "quiet", f"{label}, raised",
                                          row["quiet"], k)
    return players


def _comparison(cid, label, *, kind, passage, players, a, b, extra=()):
    """One comparison: its players (A, B, then stated extras) and how each plays."""
    spec = [(a, False, "A"), (b, False, "B")] + [(e, True, "extra") for e in extra]
    plan = plan_levels([{"player": pid, "lufs": players[pid]["lufs"],
                         "rms_dbfs": players[pid]["rms_dbfs"], "stated": stated}
                        for pid, stated, _ in spec])
    for row, (_, _, role) in zip(plan["players"], spec):
        row["role"] = role
    return {"id": cid, "label": label, "kind": kind, "passage": passage,
            "a": players[a]["file"], "b": players[b]["file"], **plan}


def _comparisons(rows, pairs, players, q_info):
    """Each method against the original, then each pair; the quiet passage after each."""
    quiet = q_info is not None and q_info["found"]
    out = []
    for row in rows:
        k, m = row["id"], row["method"]
        out.append(_comparison(k, f"original vs {m}", kind="original", passage="excerpt",
                               players=players, a="original", b=k, extra=[f"{k}-error"]))
        if quiet:
            out.append(_comparison(f"{k}q", f"original vs {m}, quiet passage", kind="original",
                                   passage="quiet", players=players, a="original-quiet",
                                   b=f"{k}-quiet"))
    for n, (i, j) in enumerate(pairs, 1):
        a, b = rows[i], rows[j]
        out.append(_comparison(f"p{n}", f"{a['method']} vs {b['method']}", kind="pair",
                               passage="excerpt", players=players, a=a["id"], b=b["id"]))
        if quiet:
            out.append(_comparison(f"p{n}q", f"{a['method']} vs {b['method']}, quiet passage",
                                   kind="pair", passage="quiet", players=players,
                                   a=f"{a['id']}-quiet", b=f"{b['id']}-quiet"))
    return out


def _render_methods(methods, base, coeffs, *, names, tmp, material):
    """Every method's files and figures row."""
    rows = []
    for i, m in enumerate(methods, 1):
        recipe = m.recipe(base)
        rows.append(render_one(m, recipe, coeffs[m.shaping], key=f"m{i}", files=(names, tmp),
                               material=material))
    return rows


def _loudness_rule():
    return {
        "measure": ("ITU-R BS.1770-4 integrated loudness over the whole file (LUFS); RMS "
                    "(dBFS, AES17) where the loudness is undefined"),
        "tolerance_db": LOUDNESS_TOLERANCE_DB,
        "max_match_db": MAX_MATCH_DB,
        "rule": (f"within one comparison every player plays within {LOUDNESS_TOLERANCE_DB:g} dB "
                 "of the others: as written when it already does, otherwise turned down by a "
                 f"stated playback gain (at most {MAX_MATCH_DB:g} dB); error renders keep "
                 "their level, and the page states their difference before they play and "
                 "fades when switching to or from them"),
        "crossfade_s": CROSSFADE_SECONDS,
        "stated_fade_s": STATED_FADE_SECONDS,
    }


def _kit_figures(src, got, base, *, names, gain_db, error_bits, parts, hide_answers):
    """The kit's figures, as written to ``figures.json`` and shown by the page.

    ``parts`` is ``(rows, comparisons, players, pairs, q_info)``.
    """
    rows, comparisons, players, pairs, q_info = parts
    bits, rate = base.bits, got.rate
    word_lengths = sorted({row["bits"] for row in rows})
    return jsonable({
        "format": "requant-listening-kit",
        "version": 2,
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
        "word_lengths": word_lengths,
        "seed": base.seed,
        "silence": {"mode": base.silence, "min_ms": base.silence_min_ms,
                    "min_frames": base.silence_frames(rate)},
        "files": {"original": names["original"], "page": names["page"],
                  "figures": names["figures"]},
        "formats": {
            "original": "32-bit float WAV: the faded excerpt exactly as requantized",
            "program": ("integer WAV (16-bit container up to 16 bits, 24-bit up to 24, "
                        "32-bit above) holding exactly the requantized codes (no gain, no "
                        "limiting)"),
            "raised": "32-bit float WAV (error renders and quiet passage)",
        },
        "cap_dbfs": CAP_DBFS,
        "cap_value": float(cap_value()),
        "error_gain": {
            "gain_db": gain_db,
            "bits": error_bits,
            "rule": (f"plain rounding noise at {error_bits} bits "
                     f"({rounding_noise_dbfs(error_bits):.1f} dBFS RMS) plays at "
                     f"{ERROR_TARGET_DBFS:.1f} dBFS RMS; at most {MAX_GAIN_DB:.0f} dB; "
                     "one gain for every method"
                     + ("" if len(word_lengths) == 1 else
                        f", set by the fewest bits of the kit ({error_bits})")),
        },
        "consistency": {
            "rule": (f"|RMS(render) - RMS(original)| <= {LEVEL_MATCH_FACTOR:g} x the "
                     "predicted error RMS: renders get no gain, so they differ from the "
                     "original only by the requantization error"),
            "held": all(row["level"]["consistent"] for row in rows),
        },
        "loudness": {**_loudness_rule(),
                     "held": all(c["matched"] for c in comparisons)},
        "methods": rows,
        "pairs": [[rows[i]["id"], rows[j]["id"]] for i, j in pairs],
        "quiet_passage": q_info,
        "players": players,
        "comparisons": comparisons,
        "page": {"hide_answers": bool(hide_answers)},
    })


def make_listening_kit(src: str | os.PathLike, outdir: str | os.PathLike, *,
                       recipe: Recipe | None = None, methods: Sequence[str] | None = None,
                       pairs: Sequence[str] = (), excerpt: Excerpt | None = None,
                       quiet: float | None = None, hide_answers: bool = False,
                       overwrite: bool = False) -> dict:
    """Render a listening kit: every method on one excerpt, and the page.

    Parameters
    ----------
    src : path
        Any audio file libsndfile reads.
    outdir : path
        Created if missing. Existing kit files are replaced only with ``overwrite``.
    recipe : Recipe, optional
        What every method shares: the word length (default 16; a method may
        name its own, ``tpdf@12``), the seed (drawn fresh when None, the same
        for every method) and the ``hearing`` design (when its shaping is
        ``hearing``). Each method sets its own quantizer, dither and shaping
        kind (:meth:`Method.recipe`).
    methods : sequence of str, optional
        Method strings (:func:`~requant.listening.methods.parse_method`).
        Default: :data:`~requant.listening.methods.DEFAULT_METHODS`, or only
        the methods ``pairs`` name when pairs are given.
    pairs : sequence of str
        Pairs of methods to compare with each other, openly and blind:
        ``'tpdf,tpdf+hearing'``, ``'tpdf@12,tpdf@16'``
        (:func:`~requant.listening.methods.plan_methods`).
    excerpt : Excerpt, optional
        Start and length of the excerpt (default: 30 s from the start).
    quiet : float, s, 0.5..60, optional
        Also render the quietest non-silent stretch of this length from the
        whole source, raised after requantization.
    hide_answers : bool, default False
        The page starts with answers and the running score hidden until the
        end of a session (the listener can change it before the first trial).
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
    if isinstance(pairs, str):
        pairs = [pairs]
    parsed, pair_index = plan_methods(None if methods is None else list(methods), list(pairs),
                                      base.bits)
    all_bits = [m.recipe(base).bits for m in parsed]
    excerpt = Excerpt() if excerpt is None else excerpt
    if quiet is not None:
        quiet = check_seconds("quiet_seconds", quiet, low=MIN_EXCERPT_SECONDS, high=60.0)
    src, outdir = os.fspath(src), os.fspath(outdir)
    if os.path.exists(outdir) and not os.path.isdir(outdir):
        raise OutputError(f"{outdir!r} exists and is not a folder; give a folder for the kit")
    if os.path.isdir(outdir):  # fail early, before any work
        check_outputs([src], list(_kit_names(parsed, outdir, False)[1].values()),
                      overwrite=overwrite)

    got = _read_source(src, excerpt, bits=max(all_bits), quiet_seconds=quiet)
    gain_db = error_render_gain_db(min(all_bits))
    q_material, q_raised, q_info = _quiet_passage(got, quiet_seconds=quiet)
    names, finals = _kit_names(parsed, outdir, q_material is not None)
    try:
        os.makedirs(outdir, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the kit's folder {outdir!r} ({exc.strerror or exc}); "
                          "choose a folder that can be written") from None
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
        rows = _render_methods(parsed, base, coeffs, names=names, tmp=tmp, material=material)
        players = _players(rows, names, measure_level(orig, got.rate), q_info)
        comparisons = _comparisons(rows, pair_index, players, q_info)
        kit = _kit_figures(src, got, base, names=names, gain_db=gain_db,
                           error_bits=min(all_bits),
                           parts=(rows, comparisons, players, pair_index, q_info),
                           hide_answers=hide_answers)
        with open(tmp["figures"], "w", encoding="utf-8") as fh:
            json.dump(kit, fh, indent=2, allow_nan=False)
            fh.write("\n")
        with open(tmp["page"], "w", encoding="utf-8") as fh:
            fh.write(render_page(kit))

    return kit
