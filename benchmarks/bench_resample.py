"""Benchmark: the sample-rate converter alone, against reading the same file.

For each pair of rates it writes (once, seeded) a stereo 24-bit WAV of the
given length at the input rate, then, alternating within one run, reads the
file as float32 blocks of 65536 frames (the floor) and reads it the same way
while feeding every block to a ``Resampler`` (with one thread, and with the
default threads). It prints the median of each, the resampler's own time (the
time spent in ``process``/``finish``) and the ratios to reading, so that
machine noise hits both sides alike. Usage:

    python benchmarks/bench_resample.py [--minutes 20] [--repeats 3] \
        [--pairs 96000:44100,44100:48000]
"""

import argparse
import statistics
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))

BLOCK = 65536


def make_input(path, minutes, rate):
    """Programme-like stereo: a tone sweep and noise, 24-bit WAV, written once."""
    import numpy as np
    import soundfile as sf

    if path.exists():
        return
    rng = np.random.default_rng(1)
    block = rate * 10
    tmp = path.with_name(path.name + ".part")
    with sf.SoundFile(tmp, "w", rate, 2, "PCM_24", format="WAV") as f:
        for i in range(int(minutes * 6)):
            t = (np.arange(block) + i * block) / rate
            x = (0.3 * np.sin(2 * np.pi * (200 + 50 * i) * t)
                 + 0.05 * rng.standard_normal(block))
            f.write(np.stack([x, 0.8 * x], 1).astype(np.float32))
    tmp.rename(path)


def read_only(path):
    import numpy as np
    import soundfile as sf

    t0 = time.perf_counter()
    frames = 0
    with sf.SoundFile(path) as f:
        buf = np.empty((BLOCK, f.channels), dtype=np.float32)
        while True:
            x = f.read(BLOCK, dtype="float32", out=buf)
            if not len(x):
                break
            frames += len(x)
    return time.perf_counter() - t0, 0.0, frames


def read_and_resample(path, rate_out, threads):
    import numpy as np
    import soundfile as sf

    from requant.dsp.resample import Resampler

    t0 = time.perf_counter()
    spent = 0.0
    frames = 0
    with sf.SoundFile(path) as f:
        r = Resampler(f.samplerate, rate_out, f.channels, threads=threads)
        buf = np.empty((BLOCK, f.channels), dtype=np.float32)
        while True:
            x = f.read(BLOCK, dtype="float32", out=buf)
            if not len(x):
                break
            s = time.perf_counter()
            frames += len(r.process(x))
            spent += time.perf_counter() - s
        s = time.perf_counter()
        frames += len(r.finish())
        spent += time.perf_counter() - s
    return time.perf_counter() - t0, spent, frames


def main():
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--minutes", type=float, default=20.0)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--pairs", default="96000:44100,44100:48000")
    ap.add_argument("--work", default=str(ROOT / "bench_output"))
    args = ap.parse_args()
    work = Path(args.work)
    work.mkdir(parents=True, exist_ok=True)

    from requant.dsp.native import kernel
    from requant.dsp.resample import Resampler, design

    kernel("resample")  # compiled (or loaded) before any timing
    for pair in args.pairs.split(","):
        rate_in, rate_out = (int(v) for v in pair.split(":"))
        rf = design(rate_in, rate_out)
        src = work / f"resample_{rate_in}_{args.minutes:g}min.wav"
        make_input(src, args.minutes, rate_in)
        rows = {"read float32": (read_only, (src,)),
                "read + resample, 1 thread": (read_and_resample, (src, rate_out, 1)),
                "read + resample, default threads": (read_and_resample, (src, rate_out, None))}
        times = {name: [] for name in rows}
        for _ in range(args.repeats):  # alternated: A B C A B C ...
            for name, (fn, fargs) in rows.items():
                times[name].append(fn(*fargs))
        n_in = times["read float32"][0][2]
        want = Resampler.frames_out(n_in, rate_in, rate_out)
        print(f"\n{rate_in} -> {rate_out} Hz, {args.minutes:g} min stereo 24-bit WAV "
              f"({rf.taps_per_phase} taps per phase, {rf.total_taps:,} in all), "
              f"medians of {args.repeats}")
        floor = statistics.median(w for w, _, _ in times["read float32"])
        print(f"  {'':34} {'wall s':>8} {'x read':>7} {'resampler s':>12} {'x read':>7}")
        for name, runs in times.items():
            wall = statistics.median(w for w, _, _ in runs)
            spent = statistics.median(s for _, s, _ in runs)
            if name != "read float32":
                assert all(f == want for _, _, f in runs), (name, want)
            extra = (f"{spent:12.2f} {spent / floor:7.2f}" if spent else "")
            print(f"  {name:34} {wall:8.2f} {wall / floor:7.2f} {extra}")


if __name__ == "__main__":
    main()
