"""Benchmark: what keeping digital silence silent costs.

``--silence keep`` (the default) looks ahead for runs of exact zeros and holds
a trailing run of zeros shorter than ``silence_min`` until the next block; ``--silence dither``
does not. On material without silence the two must run at the same speed.
Each row alternates the two (A B A B ...) within this run and prints the
medians and their ratio, so machine noise hits both alike:

* ``kernel``: the requantizer alone, in this process, on a stereo block
  stream (no file I/O), unshaped and shaped;
* ``convert``: whole ``requant convert`` processes on a stereo 24-bit file.

Usage::

    python benchmarks/bench_silence.py [--minutes 5] [--repeats 5]
"""

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

PY = sys.executable


def music(frames, rate=48000, silent_share=0.0, seed=1):
    """Stereo noise-like programme at about -20 dBFS RMS; ``silent_share`` of it exact
    zeros in runs of one second."""
    rs = np.random.default_rng(seed)
    x = (0.1 * rs.standard_normal((frames, 2))).astype(np.float32)
    if silent_share:
        step = int(rate / silent_share)
        for start in range(0, frames, step):
            x[start:start + rate] = 0.0
    return x


def kernel_row(x, coeffs, repeats, block=65536):
    from requant.dsp.quantizer import Requantizer

    def once(frames):
        rq = Requantizer(2, bits=16, dither="tpdf", coeffs=coeffs, seed=1,
                         silence_frames=frames)
        codes = np.empty((block, 2), np.int16)
        err = np.empty((block, 2), np.float32)
        t = time.perf_counter()
        for i in range(0, x.shape[0], block):
            rq.process(x[i:i + block], codes=codes, err_out=err)
        while rq.held:
            rq.flush(codes=codes, err_out=err, max_frames=block)
        return time.perf_counter() - t

    once(960)
    once(0)  # compile and warm both
    keep, dither = [], []
    for _ in range(repeats):
        keep.append(once(960))
        dither.append(once(0))
    return keep, dither


def convert_row(src, out, repeats, extra=()):
    def once(mode):
        cmd = [PY, "-m", "requant", "convert", str(src), str(out), "--bits", "16", "--seed",
               "1", "--overwrite", "-q", "--silence", mode, *extra]
        t = time.perf_counter()
        subprocess.run(cmd, check=True, stderr=subprocess.DEVNULL)
        return time.perf_counter() - t

    once("keep")
    once("dither")
    keep, dither = [], []
    for _ in range(repeats):
        keep.append(once("keep"))
        dither.append(once("dither"))
    return keep, dither


def show(name, keep, dither):
    k, d = statistics.median(keep), statistics.median(dither)
    pairs = sorted(a / b for a, b in zip(keep, dither, strict=True))
    print(f"{name:44} keep {k:7.3f} s  dither {d:7.3f} s  keep/dither {k / d:5.3f} "
          f"(pairs {pairs[0]:.3f}..{pairs[-1]:.3f})")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=5.0)
    ap.add_argument("--repeats", type=int, default=5)
    args = ap.parse_args()
    import soundfile as sf

    rate = 48000
    frames = int(args.minutes * 60 * rate)
    x = music(frames)
    print(f"digital silence: keep vs dither, {args.minutes:g} min stereo 48 kHz, "
          f"median of {args.repeats}, alternated")
    show("kernel, no silence, unshaped", *kernel_row(x, (), args.repeats))
    show("kernel, no silence, shaped (9 taps)",
         *kernel_row(x, (2.412, -3.370, 3.937, -4.174, 3.353, -2.205, 1.281, -0.569, 0.0847),
                     args.repeats))
    with tempfile.TemporaryDirectory() as tmp:
        src = Path(tmp) / "master.wav"
        sf.write(src, x, rate, subtype="PCM_24")
        show("convert, no silence", *convert_row(src, Path(tmp) / "o.wav", args.repeats))
        sil = Path(tmp) / "gaps.wav"
        sf.write(sil, music(frames, silent_share=0.3), rate, subtype="PCM_24")
        show("convert, 30% silence (for information)",
             *convert_row(sil, Path(tmp) / "o.wav", args.repeats))


if __name__ == "__main__":
    main()
