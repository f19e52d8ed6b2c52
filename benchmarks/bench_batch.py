"""Benchmark: ``requant batch`` over a library of one-second clips, 1 against 2 workers.

Generates the clips once (seeded) into ``bench_output/batch_clips/``, then
runs whole ``requant batch`` processes into a fresh destination each time,
alternating ``--jobs 1`` and ``--jobs 2`` (A B A B ...) so that machine noise
hits both alike, and reports the median wall time, files per second and the
speed-up. Usage:

    python benchmarks/bench_batch.py [--clips 2000] [--repeats 3] [--jobs 1,2]

Targets (from the batch issue): at least 150 clips/s with 2 workers on 2
cores, and at least 1.8x from 1 to 2 workers.
"""

import argparse
import json
import os
import resource
import shutil
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
PY = sys.executable

# The same entry point as the installed ``requant`` script.
RUNNER = "from requant.cli import console; console()"


def make_clips(folder, n, *, rate=48000, seconds=1.0):
    """n seeded one-second stereo 24-bit WAV clips in 20 sub-folders (made once)."""
    import numpy as np
    import soundfile as sf

    stamp = folder / ".complete"
    if stamp.exists() and stamp.read_text() == f"{n} {rate} {seconds}":
        return
    if folder.exists():
        shutil.rmtree(folder)
    rng = np.random.default_rng(2024)
    frames = int(rate * seconds)
    t = np.arange(frames) / rate
    for i in range(n):
        sub = folder / f"bank{i % 20:02d}"
        sub.mkdir(parents=True, exist_ok=True)
        f0 = 110.0 * 2 ** (rng.integers(0, 48) / 12)
        env = np.exp(-t * rng.uniform(1, 8))
        x = 0.4 * env * np.sin(2 * np.pi * f0 * t) + 0.01 * rng.standard_normal(frames)
        sf.write(sub / f"clip{i:05d}.wav", np.stack([x, 0.9 * x], 1), rate, subtype="PCM_24")
    stamp.write_text(f"{n} {rate} {seconds}")


def run_once(src, dst, jobs):
    if dst.exists():
        shutil.rmtree(dst)
    os.sync()  # write back the previous run's files now, not during this run
    cmd = [PY, "-c", RUNNER, "batch", str(src), str(dst), "--jobs", str(jobs), "--seed", "1",
           "--quiet"]
    r0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    proc = subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    wall = time.perf_counter() - t
    r1 = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (r1.ru_utime - r0.ru_utime) + (r1.ru_stime - r0.ru_stime)
    if proc.returncode != 0:
        raise SystemExit(f"batch --jobs {jobs} failed ({proc.returncode}): {proc.stderr[-2000:]}")
    summary = json.loads((dst / "requant-summary.json").read_text())
    return wall, cpu, summary


def main():
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--clips", type=int, default=2000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--jobs", default="1,2")
    ap.add_argument("--work", default=str(ROOT / "bench_output"))
    a = ap.parse_args()
    work = Path(a.work)
    src = work / "batch_clips"
    t = time.perf_counter()
    make_clips(src, a.clips)
    print(f"clips ready in {src} ({time.perf_counter() - t:.1f} s)")
    jobs = [int(j) for j in a.jobs.split(",")]
    walls = {j: [] for j in jobs}
    inner = {j: [] for j in jobs}
    cpus = {j: [] for j in jobs}
    load0 = os.getloadavg()[0]
    # one warm-up run (numba cache, page cache)
    run_once(src, work / "batch_out", jobs[-1])
    for _ in range(a.repeats):
        for j in jobs:
            wall, cpu, summary = run_once(src, work / "batch_out", j)
            assert summary["counts"]["converted"] == a.clips, summary["counts"]
            walls[j].append(wall)
            cpus[j].append(cpu)
            inner[j].append(summary["wall_s"])
    shutil.rmtree(work / "batch_out", ignore_errors=True)
    print(f"{a.clips} one-second stereo 48 kHz 24-bit WAV clips -> 16-bit WAV, TPDF; "
          f"medians of {a.repeats} alternated whole-process runs on {os.cpu_count()} cores")
    print(f"load average (1 min) before: {load0:.2f}, after: {os.getloadavg()[0]:.2f} "
          "(other work on the machine slows the 2-worker runs most)")
    print(f"{'jobs':>4} {'wall s':>8} {'files/s':>8} {'in-run s':>9} {'in-run files/s':>15} "
          f"{'CPU s':>7} {'CPU ms/file':>12}")
    med = {}
    for j in jobs:
        med[j] = statistics.median(walls[j])
        mi = statistics.median(inner[j])
        mc = statistics.median(cpus[j])
        print(f"{j:>4} {med[j]:8.2f} {a.clips / med[j]:8.1f} {mi:9.2f} {a.clips / mi:15.1f} "
              f"{mc:7.2f} {1000 * mc / a.clips:12.2f}")
    if 1 in med and 2 in med:
        print(f"speed-up 1 -> 2 workers: {med[1] / med[2]:.2f}x (target >= 1.8x); "
              f"2 workers: {a.clips / med[2]:.0f} files/s (target >= 150)")


if __name__ == "__main__":
    main()
