"""Benchmark: the resume index, in memory (numpy arrays) against on disk (sqlite3).

A rerun asks, for every file it walks, what the manifest says about it. The batch
streams the manifest into :class:`requant.library.resume.ResumeIndex`, a private
temporary sqlite3 database; this script measures it against the alternative the issue
named, a compact in-memory index (:class:`MemoryIndex` below: sorted 64-bit keys and
one numpy array per field, about 60 bytes a file, built from ``array`` buffers and
deduplicated with a stable sort). Both read the same synthetic manifest (rows as the
batch writes them, 500 files to a folder) and are asked about every file a folder at a
time, as the plan asks. Each measurement is its own process: build time, lookup time,
and the peak RSS above the process's RSS before building (``ru_maxrss``).

    python benchmarks/bench_resume_index.py                  # 10k, 200k and 1M rows
    python benchmarks/bench_resume_index.py --sizes 10000,200000 --repeats 3
"""

import argparse
import array
import json
import os
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
PER_FOLDER = 500


def name(i):
    return f"bank{i // PER_FOLDER:04d}/clip{i:07d}.wav"


def make_manifest(path, n):
    """n converted rows in the batch's compact form (made once)."""
    import hashlib

    stamp = path.with_suffix(".complete")
    if stamp.exists() and stamp.read_text() == str(n):
        return
    with open(path, "w", encoding="utf-8") as fh:
        for i in range(n):
            src = name(i)
            digest = hashlib.sha256(src.encode()).hexdigest()
            fh.write(json.dumps({
                "source": src, "seed": 1234567890123456789 - i, "status": "converted",
                "reason": "new", "output_sha256": digest,
                "source_identity": {"size": 14444, "mtime_ns": 1733333333333333333 + i,
                                    "sha256": digest[::-1]},
                "output_stat": [9644, 1733333334333333333 + i], "snr_db": 76.4154,
                "duration_s": 0.1, "seconds": 0.0123, "worker": "vm:12345",
                "settings_id": "c" * 32, "run_id": "20261204T171700.000Z-12345",
                "timestamp": "2026-12-04T17:17:00.123+00:00"}, separators=(",", ":")) + "\n")
    stamp.write_text(str(n))


class MemoryIndex:
    """The in-memory alternative: what ResumeIndex keeps, in numpy arrays.

    Per source: its 64-bit key (sorted), the offsets of its latest row and latest good
    row, how the good row fits, the source's and the output's recorded size and time,
    the duration, the latest row's crc, class and SNR (~60 bytes); per output name its
    key (8 bytes). For brevity it keeps the fields of each source's last row (the batch
    keeps a good row's fields past a later failure); on this benchmark's manifests, one
    row per file, the two agree.
    """

    FIELDS = (("good", "q"), ("fits", "b"), ("ssize", "q"), ("smtime", "q"), ("osize", "q"),
              ("omtime", "q"), ("dur", "f"), ("last", "q"), ("crc", "I"), ("cls", "b"),
              ("snr", "f"))

    def __init__(self, manifest_path, *, sid, fmt):
        self.path, self.sid, self.fmt = manifest_path, sid, fmt

    def build(self):
        import numpy as np

        from requant.library import resume as R
        from requant.library.manifest import RUN_STATUS, iter_manifest

        keys, outs = array.array("q"), array.array("q")
        cols = {f: array.array(t) for f, t in self.FIELDS}
        for offset, line, ev in iter_manifest(self.path):
            if ev is None or ev["status"] == RUN_STATUS:
                continue
            entry = R.index_entry(offset, line, ev, sid=self.sid, fmt=self.fmt)
            keys.append(entry[0])
            for (f, _), v in zip(self.FIELDS, entry[1:]):
                cols[f].append(-1 if v is None else v)
            if isinstance(ev["output"], str):
                outs.append(R.name_key(ev["output"]))
        k = np.frombuffer(keys, dtype=np.int64)
        order = np.argsort(k, kind="stable")
        sk = k[order]
        del k
        last = np.ones(len(sk), bool)  # the last row of each key wins (good fields aside)
        last[:-1] = sk[1:] != sk[:-1]
        self.keys = sk[last]
        del sk
        for f, t in self.FIELDS:
            col = np.frombuffer(cols[f], dtype=np.dtype(t))[order]
            setattr(self, f, col[last].copy())
            del col
            del cols[f][:]
        self.outs = np.unique(np.frombuffer(outs, dtype=np.int64))
        del outs[:]

    def lookup(self, sources):
        import numpy as np

        from requant.library.resume import name_key

        q = np.array([name_key(s) for s in sources], dtype=np.int64)
        pos = np.searchsorted(self.keys, q)
        pos[pos >= len(self.keys)] = 0
        hit = self.keys[pos] == q
        return {s: int(p) for s, p, h in zip(sources, pos, hit) if h}


def one(kind, n, path):
    """In a fresh process: build, look every file up a folder at a time; print JSON."""
    from requant.library.resume import ResumeIndex

    base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    t0 = time.perf_counter()
    index = (ResumeIndex if kind == "sqlite" else MemoryIndex)(str(path), sid="c" * 32,
                                                               fmt="same")
    index.build()
    t1 = time.perf_counter()
    found = 0
    for start in range(0, n, PER_FOLDER):
        found += len(index.lookup([name(i) for i in range(start, min(n, start + PER_FOLDER))]))
    t2 = time.perf_counter()
    assert found == n, found
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps({"build_s": t1 - t0, "lookup_s": t2 - t1, "base_mb": base / 1024,
                      "peak_mb": peak / 1024}))


def main():
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--sizes", default="10000,200000,1000000")
    ap.add_argument("--repeats", type=int, default=1)
    ap.add_argument("--work", default=str(ROOT / "bench_output" / "resume_index"))
    ap.add_argument("--one", nargs=3, help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.one:
        one(a.one[0], int(a.one[1]), Path(a.one[2]))
        return
    work = Path(a.work)
    work.mkdir(parents=True, exist_ok=True)
    print(f"{'rows':>8} {'index':>7} {'build s':>8} {'rows/s':>9} {'lookup s':>9} "
          f"{'files/s':>9} {'RSS MB':>7} {'+MB':>6} {'B/file':>7}")
    for n in [int(s) for s in a.sizes.split(",")]:
        path = work / f"manifest_{n}.jsonl"
        make_manifest(path, n)
        for kind in ("memory", "sqlite"):
            runs = []
            for _ in range(a.repeats):
                out = subprocess.run([sys.executable, __file__, "--one", kind, str(n), str(path)],
                                     capture_output=True, text=True, check=True)
                runs.append(json.loads(out.stdout))
            b = statistics.median(r["build_s"] for r in runs)
            lk = statistics.median(r["lookup_s"] for r in runs)
            peak = statistics.median(r["peak_mb"] for r in runs)
            extra = statistics.median(r["peak_mb"] - r["base_mb"] for r in runs)
            print(f"{n:>8} {kind:>7} {b:8.2f} {n / b:9.0f} {lk:9.2f} {n / lk:9.0f} "
                  f"{peak:7.0f} {extra:6.1f} {extra * 2**20 / n:7.0f}", flush=True)
        os.sync()


if __name__ == "__main__":
    main()
