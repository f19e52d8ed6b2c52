"""Benchmark: requant convert against the plain read-and-write floor.

Every row runs whole processes, alternated within one run (A B A B ...),
and reports the median wall time of each and their ratio, so machine noise
hits both sides alike. Usage:

    python benchmarks/bench_convert.py [--minutes 20] [--repeats 3] \
        [--rows tpdf,shaped,report,inspect,flac,rate,rss,help]
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

FLOOR_SCRIPT = r"""
import os, sys, numpy as np, soundfile as sf
src, out, err, subtype, fmt = sys.argv[1:6]
durable = len(sys.argv) > 6 and sys.argv[6] == "fsync"
with sf.SoundFile(src) as f:
    dt = 'float32' if f.subtype in ('FLOAT', 'PCM_16', 'PCM_24') else 'float64'
    buf = np.empty((65536, f.channels), dtype=dt)
    codes = np.zeros((65536, f.channels), dtype=np.int16)
    with sf.SoundFile(out, 'w', f.samplerate, f.channels, subtype, format=fmt) as w:
        e = (sf.SoundFile(err, 'w', f.samplerate, f.channels, 'FLOAT', format='WAV')
             if err != '-' else None)
        while True:
            x = f.read(65536, dtype=dt, out=buf)
            if len(x) == 0:
                break
            w.write(codes[:len(x)])
            if e is not None:
                e.write(x.astype(np.float32, copy=False))
        if e is not None:
            e.close()
if durable:  # what requant does before renaming its outputs into place
    for p in (out, err):
        if p != '-':
            fd = os.open(p, os.O_RDONLY)
            os.fsync(fd)
            os.close(fd)
"""


READ_SCRIPT = r"""
import sys, numpy as np, soundfile as sf
with sf.SoundFile(sys.argv[1]) as f:
    buf = np.empty((65536, f.channels), dtype='float32')
    while len(f.read(65536, dtype='float32', out=buf)):
        pass
"""


def make_input(path, minutes, subtype, fmt, fs=48000):
    import numpy as np
    import soundfile as sf

    if path.exists():
        return
    rng = np.random.default_rng(1)
    block = fs * 10
    with sf.SoundFile(path, "w", fs, 2, subtype, format=fmt) as f:
        for i in range(int(minutes * 6)):
            t = (np.arange(block) + i * block) / fs
            x = 0.3 * np.sin(2 * np.pi * 997 * t) + 0.05 * rng.standard_normal(block)
            f.write(np.stack([x, 0.8 * x], 1).astype(np.float32))


def make_program(path, minutes):
    """A programme-like input: tones and noise under a slowly varying level (12 dB crest)."""
    import numpy as np
    import soundfile as sf

    if path.exists():
        return
    fs = 48000
    rng = np.random.default_rng(2)
    block = fs * 10
    with sf.SoundFile(path, "w", fs, 2, "FLOAT", format="WAV") as f:
        for i in range(int(minutes * 6)):
            t = (np.arange(block) + i * block) / fs
            env = 0.05 + 0.45 * np.abs(np.sin(2 * np.pi * 0.13 * t)) ** 3
            x = env * (0.6 * np.sin(2 * np.pi * 220 * t) + 0.3 * np.sin(2 * np.pi * 331 * t)
                       + 0.1 * rng.standard_normal(block))
            f.write(np.stack([x, 0.9 * x], 1).astype(np.float32))


def timed(cmd):
    t = time.perf_counter()
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t


def peak_rss_mb(cmd):
    code = ("import resource, subprocess, sys; subprocess.run(sys.argv[1:], check=True, "
            "stdout=subprocess.DEVNULL); "
            "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024)")
    out = subprocess.run([PY, "-c", code, *cmd], check=True, capture_output=True, text=True)
    return float(out.stdout.strip())


def alternate(cmds, repeats):
    times = {k: [] for k in cmds}
    for _ in range(repeats):
        for k, c in cmds.items():
            times[k].append(timed(c))
    return {k: statistics.median(v) for k, v in times.items()}


def requant_cmd(*args):
    return [PY, "-m", "requant", *map(str, args)]


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--minutes", type=float, default=20.0)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--rows", default="tpdf,shaped,report,inspect,flac,rate,rss,help")
    ap.add_argument("--work", default=str(ROOT / "bench_output"))
    a = ap.parse_args()
    rows = set(a.rows.split(","))
    work = Path(a.work)
    work.mkdir(exist_ok=True)
    src = work / f"stereo48k_{a.minutes:g}min_float.wav"
    make_input(src, a.minutes, "FLOAT", "WAV")
    out, err = work / "out16.wav", work / "err.wav"
    floor = [PY, "-c", FLOOR_SCRIPT, str(src), str(out), str(err), "PCM_16", "WAV"]
    dfloor = floor + ["fsync"]
    # An installed package has its modules compiled to bytecode (pip compiles a wheel's;
    # Python writes them on first import unless PYTHONDONTWRITEBYTECODE is set, as it is on
    # some CI machines). Compile requant's once here, so that no row pays ~0.03 s per process
    # for compiling source that a user's install would not.
    subprocess.run([PY, "-m", "compileall", "-q", str(ROOT / "requant")], check=True,
                   stdout=subprocess.DEVNULL)
    # warm the numba cache once
    subprocess.run(requant_cmd("convert", src, out, "--overwrite", "--shaping", "hearing",
                               "--error", err), check=True, stdout=subprocess.DEVNULL)
    print(f"input: {a.minutes:g} min stereo 48 kHz float WAV; "
          f"medians of {a.repeats} alternated runs")
    print(f"{'row':48} {'median s':>9} {'floor s':>8} {'ratio':>6} {'target':>7}")
    base = ["convert", src, out, "--overwrite", "--error", err, "--seed", 1, "--quiet"]
    if "tpdf" in rows:
        m = alternate({"floor": floor, "dfloor": dfloor, "rq": requant_cmd(*base)}, a.repeats)
        print(f"{'WAV float -> 16-bit WAV + error, TPDF':48} {m['rq']:9.2f} {m['floor']:8.2f} "
              f"{m['rq'] / m['floor']:6.2f} {'<=1.30':>7}")
        print(f"{'  against a floor that also fsyncs its outputs':48} {m['rq']:9.2f} "
              f"{m['dfloor']:8.2f} {m['rq'] / m['dfloor']:6.2f}")
    if "shaped" in rows:
        m = alternate({"floor": floor, "dfloor": dfloor,
                       "rq": requant_cmd(*base, "--shaping", "hearing")}, a.repeats)
        print(f"{'WAV float -> 16-bit WAV + error, hearing 9-tap':48} {m['rq']:9.2f} "
              f"{m['floor']:8.2f} {m['rq'] / m['floor']:6.2f} {'<=1.25':>7}")
        print(f"{'  against a floor that also fsyncs its outputs':48} {m['rq']:9.2f} "
              f"{m['dfloor']:8.2f} {m['rq'] / m['dfloor']:6.2f}")
    if "report" in rows:
        rep = work / "report.json"
        m = alternate({"plain": requant_cmd(*base),
                       "report": requant_cmd(*base, "--report", rep, "--overwrite")}, a.repeats)
        print(f"{'the same with the full report (JSON) vs without':48} {m['report']:9.2f} "
              f"{m['plain']:8.2f} {m['report'] / m['plain']:6.2f} {'<=1.15':>7}")
        msrc = work / f"program48k_{a.minutes:g}min_float.wav"
        make_program(msrc, a.minutes)
        mbase = ["convert", msrc, out, "--overwrite", "--error", err, "--seed", 1, "--quiet"]
        m = alternate({"plain": requant_cmd(*mbase),
                       "report": requant_cmd(*mbase, "--report", rep, "--overwrite")}, a.repeats)
        print(f"{'  same, programme-like input (dynamics)':48} {m['report']:9.2f} "
              f"{m['plain']:8.2f} {m['report'] / m['plain']:6.2f} {'<=1.15':>7}")
    if "inspect" in rows:
        # inspect (every figure, true peak and loudness) against reading the file as float32
        # blocks in a process of its own (Python, numpy and soundfile imported)
        rd = [PY, "-c", READ_SCRIPT, str(src)]
        m = alternate({"read": rd, "rq": requant_cmd("inspect", src)}, a.repeats)
        print(f"{'inspect vs reading it as float32 blocks':48} {m['rq']:9.2f} {m['read']:8.2f} "
              f"{m['rq'] / m['read']:6.2f} {'<=3.00':>7}")
        msrc = work / f"program48k_{a.minutes:g}min_float.wav"
        make_program(msrc, a.minutes)
        m = alternate({"read": [PY, "-c", READ_SCRIPT, str(msrc)],
                       "rq": requant_cmd("inspect", msrc)}, a.repeats)
        print(f"{'  same, programme-like input (dynamics)':48} {m['rq']:9.2f} {m['read']:8.2f} "
              f"{m['rq'] / m['read']:6.2f} {'<=3.00':>7}")
    if "flac" in rows:
        fsrc = work / f"stereo48k_{a.minutes:g}min_24.flac"
        make_input(fsrc, a.minutes, "PCM_24", "FLAC")
        fout = work / "out16.flac"
        ffloor = [PY, "-c", FLOOR_SCRIPT, str(fsrc), str(fout), "-", "PCM_16", "FLAC"]
        m = alternate({"floor": ffloor, "rq": requant_cmd("convert", fsrc, fout, "--overwrite",
                                                          "--seed", 1, "--quiet")}, a.repeats)
        print(f"{'FLAC 24 -> FLAC 16, TPDF':48} {m['rq']:9.2f} {m['floor']:8.2f} "
              f"{m['rq'] / m['floor']:6.2f} {'<=1.20':>7}")
    if "rate" in rows:
        # one-pass delivery at another rate: 96 kHz 24-bit -> 44.1 kHz 16-bit, TPDF, error file,
        # against the same conversion without --rate (issue goal <= 5x, moonshot 3x)
        hsrc = work / f"stereo96k_{a.minutes:g}min_24.wav"
        make_input(hsrc, a.minutes, "PCM_24", "WAV", fs=96000)
        hbase = ["convert", hsrc, out, "--overwrite", "--error", err, "--seed", 1, "--quiet"]
        m = alternate({"plain": requant_cmd(*hbase),
                       "rate": requant_cmd(*hbase, "--rate", 44100)}, a.repeats)
        print(f"{'96k 24-bit -> 44.1k 16-bit + error, vs no --rate':48} {m['rate']:9.2f} "
              f"{m['plain']:8.2f} {m['rate'] / m['plain']:6.2f} {'<=5.00':>7}")
        short = work / "stereo96k_1min_24.wav"
        make_input(short, 1, "PCM_24", "WAV", fs=96000)
        for s, label in ((short, "1 min"), (hsrc, f"{a.minutes:g} min")):
            rss = peak_rss_mb(requant_cmd("convert", s, out, "--overwrite", "--error", err,
                                          "--quiet", "--rate", 44100))
            print(f"{'peak RSS, --rate 44100, ' + label + ' (MB)':48} {rss:9.1f} {'':>8} "
                  f"{'':>6} {'flat':>7}")
    if "rss" in rows:
        short = work / "stereo48k_1min_float.wav"
        make_input(short, 1, "FLOAT", "WAV")
        for s, label in ((short, "1 min"), (src, f"{a.minutes:g} min")):
            rss = peak_rss_mb(requant_cmd("convert", s, out, "--overwrite", "--error", err,
                                          "--shaping", "hearing", "--quiet"))
            print(f"{'peak RSS, ' + label + ' (MB)':48} {rss:9.1f} {'':>8} {'':>6} {'<=200':>7}")
        for s, label in ((short, "1 min"), (src, f"{a.minutes:g} min")):
            rss = peak_rss_mb(requant_cmd("inspect", s))
            print(f"{'peak RSS, inspect, ' + label + ' (MB)':48} {rss:9.1f} {'':>8} {'':>6} "
                  f"{'flat':>7}")
    if "help" in rows:
        ts = [timed(requant_cmd("--help")) for _ in range(7)]
        print(f"{'requant --help start-up':48} {statistics.median(ts):9.3f} {'':>8} {'':>6} "
              f"{'<0.30':>7}")


if __name__ == "__main__":
    main()
