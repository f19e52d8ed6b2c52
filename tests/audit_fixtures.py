"""The audit tests' own programme and quantizer, independent of requant's code.

Deliveries for :mod:`tests.test_audit` (and ``benchmarks/audit_confusion.py``)
are made here with numpy and plain Python only, from the textbook
definitions, never with requant's kernel:

* rounding is mid-tread, ``floor(v + 1/2)``; truncation is ``floor(v)``
  (toward minus infinity, as dropping two's-complement bits does);
* RPDF dither is one uniform draw on [-1/2, 1/2) LSB, TPDF the difference of
  two uniforms on [0, 1) (triangular on (-1, 1) LSB); Lipshitz, Wannamaker &
  Vanderkooy, JAES 40(5), 1992;
* error-feedback shaping follows the structure of Zölzer, *Digital Audio
  Signal Processing*, ch. 2.3: ``u = v - Σ h_k e[n-k]``, ``q = Q(u + d)``,
  ``e = q - u``, so the output error has NTF ``1 - Σ h_k z^-k``;
* codes are clipped to the rails of the word length and written
  left-justified in int32 (python-soundfile writes them bit for bit).

Every random draw takes a seeded generator.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["programme", "dither", "quantize", "codes_for", "write_delivery", "band_means_db",
           "WANNAMAKER_9", "NOTCH_2", "octave_bands"]

#: Wannamaker (1992), JAES 40(7/8), 9-tap filter for 44.1 kHz, from memory
#: (REFERENCES.md §3 [M]); minimum phase, total noise gain +18.4 dB [C].
WANNAMAKER_9 = (2.412, -3.370, 3.937, -4.174, 3.353, -2.205, 1.281, -0.569, 0.0847)
#: A second-order shaper of our own: NTF zeros at radius 0.8 and ±5 kHz at 48 kHz
#: (minimum phase by construction), n = [1, -2 r cos θ, r²].
NOTCH_2 = (2 * 0.8 * math.cos(2 * math.pi * 5000 / 48000), -0.64)


def programme(seconds, rate, rng, *, channels=2, peak_db=-1.0):
    """Music-like programme: chords that change every 0.8 s, noise, a slow envelope.

    Scaled so its sample peak is ``peak_db`` dBFS.
    """
    n = int(round(seconds * rate))
    t = np.arange(n) / rate
    x = np.zeros((n, channels))
    seg = int(0.8 * rate)
    roots = 110.0 * 2 ** (rng.integers(0, 12, size=n // seg + 1) / 12)
    for i in range(0, n, seg):
        sl = slice(i, min(n, i + seg))
        for k, a in ((1, 0.3), (2, 0.15), (3, 0.1), (5, 0.05), (8, 0.02)):
            for c in range(channels):
                x[sl, c] += a * np.sin(2 * np.pi * roots[i // seg] * k * t[sl] + 0.7 * c + k)
    noise = rng.standard_normal((n, channels))
    x += 0.03 * (noise + np.roll(noise, 1, axis=0))
    x *= (0.25 + 0.75 * np.abs(np.sin(2 * np.pi * 0.09 * t + 0.3)))[:, None]
    return x / np.max(np.abs(x)) * 10 ** (peak_db / 20)


def dither(rng, shape, kind):
    """Dither in LSB: none, RPDF on [-1/2, 1/2), or TPDF (difference of two uniforms)."""
    if kind == "none":
        return np.zeros(shape)
    if kind == "rpdf":
        return rng.random(shape) - 0.5
    if kind == "tpdf":
        return rng.random(shape) - rng.random(shape)
    raise ValueError(kind)


def _shaped(v, d, h, offset):
    """Error feedback, one channel, in plain Python floats (Zölzer ch. 2.3)."""
    hs = [float(c) for c in h]
    hist = [0.0] * len(hs)
    out = []
    floor = math.floor
    for vi, di in zip(v.tolist(), d.tolist()):
        fb = 0.0
        for hk, ek in zip(hs, hist):
            fb += hk * ek
        u = vi - fb
        q = floor(u + di + offset)
        hist.insert(0, q - u)
        hist.pop()
        out.append(q)
    return np.array(out, dtype=np.float64)


def quantize(x, bits, rng, *, quantizer="round", dither_kind="tpdf", h=(), gain=1.0):
    """Requantize ``gain * x`` (full scale 1.0) to ``bits``; return codes and the clip mask.

    Returns
    -------
    codes : ndarray of float, integers in [-2**(bits-1), 2**(bits-1) - 1]
    clipped : ndarray of bool
        Where the code was clipped to a rail.
    """
    scale = 2.0 ** (bits - 1)
    v = np.asarray(x, dtype=np.float64) * gain * scale
    d = dither(rng, v.shape, dither_kind)
    offset = 0.5 if quantizer == "round" else 0.0
    if len(h):
        q = np.stack([_shaped(v[:, c], d[:, c], h, offset) for c in range(v.shape[1])], axis=1)
    else:
        q = np.floor(v + d + offset)
    clipped = (q > scale - 1) | (q < -scale)
    return np.clip(q, -scale, scale - 1), clipped


def codes_for(q, bits, offset=0):
    """Codes as left-justified int32, shifted by ``offset`` frames (positive: padded at the
    start, negative: the first frames dropped)."""
    c = q.astype(np.int64) << (32 - bits)
    if offset > 0:
        c = np.concatenate((np.zeros((offset, c.shape[1]), np.int64), c))
    elif offset < 0:
        c = c[-offset:]
    return c.astype(np.int32)


def write_delivery(path, q, bits, rate, subtype, offset=0):
    """Write the codes with soundfile, integers in, so nothing rescales them."""
    import soundfile as sf

    sf.write(path, codes_for(q, bits, offset), rate, subtype=subtype)
    return path


def octave_bands(rate):
    """(nominal label, low, high) of the octave bands below fs/2 (IEC 61260-1 base-2 centres)."""
    labels = (31.5, 63, 125, 250, 500, 1000, 2000, 4000, 8000, 16000)
    out = []
    for k, label in zip(range(-5, 5), labels):
        fc = 1000.0 * 2.0 ** k
        if fc < rate / 2:
            out.append((label, fc / math.sqrt(2), min(fc * math.sqrt(2), rate / 2)))
    return out


def band_means_db(h, rate):
    """Mean of |NTF|² over each octave band, dB, on a fine grid (NTF = 1 - Σ h_k z^-k)."""
    n = np.concatenate(([1.0], -np.asarray(h, dtype=np.float64)))
    out = {}
    for label, lo, hi in octave_bands(rate):
        f = np.linspace(lo, hi, 4001)
        z = np.exp(-2j * np.pi * f / rate)
        ntf = np.polynomial.polynomial.polyval(z, n)
        out[label] = 10 * math.log10(float(np.mean(np.abs(ntf) ** 2)))
    return out
