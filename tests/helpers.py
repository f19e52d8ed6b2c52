"""Helpers shared by the tests: the CLI in a fresh process, and RIFF byte builders.

Byte builders follow RIFF 1991 (IBM & Microsoft, *Multimedia Programming
Interface and Data Specifications 1.0*) and EBU Tech 3306 (RF64), so the
expected bytes of a fixture are known exactly.
"""

from __future__ import annotations

import struct
import subprocess
import sys
import time

import numpy as np

__all__ = ["run_cli", "run_cli_timed", "cli_command", "u32", "chunk", "riff_wave", "rf64_wave",
           "fmt_pcm", "pcm24", "played_level"]


def cli_command(*args):
    """The argv that runs requant's command line as a user would (``python -m requant``)."""
    return [sys.executable, "-m", "requant", *map(str, args)]


def run_cli(*args, timeout=120, cwd=None, env=None, preexec_fn=None):
    """Run requant's CLI in a fresh process; return (code, stdout, stderr)."""
    proc = subprocess.run(cli_command(*args), capture_output=True, text=True, timeout=timeout,
                          cwd=cwd, env=env, preexec_fn=preexec_fn)
    return proc.returncode, proc.stdout, proc.stderr


def run_cli_timed(*args, timeout=120, env=None):
    """As :func:`run_cli`, with the wall time: (code, stdout, stderr, seconds)."""
    t0 = time.monotonic()
    code, out, err = run_cli(*args, timeout=timeout, env=env)
    return code, out, err, time.monotonic() - t0


def u32(v: int) -> bytes:
    return struct.pack("<I", v)


def chunk(cid: bytes, payload: bytes) -> bytes:
    # RIFF 1991: ckID FOURCC, ckSize DWORD little-endian (pad byte not counted),
    # ckData, then one zero pad byte if ckSize is odd.
    return cid + u32(len(payload)) + payload + b"\0" * (len(payload) & 1)


def riff_wave(chunks: list[tuple[bytes, bytes]]) -> tuple[bytes, list[tuple[str, int, int]]]:
    """RIFF 1991: 'RIFF', size of everything after the size field, 'WAVE', chunks.

    Returns the file and, per chunk, (id, payload offset, payload size).
    """
    body = bytearray(b"WAVE")
    where = []
    for cid, payload in chunks:
        where.append((cid.decode("ascii"), 8 + len(body) + 8, len(payload)))
        body += chunk(cid, payload)
    return b"RIFF" + u32(len(body)) + bytes(body), where


def rf64_wave(chunks: list[tuple[bytes, bytes]], *, table: tuple[bytes, ...] = (),
              sample_count: int = 0, form: bytes = b"RF64"
              ) -> tuple[bytes, list[tuple[str, int, int]]]:
    """EBU Tech 3306 RF64: 'RF64', 0xFFFFFFFF, 'WAVE', then ds64 first.

    ds64 payload: riffSize u64, dataSize u64, sampleCount u64, tableLength u32,
    then tableLength × (chunkId FOURCC, chunkSize u64). The data chunk and the
    chunks named in `table` carry 0xFFFFFFFF in their own size fields.
    """
    ds_size = 28 + 12 * len(table)
    body = bytearray(b"WAVE" + b"ds64" + u32(ds_size) + b"\0" * ds_size)
    where = [("ds64", 20, ds_size)]
    sizes = {}
    for cid, payload in chunks:
        marked = cid == b"data" or cid in table
        where.append((cid.decode("ascii"), 8 + len(body) + 8, len(payload)))
        size_field = 0xFFFFFFFF if marked else len(payload)
        body += cid + u32(size_field) + payload + b"\0" * (len(payload) & 1)
        sizes.setdefault(cid, len(payload))
    ds64 = struct.pack("<QQQI", len(body), sizes[b"data"], sample_count, len(table))
    ds64 += b"".join(cid + struct.pack("<Q", sizes[cid]) for cid in table)
    body[12:12 + ds_size] = ds64
    return form + u32(0xFFFFFFFF) + bytes(body), where


def fmt_pcm(channels: int, rate: int, bits: int) -> bytes:
    # RIFF 1991 WAVEFORMAT + PCM: wFormatTag=1, nChannels, nSamplesPerSec,
    # nAvgBytesPerSec, nBlockAlign, wBitsPerSample.
    block = channels * ((bits + 7) // 8)
    return struct.pack("<HHIIHH", 1, channels, rate, rate * block, block, bits)


def pcm24(codes: np.ndarray) -> bytes:
    # RIFF 1991: PCM samples of 17..24 bits take 3 bytes, little-endian, channels interleaved.
    return codes.astype("<i4").view(np.uint8).reshape(-1, 4)[:, :3].tobytes()


def played_level(path, gain_db, measure):
    """Level of a listening-kit file as its player plays it: the file's level plus the
    playback gain, measured independently of requant.

    ``measure`` 'LUFS': ITU-R BS.1770-4 integrated loudness by pyloudnorm (the reference
    library, REFERENCES.md §7); 'dBFS RMS': AES17 RMS (a full-scale sine is 0 dBFS). None
    for digital silence.
    """
    import soundfile as sf

    x, rate = sf.read(path, dtype="float64", always_2d=True)
    if measure == "LUFS":
        import pyloudnorm

        value = pyloudnorm.Meter(rate).integrated_loudness(x)
    else:
        ms = float(np.mean(x * x))
        value = 10 * np.log10(2 * ms) if ms > 0 else -np.inf
    return None if not np.isfinite(value) else float(value) + gain_db
