"""Confusion table of requant audit: true method against identified method.

Random deliveries are made by the tests' own quantizer (tests/audit_fixtures.py:
numpy and plain Python from the textbook definitions, not requant's kernel):
random word lengths 8 to 20, quantizer, dither (none, RPDF, TPDF), shaping on
or off (Wannamaker's 9-tap filter, a second-order notch of our own, first
order), offsets of up to ±3000 frames, gains from -6 to +0.5 dB of either
polarity, from 10-second programme at 44.1 or 48 kHz. Each is audited and the
table counts true method (dither, and whether shaped) against identified
method; word length, offset, gain and quantizer are scored beside it.
Seeded: the same run gives the same table. Usage:

    python benchmarks/audit_confusion.py [--count 60] [--seed 2026]
"""

import argparse
import sys
import tempfile
from collections import Counter
from pathlib import Path

import numpy as np
import soundfile as sf

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from audit_fixtures import NOTCH_2, WANNAMAKER_9, programme, quantize, write_delivery  # noqa: E402

from requant.audit import run_audit  # noqa: E402

SHAPERS = {"wannamaker-9": WANNAMAKER_9, "notch-2": NOTCH_2, "first-order": (1.0,)}
LABELS = ["none", "rpdf", "tpdf", "none+shaped", "rpdf+shaped", "tpdf+shaped", "unknown",
          "unknown+shaped", "tpdf-hp", "failed"]


def label(dither, shaped):
    return dither + ("+shaped" if shaped else "")


def one(rng, work):
    """Make and audit one random delivery; return (true, found, scores, description)."""
    rate = int(rng.choice([44100, 48000]))
    bits = int(rng.integers(8, 21))
    quantizer = str(rng.choice(["round", "truncate"]))
    dither = str(rng.choice(["none", "rpdf", "tpdf"]))
    shaper = str(rng.choice(["none", "none", *SHAPERS]))
    h = SHAPERS.get(shaper, ())
    offset = int(rng.integers(-3000, 3001))
    gain_db = float(rng.uniform(-6.0, 0.5))
    polarity = int(rng.choice([-1, 1]))
    x = programme(10, rate, rng, peak_db=-6.0 if h else -1.0).astype(np.float32)
    sf.write(work / "m.wav", x, rate, subtype="FLOAT")
    q, _ = quantize(x.astype(np.float64), bits, rng, quantizer=quantizer, dither_kind=dither,
                    h=h, gain=polarity * 10 ** (gain_db / 20))
    write_delivery(work / "d.wav", q, bits, rate, "PCM_16" if bits <= 16 else "PCM_24",
                   offset=offset)
    true = label(dither, bool(h))
    desc = f"{bits}-bit {quantizer} {dither} {shaper} @{rate}"
    try:
        r, _ = run_audit(work / "m.wav", work / "d.wav")
    except Exception as exc:  # counted, and shown
        return true, "failed", {}, f"{desc}: {type(exc).__name__}: {exc}"
    a = r["alignment"]
    dc_removed = shaper == "first-order"
    scores = {
        "word length": r["word_length"] == bits,
        "offset exact": a["offset_frames"] == offset,
        "gain within 0.01 dB": abs(a["gain_db"] - gain_db) <= 0.01,
        "polarity": a["polarity"] == polarity,
        "quantizer": r["quantizer"] == (None if dc_removed else quantizer),
    }
    return true, label(r["dither"], r["shaped"]), scores, desc


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--count", type=int, default=60)
    ap.add_argument("--seed", type=int, default=2026)
    a = ap.parse_args()
    rng = np.random.default_rng(a.seed)
    table, scores, misses = Counter(), Counter(), []
    with tempfile.TemporaryDirectory() as tmp:
        for i in range(a.count):
            true, found, s, desc = one(rng, Path(tmp))
            table[true, found] += 1
            for k, v in s.items():
                scores[k] += bool(v)
            if true != found or not all(s.values()):
                misses.append(f"  #{i}: {desc}: identified {found}; "
                              + ", ".join(k for k, v in s.items() if not v))
    rows = [t for t in LABELS if any(table[t, f] for f in LABELS)]
    cols = [f for f in LABELS if any(table[t, f] for t in LABELS)]
    width = max(len(c) for c in cols) + 2
    print(f"{a.count} random deliveries (seed {a.seed}); rows: true method, columns: identified")
    corner = "true / found"
    print(f"{corner:16}" + "".join(f"{c:>{width}}" for c in cols))
    for t in rows:
        print(f"{t:16}" + "".join(f"{table[t, c] or '.':>{width}}" for c in cols))
    right = sum(table[t, t] for t in LABELS)
    print(f"method right: {right}/{a.count} ({100 * right / a.count:.0f}%)")
    for k in ("word length", "offset exact", "gain within 0.01 dB", "polarity", "quantizer"):
        print(f"{k}: {scores[k]}/{a.count}")
    if misses:
        print("misses:")
        print("\n".join(misses))
    return 0


if __name__ == "__main__":
    sys.exit(main())
