"""The bundled demo: an invented scenario, synthesized by our own code.

Scenario (fiction): a small studio, "Fernhollow Sound", delivers two jobs.

* A 14.5-second orchestral-style cue, "Tidewater", mastered at 24 bits /
  48 kHz: half a second of digital silence (exact zeros), the music, and a
  long, quiet fade into 0.4 s of digital silence. It is released at 16 bits,
  with the silence kept silent.
* Three one-shots for a handheld game, "Pocket Comet" (a coin pickup, a door
  thud and a chime with a long ring-out), made at 24 bits / 44.1 kHz and
  shipped at 8 bits to fit the device.

:func:`synthesize_demo_audio` makes the files (seeded, so the same bits every
time); ``demo_audio/make_demo_audio.py`` calls it. :func:`run_demo` converts
them and prints measured against predicted figures.
"""

import os
from pathlib import Path

import numpy as np

from requant.convert import Outputs, convert_file
from requant.errors import InputError, OutputError
from requant.recipe import Recipe

__all__ = ["synthesize_demo_audio", "run_demo", "DEMO_FILES", "default_demo_dir"]

#: Digital silence before the cue starts, seconds (it also ends in 0.4 s of it).
HEAD_SILENCE_S = 0.5

DEMO_FILES = {
    "tidewater_master.flac": "orchestral-style cue, 24-bit 48 kHz stereo, long fade-out",
    "coin.wav": "game one-shot, 24-bit 44.1 kHz mono",
    "door_thud.wav": "game one-shot, 24-bit 44.1 kHz mono",
    "chime.wav": "game one-shot with a long ring-out, 24-bit 44.1 kHz mono",
}


def default_demo_dir():
    """The ``demo_audio`` folder of the source checkout."""
    return Path(__file__).resolve().parent.parent / "demo_audio"


def _to_int24_codes(x):
    """Round to 24 bits ourselves; int32 left-justified for soundfile."""
    k = np.floor(np.clip(x, -1.0, 1.0 - 2.0**-23) * 2.0**23 + 0.5)
    return (k.astype(np.int32) << 8)


def _string_section(t, freqs, rng, *, detune_cents=7.0, voices=3):
    out = np.zeros_like(t)
    for f0 in freqs:
        for _ in range(voices):
            det = f0 * 2.0 ** (rng.uniform(-detune_cents, detune_cents) / 1200.0)
            vib = 1.0 + 0.004 * np.sin(2 * np.pi * rng.uniform(5.0, 6.0) * t + rng.uniform(0, 6.28))
            phase = 2 * np.pi * np.cumsum(det * vib) / 48000.0
            for k in range(1, 14):
                if det * k > 12000:
                    break
                out += (0.6 ** (k - 1)) / k * np.sin(k * phase + rng.uniform(0, 6.28))
    return out


def _envelope(n, fs, attack, release):
    env = np.ones(n)
    a = max(1, int(attack * fs))
    r = max(1, int(release * fs))
    env[:a] = np.linspace(0.0, 1.0, a) ** 2
    env[-r:] *= np.linspace(1.0, 0.0, r) ** 2
    return env


def _master(rng, fs=48000, seconds=14.0):
    from scipy.signal import fftconvolve

    n = int(fs * seconds)
    t = np.arange(n) / fs
    chords = [  # (start s, length s, frequencies Hz): D, Bm, G, A, D
        (0.0, 3.2, [146.83, 220.0, 293.66, 369.99]),
        (3.0, 3.2, [123.47, 246.94, 293.66, 369.99]),
        (6.0, 3.0, [98.0, 196.0, 293.66, 392.0]),
        (8.8, 2.2, [110.0, 220.0, 277.18, 329.63]),
        (10.8, 3.2, [146.83, 220.0, 293.66, 440.0]),
    ]
    left = np.zeros(n)
    right = np.zeros(n)
    for start, length, freqs in chords:
        i0 = int(start * fs)
        m = min(int(length * fs), n - i0)
        tt = t[:m]
        sec = _string_section(tt, freqs, rng) * _envelope(m, fs, 0.5, 0.8)
        pan = rng.uniform(0.35, 0.65)
        left[i0:i0 + m] += sec * np.sqrt(1 - pan)
        right[i0:i0 + m] += sec * np.sqrt(pan)
    # harp-like plucks
    for j, f in enumerate([293.66, 369.99, 440.0, 587.33, 440.0, 369.99] * 3):
        i0 = int((0.4 + j * 0.55) * fs)
        if i0 >= n:
            break
        m = min(int(1.5 * fs), n - i0)
        tt = t[:m]
        pl = sum(np.sin(2 * np.pi * f * k * tt) * np.exp(-tt * (3.0 + 2.0 * k)) / k
                 for k in range(1, 6))
        pan = 0.2 + 0.6 * (j % 3) / 2
        left[i0:i0 + m] += 0.5 * pl * np.sqrt(1 - pan)
        right[i0:i0 + m] += 0.5 * pl * np.sqrt(pan)
    # timpani-like hits
    for start in (0.0, 6.0, 10.8):
        i0 = int(start * fs)
        m = min(int(2.0 * fs), n - i0)
        tt = t[:m]
        f = 73.4 * (1 + 0.05 * np.exp(-tt * 20))
        hit = np.sin(2 * np.pi * np.cumsum(f) / fs) * np.exp(-tt * 2.5)
        hit += 0.3 * rng.standard_normal(m) * np.exp(-tt * 40)
        left[i0:i0 + m] += 1.5 * hit
        right[i0:i0 + m] += 1.5 * hit
    # a small room: exponentially decaying noise, different per side
    ir_len = int(1.6 * fs)
    decay = np.exp(-np.arange(ir_len) / fs * 4.5)
    for side in (left, right):
        ir = rng.standard_normal(ir_len) * decay * 0.02
        ir[0] = 1.0
        side[:] = fftconvolve(side, ir)[:n]
    x = np.stack([left, right], axis=1)
    # the long fade: from 8.5 s down to about -80 dB at 13.6 s, then silence
    fade = np.ones(n)
    f0, f1 = int(8.5 * fs), int(13.6 * fs)
    fade[f0:f1] = 10.0 ** (-80.0 / 20.0 * np.linspace(0, 1, f1 - f0) ** 1.5)
    fade[f1:] = 0.0
    x *= fade[:, None]
    x *= 10 ** (-1.0 / 20) / np.max(np.abs(x))
    return x


def _coin(fs, rng):
    n = int(0.35 * fs)
    t = np.arange(n) / fs
    f = np.where(t < 0.07, 987.77, 1318.5)
    sq = np.sign(np.sin(2 * np.pi * np.cumsum(f) / fs))
    sm = np.convolve(sq, np.ones(4) / 4, mode="same")
    return 0.7 * sm * np.exp(-t * 9.0)


def _door(fs, rng):
    from scipy.signal import butter, sosfilt

    n = int(0.6 * fs)
    t = np.arange(n) / fs
    noise = sosfilt(butter(4, 400, fs=fs, output="sos"), rng.standard_normal(n))
    body = np.sin(2 * np.pi * 62 * t) * np.exp(-t * 9)
    y = 0.9 * body + 2.5 * noise * np.exp(-t * 25)
    return 0.9 * y / np.max(np.abs(y))


def _chime(fs, rng):
    n = int(2.5 * fs)
    t = np.arange(n) / fs
    partials = [(1.0, 1.0, 1.2), (2.76, 0.5, 2.0), (5.40, 0.25, 3.5), (8.93, 0.12, 5.0)]
    y = sum(a * np.sin(2 * np.pi * 880 * r * t) * np.exp(-t * d) for r, a, d in partials)
    y *= _envelope(n, fs, 0.002, 0.05)
    return 0.8 * y / np.max(np.abs(y))


def synthesize_demo_audio(folder, *, seed=20261201):
    """Write the demo files into ``folder`` (created if needed).

    The same seed gives the same files, bit for bit.
    """
    import soundfile as sf

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    head = np.zeros((int(HEAD_SILENCE_S * 48000), 2))  # the cue starts after digital silence
    cue = np.concatenate([head, _master(rng)])
    sf.write(folder / "tidewater_master.flac", _to_int24_codes(cue), 48000,
             subtype="PCM_24", format="FLAC")
    for name, fn in (("coin.wav", _coin), ("door_thud.wav", _door), ("chime.wav", _chime)):
        sf.write(folder / name, _to_int24_codes(fn(44100, rng)), 44100, subtype="PCM_24",
                 format="WAV")
    return sorted(DEMO_FILES)


#: The demo's jobs: (source, output name, recipe).
_JOBS = [
    ("tidewater_master.flac", "tidewater_16bit_tpdf.flac", Recipe(bits=16, dither="tpdf")),
    ("tidewater_master.flac", "tidewater_16bit_tpdf_hearing.flac",
     Recipe(bits=16, dither="tpdf", shaping="hearing")),
    ("tidewater_master.flac", "tidewater_16bit_truncated.flac",
     Recipe(bits=16, dither="none", quantizer="truncate")),
    # the same master delivered for CD in one pass: 48 kHz -> 44.1 kHz, true peak under -1 dBTP
    ("tidewater_master.flac", "tidewater_cd_44k1_16bit_hearing.flac",
     Recipe(bits=16, dither="tpdf", shaping="hearing", rate=44100, peak_ceiling_dbtp=-1.0)),
    ("coin.wav", "coin_8bit_tpdf.wav", Recipe(bits=8, dither="tpdf")),
    ("door_thud.wav", "door_thud_8bit_tpdf.wav", Recipe(bits=8, dither="tpdf")),
    ("chime.wav", "chime_8bit_tpdf.wav", Recipe(bits=8, dither="tpdf")),
    ("chime.wav", "chime_8bit_round.wav", Recipe(bits=8, dither="none")),
]


def _method(recipe):
    parts = [recipe.quantizer, recipe.dither]
    if recipe.shaping.kind != "none":
        parts.append(recipe.shaping.kind)
    method = "+".join(parts)
    if recipe.rate is not None:
        method += f"@{recipe.rate / 1000:g}k"
    return method


def _demo_outputs(out):
    """Every file the demo writes into ``out``, per job: (output, error, JSON, HTML)."""
    for name, out_name, recipe in _JOBS:
        stem = os.path.splitext(out_name)[0]
        yield (name, out_name, recipe, out / out_name, out / f"{stem}_error.wav",
               out / f"{stem}_report.json", out / f"{stem}_report.html")


def run_demo(out, *, source=None, seed=2026, overwrite=False):
    """Convert the demo audio, write outputs, errors and reports into ``out``.

    Parameters
    ----------
    out : path
        Folder for the results (created if missing).
    source : path, optional
        Folder of demo audio (default: the bundled one).
    seed : int, default 2026
        The first job's seed; each job adds its index.
    overwrite : bool, default False
        Replace files of those names already in ``out``; without it, such a
        file stops the demo before anything is written.

    Returns
    -------
    str
        A table of measured against predicted figures.
    """
    src = Path(source) if source is not None else default_demo_dir()
    missing = [name for name in DEMO_FILES if not (src / name).is_file()]
    if missing:
        raise InputError(
            f"demo audio not found in {str(src)!r} (missing {', '.join(missing)}); run "
            "'python demo_audio/make_demo_audio.py' or pass --source"
        )
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise OutputError(f"{str(out)!r} is a file; give a folder for the demo results")
    jobs = list(_demo_outputs(out))
    if not overwrite:
        taken = [str(p) for job in jobs for p in job[3:] if os.path.lexists(p)]
        if taken:
            more = f" and {len(taken) - 1} more" if len(taken) > 1 else ""
            raise OutputError(f"{taken[0]!r}{more} already exist; choose another --out or pass "
                              "--overwrite to replace them")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create {str(out)!r} ({exc.strerror or exc}); choose a "
                          "writable folder") from None
    rows = []
    for i, (name, out_name, recipe, _, err, rep_json, rep_html) in enumerate(jobs):
        # the figures as JSON, and the same as a page with pictures
        outputs = Outputs(error=err, overwrite=overwrite, report=(rep_json, rep_html))
        rep = convert_file(src / name, out / out_name, recipe.with_seed(seed + i),
                           outputs=outputs)
        rows.append((out_name, recipe.bits, _method(recipe), rep))
    head = (f"{'output':36} {'bits':>4} {'method':25} {'SNR dB':>6} {'pred':>6} "
            f"{'err LSB²':>8} {'pred':>6} {'A-wtd dBFS':>10} {'pred':>7}  follows signal")
    lines = [f"requant demo: results in {out}/", head, "-" * len(head)]
    for out_name, bits, method, rep in rows:
        m, p = rep.measured, rep.predicted
        f = lambda v, s: "n/a" if v is None else format(v, s)  # noqa: E731
        corr = "YES" if m.signal_correlated else "no"
        lines.append(
            f"{out_name:36} {bits:>4} {method:25} {f(m.snr_db, '6.2f')} "
            f"{f(p.snr_db, '6.2f')} {f(m.error_power_lsb2, '8.4f')} "
            f"{f(p.error_power_lsb2, '6.4f')} {f(m.a_weighted_noise_dbfs, '10.2f')} "
            f"{f(p.a_weighted_noise_dbfs, '7.2f')}  {corr}"
        )
    silent = [(out_name, rep) for out_name, _, _, rep in rows if rep.measured.silent_frames]
    for out_name, rep in silent:
        per = sorted({ch.measured.silent_frames for ch in rep.channels})
        rate = rep.preparation["rate_out"] if rep.preparation else rep.input.sample_rate
        secs = " / ".join(f"{n / rate:.2f} s" for n in per)
        lines.append(f"{out_name}: {secs} of digital silence kept silent (exact zeros, no "
                     "dither hiss out of nothing)")
    lines.append("SNR in dB; error power per sample in LSB² of the target word length; A-wtd: "
                 "A-weighted noise (IEC 61672-1). 'follows signal': signal-correlated error "
                 "found (undithered quiet passages).")
    lines.append("Reports (JSON, and HTML with pictures) and error signals are beside each "
                 "output; open tidewater_16bit_tpdf_hearing_report.html to start.")
    return "\n".join(lines)
