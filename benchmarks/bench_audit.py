"""Benchmark: requant audit against the time of reading both files.

A 20-minute stereo 48 kHz pair (a 24-bit WAV master with programme-like
dynamics, and its 16-bit TPDF delivery made by requant convert) is audited in
whole processes, alternated with a process that only reads both files as
float32 blocks (A B A B ...); the medians and their ratio come from the same
run, so machine noise hits both sides alike. Peak RSS of the audit for a
1-minute and a 20-minute pair shows that memory does not grow with length.
Usage:

    python benchmarks/bench_audit.py [--minutes 20] [--repeats 3]
"""

import argparse
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
PY = sys.executable

READ_SCRIPT = r"""
import sys, numpy as np, soundfile as sf
for path in sys.argv[1:3]:
    with sf.SoundFile(path) as f:
        buf = np.empty((65536, f.channels), dtype='float32')
        while f.read(65536, dtype='float32', out=buf).shape[0]:
            pass
"""


def make_master(path, minutes):
    """Programme-like: tones, chords that change, noise, a slowly varying level."""
    import numpy as np
    import soundfile as sf

    if path.exists():
        return
    fs = 48000
    rng = np.random.default_rng(2)
    block = fs * 10
    with sf.SoundFile(path, "w", fs, 2, "PCM_24", format="WAV") as f:
        for i in range(int(round(minutes * 6))):
            t = (np.arange(block) + i * block) / fs
            env = 0.05 + 0.45 * np.abs(np.sin(2 * np.pi * 0.13 * t)) ** 3
            root = 110.0 * 2 ** ((i % 5) / 12)
            x = env * (0.6 * np.sin(2 * np.pi * root * t) + 0.3 * np.sin(2 * np.pi * 1.5 * root * t)
                       + 0.1 * rng.standard_normal(block))
            f.write(np.stack([x, 0.9 * x], 1).astype(np.float32))


def make_delivery(master, out):
    if out.exists():
        return
    subprocess.run([PY, "-m", "requant", "convert", master, out, "--bits", "16", "--seed", "1",
                    "--quiet"], check=True)


def timed(cmd):
    t = time.perf_counter()
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL)
    return time.perf_counter() - t


def peak_rss_mb(cmd):
    code = ("import resource, subprocess, sys; subprocess.run(sys.argv[1:], check=True, "
            "stdout=subprocess.DEVNULL); "
            "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024)")
    out = subprocess.run([PY, "-c", code, *cmd], check=True, capture_output=True, text=True)
    return float(out.stdout.strip())


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--minutes", type=float, default=20.0)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--work", default=str(ROOT / "bench_output"))
    a = ap.parse_args()
    work = Path(a.work)
    work.mkdir(exist_ok=True)
    pairs = {}
    for minutes in sorted({1.0, a.minutes}):
        master = work / f"audit_master_{minutes:g}min_24.wav"
        delivered = work / f"audit_delivery_{minutes:g}min_16.wav"
        make_master(master, minutes)
        make_delivery(master, delivered)
        pairs[minutes] = (master, delivered)
    master, delivered = pairs[a.minutes]
    out = work / "audit.json"
    audit = [PY, "-m", "requant", "audit", master, delivered, "--json", out, "--overwrite",
             "--quiet"]
    read = [PY, "-c", READ_SCRIPT, str(master), str(delivered)]
    subprocess.run(audit, check=True)  # warm the kernel cache and the page cache
    times = {"read": [], "audit": []}
    for _ in range(a.repeats):
        times["read"].append(timed(read))
        times["audit"].append(timed(audit))
    m = {k: statistics.median(v) for k, v in times.items()}
    print(f"pair: {a.minutes:g} min stereo 48 kHz, 24-bit WAV master, 16-bit WAV delivery; "
          f"medians of {a.repeats} alternated runs")
    print(f"{'row':48} {'median s':>9} {'read s':>8} {'ratio':>6} {'target':>7}")
    print(f"{'audit (two passes, JSON) vs reading both files':48} {m['audit']:9.2f} "
          f"{m['read']:8.2f} {m['audit'] / m['read']:6.2f} {'<=4.00':>7}")
    for minutes, (mst, dlv) in pairs.items():
        rss = peak_rss_mb([PY, "-m", "requant", "audit", mst, dlv, "--quiet"])
        print(f"{'peak RSS, ' + f'{minutes:g} min' + ' (MB)':48} {rss:9.1f} {'':>8} {'':>6} "
              f"{'flat':>7}")


if __name__ == "__main__":
    main()
