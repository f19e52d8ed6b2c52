"""Benchmark: ``requant batch`` on libraries of 10k, 50k and 200k tiny files.

Two steps:

1. Generate the trees (once, kept in ``bench_output/scale/``) with our own fast WAV
   writer: 0.1 s clips, 48 kHz, 24-bit mono, 500 to a folder, each a different
   stretch of seeded noise (so every file has its own bytes and hash).
2. For each size, as whole ``requant batch --jobs 2`` processes: a first run into a
   fresh DST (the sources read once before, and the disk left to go idle: this VM's
   disk is slow and its page cache drops cold pages early), no-op reruns (nothing
   changed), and reruns after touching 1 % of the
   sources (a new modification time, the same bytes: each is hashed, found up to
   date and its new identity recorded). Each reports wall time, files per second,
   the plan's own time (walk and decisions), the peak RSS of the batch process
   (``wait4``: the largest of the process and its workers), and the manifest's bytes.

Goals (issue 23), printed as ratios measured in this run: the no-op rerun's peak RSS
at 200k at most 1.3x that at 10k and under 300 MB; a no-op rerun adds at most one row;
at most 600 manifest bytes per converted file; no-op planning at least 20,000 files/s;
a first run of at least 1,500 files/s on 2 cores.

    python benchmarks/bench_scale.py            # --quick: the sizes above, first runs once
    python benchmarks/bench_scale.py --full     # first runs repeated too (about 3x longer)
    python benchmarks/bench_scale.py --sizes 10000 --repeats 5
"""

import argparse
import json
import os
import shutil
import statistics
import struct
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
PY = sys.executable
RUNNER = "from requant.cli import console; console()"
RATE, SECONDS, PER_FOLDER = 48000, 0.1, 500


def wav_header(frames, rate=RATE, channels=1, bits=24):
    """A canonical 44-byte PCM WAV header (RIFF 1991: 'fmt ' then 'data')."""
    block = channels * bits // 8
    data = frames * block
    return (b"RIFF" + struct.pack("<I", 36 + data) + b"WAVE" + b"fmt "
            + struct.pack("<IHHIIHH", 16, 1, channels, rate, rate * block, block, bits)
            + b"data" + struct.pack("<I", data))


def make_tree(folder, n, seconds=SECONDS):
    """n clips in folders of PER_FOLDER, written with plain os.write (made once)."""
    import numpy as np

    stamp = folder.with_name(folder.name + ".complete")  # beside the tree, not in it
    if stamp.exists() and stamp.read_text() == f"{n} {seconds}":
        return 0.0
    if folder.exists():
        shutil.rmtree(folder)
    stamp.unlink(missing_ok=True)
    t = time.perf_counter()
    frames = int(RATE * seconds)
    rng = np.random.default_rng(23)
    noise = np.clip(rng.standard_normal(frames * 8) * 0.1 * 2**23, -2**23, 2**23 - 1)
    pcm = noise.astype("<i4").view(np.uint8).reshape(-1, 4)[:, :3].tobytes()  # 24-bit LE
    head, size = wav_header(frames), frames * 3
    span = len(pcm) - size
    for i in range(n):
        if i % PER_FOLDER == 0:
            sub = folder / f"bank{i // PER_FOLDER:04d}"
            sub.mkdir(parents=True)
        at = (i * 3 * 7919) % span
        fd = os.open(sub / f"clip{i:07d}.wav", os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
        try:
            os.write(fd, head + pcm[at:at + size])
        finally:
            os.close(fd)
    stamp.write_text(f"{n} {seconds}")
    return time.perf_counter() - t


def touch(src, n, fraction, round_no):
    """Give ``fraction`` of the files a new modification time (same bytes)."""
    step = max(1, int(round(1 / fraction)))
    stamp_ns = time.time_ns() - 3600 * 10**9 + round_no  # new for every round and every run
    count = 0
    for i in range(round_no % step, n, step):
        os.utime(src / f"bank{i // PER_FOLDER:04d}" / f"clip{i:07d}.wav", ns=(stamp_ns, stamp_ns))
        count += 1
    return count


def settle(timeout_s=90.0):
    """Write back what waits, then wait until the disks are idle (``/proc/diskstats``: under
    5 % busy for a second), so a deleted tree or the last run's writes do not land on the
    next run's clock."""
    os.sync()

    def busy_ms():
        try:
            with open("/proc/diskstats") as fh:
                return sum(int(f[12]) for f in (ln.split() for ln in fh)
                           if len(f) > 12 and f[2].startswith(("sd", "vd", "nvme", "xvd")))
        except OSError:
            return None

    deadline = time.monotonic() + timeout_s
    last = busy_ms()
    while last is not None and time.monotonic() < deadline:
        time.sleep(1.0)
        now = busy_ms()
        if now - last < 50:
            return
        last = now


def warm(src):
    """Read every source once, so a first run reads them from the page cache as a rerun
    does (this machine's disk is slow and its cache reclaims cold pages early)."""
    for folder in sorted(os.listdir(src)):
        for name in os.listdir(src / folder):
            with open(src / folder / name, "rb", buffering=0) as fh:
                fh.read()


def run_batch(src, dst, jobs=2):
    """One whole batch process: (wall s, peak RSS MB, summary, manifest bytes added, manifest
    bytes)."""
    manifest = dst / "requant-manifest.jsonl"
    before = manifest.stat().st_size if manifest.exists() else 0
    cmd = [PY, "-c", RUNNER, "batch", str(src), str(dst), "--jobs", str(jobs), "--seed", "1",
           "--quiet"]
    t = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t
    err = proc.stderr.read().decode(errors="replace")
    proc.stderr.close()
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0:
        raise SystemExit(f"batch failed ({proc.returncode}): {err[-2000:]}")
    summary = json.loads((dst / "requant-summary.json").read_text())
    size = manifest.stat().st_size
    return wall, usage.ru_maxrss / 1024, summary, size - before, size


def measure(n, work, repeats, first_repeats, fraction):
    src, dst = work / f"src_{n}", work / f"dst_{n}"
    gen = make_tree(src, n)
    rows = {"first": [], "no-op": [], "touched": []}
    for _ in range(first_repeats):
        shutil.rmtree(dst, ignore_errors=True)
        warm(src)
        settle()  # a deleted tree and the last run's writes, written back before the clock
        wall, rss, s, added, size = run_batch(src, dst)
        assert s["counts"]["converted"] == n, s["counts"]
        rows["first"].append((wall, rss, s, added, size))
    settle()
    for _ in range(repeats):
        wall, rss, s, added, size = run_batch(src, dst)
        assert s["counts"]["up_to_date"] == n and s["manifest_rows"] == 0, s["counts"]
        rows["no-op"].append((wall, rss, s, added, size))
    for r in range(repeats):
        touched = touch(src, n, fraction, r + 1)
        wall, rss, s, added, size = run_batch(src, dst)
        assert s["counts"]["up_to_date"] == n and s["manifest_rows"] == touched, s["counts"]
        rows["touched"].append((wall, rss, s, added, size))
    return gen, rows


def main():
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--sizes", default="10000,50000,200000")
    ap.add_argument("--repeats", type=int, default=3, help="no-op and touched reruns per size")
    ap.add_argument("--full", action="store_true", help="repeat the first runs too")
    ap.add_argument("--quick", action="store_true", help="the default: first runs once")
    ap.add_argument("--touch", type=float, default=0.01, help="fraction of files touched")
    ap.add_argument("--work", default=str(ROOT / "bench_output" / "scale"))
    a = ap.parse_args()
    work = Path(a.work)
    work.mkdir(parents=True, exist_ok=True)
    sizes = [int(s) for s in a.sizes.split(",")]
    first_repeats = a.repeats if a.full else 1
    load0 = os.getloadavg()[0]
    t_all = time.perf_counter()
    results = {}
    for n in sizes:
        gen, rows = measure(n, work, a.repeats, first_repeats, a.touch)
        results[n] = rows
        print(f"{n} files ready" + (f" (written in {gen:.1f} s)" if gen else " (cached)"),
              flush=True)
    print(f"\n0.1 s 24-bit mono 48 kHz WAV clips -> 16-bit WAV, TPDF, --jobs 2 on "
          f"{os.cpu_count()} cores; medians of {a.repeats} reruns"
          + ("" if a.full else " (first runs once: --full repeats them)")
          + f"; load average before {load0:.2f}, after {os.getloadavg()[0]:.2f}")
    head = (f"{'files':>7} {'run':>8} {'wall s':>7} {'files/s':>8} {'plan s':>7} "
            f"{'plan files/s':>12} {'peak RSS MB':>11} {'rows':>6} {'bytes added':>12} "
            f"{'manifest B':>11} {'B/converted':>11}")
    print(head)
    med = {}
    for n in sizes:
        for kind, rows in results[n].items():
            wall = statistics.median(r[0] for r in rows)
            rss = statistics.median(r[1] for r in rows)
            plan = statistics.median(r[2]["plan"]["seconds"] for r in rows)
            added = statistics.median(r[3] for r in rows)
            written = statistics.median(r[2]["manifest_rows"] + 1 for r in rows)  # + run row
            total = rows[-1][4]
            per = (statistics.median(r[3] / r[2]["counts"]["converted"] for r in rows)
                   if kind == "first" else None)
            med[(n, kind)] = {"wall": wall, "rss": rss, "plan": plan, "rows": written,
                              "per": per}
            print(f"{n:>7} {kind:>8} {wall:7.2f} {n / wall:8.0f} {plan:7.2f} "
                  f"{n / plan:12.0f} {rss:11.0f} {written:6.0f} {added:12.0f} {total:11d} "
                  f"{'' if per is None else f'{per:.0f}':>11}")
    lo, hi = min(sizes), max(sizes)
    noop_lo, noop_hi = med[(lo, "no-op")], med[(hi, "no-op")]
    print("\ngoals (issue 23):")
    print(f"  no-op peak RSS {hi} / {lo} files: {noop_hi['rss'] / noop_lo['rss']:.2f}x "
          f"(goal <= 1.3x), {noop_hi['rss']:.0f} MB (goal < 300 MB)")
    print(f"  rows a no-op rerun adds: {max(med[(n, 'no-op')]['rows'] for n in sizes):.0f} "
          "(goal <= 1)")
    print(f"  manifest bytes per converted file: "
          f"{max(med[(n, 'first')]['per'] for n in sizes):.0f} (goal <= 600)")
    print(f"  no-op planning: {min(n / med[(n, 'no-op')]['plan'] for n in sizes):.0f} files/s "
          "(goal >= 20000)")
    print(f"  first run: {min(n / med[(n, 'first')]['wall'] for n in sizes):.0f} files/s, "
          "whole process (goal >= 1500)")
    print(f"(this benchmark took {(time.perf_counter() - t_all) / 60:.1f} min)")


if __name__ == "__main__":
    main()
