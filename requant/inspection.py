"""Say what an audio file really holds: word length in use, levels, clipping,
DC offset, digital silence and noise floor.

The file is streamed in blocks (memory does not grow with its length), and
every figure is the same, bit for bit, whatever the block size.

How each figure is found
------------------------
bits_used
    Integer PCM (``PCM_S8``, ``PCM_U8``, ``PCM_16``, ``PCM_24``, ``PCM_32``):
    the samples are read as int32, which libsndfile left-justifies, and the
    bit patterns of all samples are OR-ed together. The effective word length
    is 32 minus the trailing zeros of the OR: 16-bit audio in a 24-bit file
    gives 16. Floating point and other encodings: the smallest ``b`` such that
    every sample lies on the grid 2^-(b-1) (full scale 1.0). If ``b`` exceeds
    24 (the float32 significand; 32 for float64 files) the content is
    reported as ``"float"`` with the container's own bits (24 for float32, 53
    for float64). A file of zeros gives 0.
peak_dbfs, true_peak_dbtp
    ``20 log10(max |x|)``; the true peak per ITU-R BS.1770-4 Annex 2
    (:mod:`requant.dsp.truepeak`, zero history before the file, zero flush after).
rms_dbfs
    AES17: a full-scale sine reads 0 dBFS, i.e. ``10 log10(2 mean(x^2))``.
dc_offset, dc_offset_dbfs
    The mean, and ``20 log10 |mean|`` (relative to full-scale amplitude, like
    the peak). The overall figure is the channel mean of largest magnitude.
clipped_samples, clip_runs
    Samples in runs of at least ``clip_run`` (default 3) consecutive samples
    at full scale, and the number of such runs. "At full scale" means
    ``1 - 2^-(B-1) <= |x| <= 1`` with B the container's bits, but at most 16:
    this covers the top and bottom codes of every integer container, and
    also content of 16 bits or more clipped at its own ceiling inside a wider
    container (16-bit audio in a 24-bit file). Float files use B = 16.
    A single full-scale sample is not counted: a peak may touch full scale
    once without harm; three in a row is common practice for "clipped".
over_samples
    Samples with ``|x| > 1`` (only possible in float files); they clip when
    converted to PCM.
silent_fraction
    The share of samples exactly 0.
noise_floor_dbfs
    The file is cut into blocks of ``floor_block_s`` (default 50 ms) from its
    start; the AES17 RMS level of each block that is not entirely zero is
    collected in a histogram of 0.01 dB bins, and the ``floor_percentile``
    (default 10th, nearest-rank) percentile of it is reported. It estimates
    the level of the quietest passages (hiss, hum, dither) while ignoring
    digital silence. A final partial block counts only when the file is
    shorter than one block. ``None`` when every block is silent.

dB figures of zero (silence) are ``None``, as in :mod:`requant.dsp.figures`.
Samples that are NaN or infinite (float files only) are counted in
``nonfinite_samples`` and then treated as 0 for every other figure (they do
not count as silent).
"""

from __future__ import annotations

import math
import os

import numpy as np

from requant.errors import UsageError

__all__ = ["inspect_file", "format_inspection", "DEFAULT_BLOCK_FRAMES"]

#: Frames read per block.
DEFAULT_BLOCK_FRAMES = 65536

#: Integer subtypes read as left-justified int32, and their word lengths.
_PCM_BITS = {"PCM_S8": 8, "PCM_U8": 8, "PCM_16": 16, "PCM_24": 24, "PCM_32": 32}

#: Word lengths of other subtypes (significand bits for float; decoded word
#: length for the companding codecs). Others (lossy codecs) are unknown.
_OTHER_BITS = {"FLOAT": 24, "DOUBLE": 53, "ULAW": 14, "ALAW": 13, "DPCM_8": 8, "DPCM_16": 16}

#: Largest grid word length recognised in non-integer files.
_GRID_LIMIT = {"FLOAT": 24, "DOUBLE": 32}

# Noise-floor histogram: 0.01 dB bins from -400 dB to +50 dB (values outside
# are counted in the end bins).
_HIST_LO_DB = -400.0
_HIST_STEP_DB = 0.01
_HIST_BINS = 45000


def _db20(value):
    """20 log10(|value|); None for zero."""
    value = abs(float(value))
    return 20.0 * math.log10(value) if value > 0.0 else None


def _power_dbfs(mean_square):
    """Mean square in dBFS per AES17 (full-scale sine = 0 dBFS); None for zero."""
    return 10.0 * math.log10(2.0 * mean_square) if mean_square > 0.0 else None


def _trailing_zeros32(value):
    value = int(value) & 0xFFFFFFFF
    return 32 if value == 0 else (value & -value).bit_length() - 1


def _update_runs(mask, carry, min_run):
    """Count samples and runs of True of length >= min_run in one block.

    Parameters
    ----------
    mask : ndarray, bool, shape (n,)
    carry : int
        Length of the run still open at the end of the previous block.
    min_run : int

    Returns
    -------
    samples, runs, carry : int
        Samples and runs completed in this block, and the run left open.
    """
    if mask.size == 0:
        return 0, 0, carry
    d = np.diff(mask.astype(np.int8), prepend=np.int8(0), append=np.int8(0))
    starts = np.flatnonzero(d == 1)
    lengths = np.flatnonzero(d == -1) - starts
    samples = runs = 0
    if carry:
        if mask[0]:
            lengths[0] += carry
        elif carry >= min_run:
            samples += carry
            runs += 1
    if mask[-1]:
        carry = int(lengths[-1])
        lengths = lengths[:-1]
    else:
        carry = 0
    done = lengths[lengths >= min_run]
    return samples + int(done.sum()), runs + int(done.size), carry


def _grid_bits(x):
    """Smallest b per channel with every sample on the grid 2^-(b-1); 0 if all zero.

    ``x`` : float64 (channels, frames), finite.
    """
    mant, expo = np.frexp(x)  # x = mant * 2**expo, 0.5 <= |mant| < 1
    mi = (mant * 2.0**53).astype(np.int64)  # exact: |mant| * 2**53 < 2**53
    low = mi & -mi  # lowest set bit (0 for zeros)
    tz = np.frexp(low.astype(np.float64))[1] - 1  # its position
    # lowest set bit of x has value 2**(expo - 53 + tz); on the 2^-(b-1) grid
    # iff that is >= 2^-(b-1), i.e. b >= 54 - expo - tz.
    need = np.where(x != 0.0, np.maximum(54 - expo - tz, 1), 0)
    return need.max(axis=1) if need.shape[1] else np.zeros(x.shape[0], dtype=np.int64)


class _Accumulator:
    """Running per-channel figures, fed one block at a time."""

    def __init__(self, channels, *, sample_rate, container_bits, clip_run, floor_block_s,
                 floor_percentile):
        from requant.dsp.truepeak import TruePeakMeter

        ch = channels
        self.ch = ch
        self.frames = 0
        self.silent = np.zeros(ch, dtype=np.int64)
        self.nonfinite = np.zeros(ch, dtype=np.int64)
        self.overs = np.zeros(ch, dtype=np.int64)
        self.peak = np.zeros(ch)
        self.vmax = np.full(ch, -np.inf)
        self.vmin = np.full(ch, np.inf)
        self.or_bits = np.zeros(ch, dtype=np.int64)
        self.grid_bits = np.zeros(ch, dtype=np.int64)
        self.clip_run = clip_run
        clip_bits = min(container_bits or 16, 16)
        self.clip_level = 1.0 - 2.0 ** -(clip_bits - 1)
        self.clip_carry = [0] * ch
        self.clipped = np.zeros(ch, dtype=np.int64)
        self.clip_runs = np.zeros(ch, dtype=np.int64)
        self.meter = TruePeakMeter(ch)
        self.block_len = max(1, int(round(floor_block_s * sample_rate)))
        self.percentile = floor_percentile
        self.pending = np.zeros((ch, 0))
        self.sum1 = np.zeros(ch)
        self.sum2 = np.zeros(ch)
        self.full_blocks = 0
        self.hist = np.zeros((ch, _HIST_BINS), dtype=np.int64)

    # -- per block -------------------------------------------------------
    def feed(self, x, ints=None):
        """Add one block: ``x`` float64 (frames, channels); ``ints`` its int32 codes.

        A damaged float file may hold samples whose squares overflow; those figures
        become infinite here and null in JSON (:func:`~requant.audio_io.writers.json_safe`),
        without a warning from numpy on the way.
        """
        with np.errstate(over="ignore", invalid="ignore"):
            self._feed(x, ints)

    def _feed(self, x, ints):
        n = x.shape[0]
        if n == 0:
            return
        self.frames += n
        # Work on (channels, frames) rows: reductions along contiguous rows are
        # many times faster than down the columns of a (frames, channels) array.
        xt = np.ascontiguousarray(x.T)
        self.silent += np.count_nonzero(xt == 0.0, axis=1)
        if ints is not None:
            it = np.ascontiguousarray(ints.T)
            self.or_bits |= np.bitwise_or.reduce(it, axis=1).astype(np.int64) & 0xFFFFFFFF
        else:
            bad = ~np.isfinite(xt)
            if bad.any():
                self.nonfinite += np.count_nonzero(bad, axis=1)
                xt = np.where(bad, 0.0, xt)
            self.grid_bits = np.maximum(self.grid_bits, _grid_bits(xt))
        ax = np.abs(xt)
        self.peak = np.maximum(self.peak, ax.max(axis=1))
        self.vmax = np.maximum(self.vmax, xt.max(axis=1))
        self.vmin = np.minimum(self.vmin, xt.min(axis=1))
        over = ax > 1.0
        self.overs += np.count_nonzero(over, axis=1)
        at_full = (ax >= self.clip_level) & ~over
        for c in range(self.ch):
            s, r, self.clip_carry[c] = _update_runs(at_full[c], self.clip_carry[c], self.clip_run)
            self.clipped[c] += s
            self.clip_runs[c] += r
        self.meter.process(xt.T)
        self._short_blocks(xt)

    def _short_blocks(self, xt):
        buf = np.concatenate([self.pending, xt], axis=1) if self.pending.shape[1] else xt
        L = self.block_len
        k = buf.shape[1] // L
        if k:
            # (channels, k, L) with contiguous rows: each block's sums depend
            # only on its own samples, whatever the read size.
            blocks = np.ascontiguousarray(buf[:, : k * L]).reshape(self.ch, k, L)
            self._add_blocks(blocks, histogram=True)
            self.full_blocks += k
        self.pending = np.array(buf[:, k * L:], dtype=np.float64)

    def _add_blocks(self, blocks, *, histogram):
        s1 = blocks.sum(axis=2)
        s2 = np.square(blocks).sum(axis=2)
        # Sequential running sums, block by block: independent of read size.
        self.sum1 = np.cumsum(np.column_stack([self.sum1, s1]), axis=1)[:, -1]
        self.sum2 = np.cumsum(np.column_stack([self.sum2, s2]), axis=1)[:, -1]
        if histogram:
            live = np.any(blocks != 0.0, axis=2)
            rows, cols = np.nonzero(live)
            if rows.size:
                ms = s2[rows, cols] / blocks.shape[2]
                with np.errstate(divide="ignore"):
                    level = 10.0 * np.log10(2.0 * ms)
                idx = np.floor((level - _HIST_LO_DB) / _HIST_STEP_DB)
                idx = np.clip(np.nan_to_num(idx, neginf=0.0), 0, _HIST_BINS - 1).astype(np.intp)
                np.add.at(self.hist, (rows, idx), 1)

    # -- end ---------------------------------------------------------------
    def finish(self):
        for c in range(self.ch):
            carry = self.clip_carry[c]
            if carry >= self.clip_run:
                self.clipped[c] += carry
                self.clip_runs[c] += 1
            self.clip_carry[c] = 0
        self.meter.finish()
        if self.pending.shape[1]:
            blocks = np.ascontiguousarray(self.pending)[:, None, :]
            self._add_blocks(blocks, histogram=self.full_blocks == 0)
            self.pending = np.zeros((self.ch, 0))

    def floor_db(self, hist):
        """Nearest-rank percentile of a level histogram; None if empty."""
        total = int(hist.sum())
        if total == 0:
            return None
        rank = max(1, math.ceil(self.percentile / 100.0 * total))
        idx = int(np.searchsorted(np.cumsum(hist), rank))
        return _HIST_LO_DB + (idx + 0.5) * _HIST_STEP_DB


def _check_int(name, value, minimum):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise TypeError(f"{name} must be an int; got {value!r}")
    if value < minimum:
        raise UsageError(f"{name}={value!r} must be at least {minimum}")


def _check_float(name, value, lo, hi):
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise TypeError(f"{name} must be a number; got {value!r}")
    if not (lo <= float(value) <= hi):
        raise UsageError(f"{name}={value!r} must be between {lo} and {hi}")


def inspect_file(path, *, block_frames=DEFAULT_BLOCK_FRAMES, clip_run=3,
                 dc_threshold_dbfs=-60.0, silent_threshold=0.5, floor_block_s=0.05,
                 floor_percentile=10.0):
    """Stream an audio file and report what it really holds.

    Parameters
    ----------
    path : str or os.PathLike
        Any file libsndfile reads (WAV, RF64, AIFF, FLAC, ...).
    block_frames : int, >= 1, default 65536
        Frames read per block. Results do not depend on it.
    clip_run : int, >= 1, default 3
        Shortest run of consecutive full-scale samples counted as clipping.
    dc_threshold_dbfs : float, dBFS, default -60.0
        A channel whose mean reaches this level (20 log10 |mean|) triggers
        the DC-offset recommendation (our choice: 0.1 % of full scale).
    silent_threshold : float, 0..1, default 0.5
        Share of samples exactly 0 from which the file is called mostly
        silent.
    floor_block_s : float, seconds, default 0.05
        Block length for the noise-floor estimate.
    floor_percentile : float, 0..100, default 10.0
        Percentile of block RMS levels reported as the noise floor.

    Returns
    -------
    report : dict
        Overall figures: ``path``, ``container`` (e.g. "WAV"), ``subtype``
        (e.g. "PCM_24"), ``sample_rate`` (Hz), ``channels`` (count),
        ``frames``, ``duration_s``, ``container_bits``, ``bits_used``,
        ``bits_kind`` ("pcm", "grid" or "float"), ``peak``, ``peak_dbfs``,
        ``true_peak``, ``true_peak_dbtp``, ``rms_dbfs``, ``dc_offset``,
        ``dc_offset_dbfs``, ``clipped_samples``, ``clip_runs``,
        ``over_samples``, ``nonfinite_samples``, ``silent_fraction``,
        ``noise_floor_dbfs``; ``per_channel``: a list with one dict of the
        same figures per channel (plus ``channel``, numbered from 1);
        ``settings``: the options used and the derived ``clip_level`` and
        ``floor_block_frames``; ``findings``: short codes of what was found;
        ``recommendations``: one plain sentence per finding.
        See the module docstring for how each figure is computed.

    Raises
    ------
    InputError (a ValueError)
        If the file does not exist or cannot be read as audio.
    UsageError (a ValueError)
        If an option is out of range.
    TypeError
        If an option has the wrong type.
    """
    from requant.audio_io.reader import open_input, read_block

    _check_int("block_frames", block_frames, 1)
    _check_int("clip_run", clip_run, 1)
    _check_float("dc_threshold_dbfs", dc_threshold_dbfs, -400.0, 0.0)
    _check_float("silent_threshold", silent_threshold, 0.0, 1.0)
    _check_float("floor_block_s", floor_block_s, 1e-4, 60.0)
    _check_float("floor_percentile", floor_percentile, 0.0, 100.0)

    with open_input(path) as f:
        container, subtype = f.format, f.subtype
        rate, ch = int(f.samplerate), int(f.channels)
        pcm_bits = _PCM_BITS.get(subtype)
        container_bits = pcm_bits if pcm_bits else _OTHER_BITS.get(subtype)
        acc = _Accumulator(ch, sample_rate=rate, container_bits=container_bits,
                           clip_run=clip_run, floor_block_s=floor_block_s,
                           floor_percentile=floor_percentile)
        done = 0
        if pcm_bits:
            buf = np.empty((block_frames, ch), dtype=np.int32)
            while True:
                ints = read_block(f, block_frames, "int32", buf, done)
                if ints.shape[0] == 0:
                    break
                # int32 / 2^31 equals libsndfile's own float64 reading, exactly.
                acc.feed(ints * 2.0**-31, ints)
                done += ints.shape[0]
        else:
            buf = np.empty((block_frames, ch), dtype=np.float64)
            while True:
                x = read_block(f, block_frames, "float64", buf, done)
                if x.shape[0] == 0:
                    break
                acc.feed(x)
                done += x.shape[0]
    acc.finish()
    return _build_report(
        acc, path=os.fspath(path), container=container, subtype=subtype, rate=rate,
        container_bits=container_bits, pcm_bits=pcm_bits,
        settings={
            "block_frames": block_frames, "clip_run": clip_run,
            "clip_level": acc.clip_level, "dc_threshold_dbfs": float(dc_threshold_dbfs),
            "silent_threshold": float(silent_threshold), "floor_block_s": float(floor_block_s),
            "floor_block_frames": acc.block_len, "floor_percentile": float(floor_percentile),
        },
    )


def _grid_limit(subtype, container_bits):
    """Largest grid word length recognised for a non-integer subtype."""
    return _GRID_LIMIT.get(subtype, min(container_bits or 24, 24))


def _bits_of_channel(acc, c, *, subtype, container_bits, pcm_bits):
    if pcm_bits:
        orv = int(acc.or_bits[c])
        return (0 if orv == 0 else 32 - _trailing_zeros32(orv)), "pcm"
    b = int(acc.grid_bits[c])
    if b <= _grid_limit(subtype, container_bits):
        return b, "grid"
    return container_bits, "float"


def _build_report(acc, *, path, container, subtype, rate, container_bits, pcm_bits, settings):
    frames, ch = acc.frames, acc.ch
    per = []
    for c in range(ch):
        bits, kind = _bits_of_channel(acc, c, subtype=subtype, container_bits=container_bits,
                                      pcm_bits=pcm_bits)
        mean = float(acc.sum1[c] / frames) if frames else None
        tp = float(acc.meter.true_peak[c])
        per.append({
            "channel": c + 1,
            "bits_used": bits,
            "bits_kind": kind,
            "peak": float(acc.peak[c]),
            "peak_dbfs": _db20(acc.peak[c]),
            "true_peak": tp,
            "true_peak_dbtp": _db20(tp),
            "rms_dbfs": _power_dbfs(acc.sum2[c] / frames) if frames else None,
            "dc_offset": mean,
            "dc_offset_dbfs": _db20(mean) if frames else None,
            "clipped_samples": int(acc.clipped[c]),
            "clip_runs": int(acc.clip_runs[c]),
            "over_samples": int(acc.overs[c]),
            "nonfinite_samples": int(acc.nonfinite[c]),
            "silent_fraction": float(acc.silent[c] / frames) if frames else None,
            "noise_floor_dbfs": acc.floor_db(acc.hist[c]),
            "_min": float(acc.vmin[c]),
            "_max": float(acc.vmax[c]),
        })
    kinds = {p["bits_kind"] for p in per}
    overall_kind = "float" if "float" in kinds else ("pcm" if pcm_bits else "grid")
    bits_values = [p["bits_used"] for p in per if p["bits_used"] is not None]
    total = frames * ch
    dc = max((p["dc_offset"] for p in per), key=abs) if frames and per else None
    tp_all = max((p["true_peak"] for p in per), default=0.0)
    report = {
        "path": path,
        "container": container,
        "subtype": subtype,
        "sample_rate": rate,
        "channels": ch,
        "frames": frames,
        "duration_s": frames / rate,
        "container_bits": container_bits,
        "bits_used": max(bits_values) if bits_values else None,
        "bits_kind": overall_kind,
        "peak": float(acc.peak.max()) if ch else 0.0,
        "peak_dbfs": _db20(acc.peak.max()) if ch else None,
        "true_peak": tp_all,
        "true_peak_dbtp": _db20(tp_all),
        "rms_dbfs": _power_dbfs(float(acc.sum2.sum()) / total) if total else None,
        "dc_offset": dc,
        "dc_offset_dbfs": _db20(dc) if dc is not None else None,
        "clipped_samples": int(acc.clipped.sum()),
        "clip_runs": int(acc.clip_runs.sum()),
        "over_samples": int(acc.overs.sum()),
        "nonfinite_samples": int(acc.nonfinite.sum()),
        "silent_fraction": float(acc.silent.sum() / total) if total else None,
        "noise_floor_dbfs": acc.floor_db(acc.hist.sum(axis=0)),
        "per_channel": per,
        "settings": settings,
    }
    findings, sentences = _recommend(report)
    for p in per:
        del p["_min"], p["_max"]
    report["findings"] = findings
    report["recommendations"] = sentences
    return report


def _fmt_db(value, unit):
    return "n/a" if value is None else f"{value:+.2f} {unit}"


def _count(n, noun):
    return f"1 {noun}" if n == 1 else f"{n} {noun}s"


def _recommend(r):
    """Findings (short codes) and one plain sentence for each."""
    out = []
    s = r["settings"]
    per = r["per_channel"]
    if r["frames"] == 0:
        return ["empty"], ["The file holds no samples."]
    if r["nonfinite_samples"]:
        out.append(("nonfinite",
                    f"NaN or infinite samples: {r['nonfinite_samples']}. The file is damaged or "
                    "was written by a faulty process; these figures take them as 0."))
    if r["silent_fraction"] == 1.0:
        out.append(("all-silent", "The file holds only digital silence (every sample is 0)."))
        return [k for k, _ in out], [t for _, t in out]
    if r["silent_fraction"] >= s["silent_threshold"]:
        out.append(("mostly-silent",
                    f"{100 * r['silent_fraction']:.0f} % of the samples are digital silence "
                    "(exactly 0): check for missing audio or long padding."))
    b, cb, kind = r["bits_used"], r["container_bits"], r["bits_kind"]
    if not b:
        pass  # no nonzero finite sample: nothing to say about the word length
    elif kind == "pcm" and b < cb:
        out.append(("lossless-reduction",
                    f"{b} bits in use out of {cb}: converting to {b} bits is lossless."))
    elif kind == "pcm":
        out.append(("full-word-length",
                    f"All {cb} bits are in use: a shorter word length adds quantization "
                    "error, so dither when converting."))
    elif kind == "grid":
        in_range = all(p["_min"] >= -1.0 and p["_max"] <= 1.0 - 2.0 ** -(b - 1) for p in per)
        if in_range:
            out.append(("lossless-reduction",
                        f"{b} bits in use: every sample lies on the {b}-bit grid, so "
                        f"converting to {b}-bit PCM is lossless."))
        else:
            out.append(("grid-over",
                        f"Every sample lies on the {b}-bit grid, but some reach or exceed full "
                        f"scale: lower the gain by 1 LSB or more before converting to {b} bits."))
    else:
        out.append(("float-content",
                    "The samples use floating-point resolution (they lie on no grid of "
                    f"{_grid_limit(r['subtype'], cb)} bits or fewer): converting to PCM adds "
                    "quantization error, so dither when converting."))
    if r["over_samples"]:
        out.append(("float-overs",
                    f"Samples above full scale: {r['over_samples']} (sample peak "
                    f"{_fmt_db(r['peak_dbfs'], 'dBFS')}). Lower the gain before converting to "
                    "PCM, or they will clip."))
    if r["true_peak"] > 1.0:
        out.append(("true-peak-over",
                    f"True peak is {_fmt_db(r['true_peak_dbtp'], 'dBTP')}, above 0 dBTP: lower "
                    "the gain before delivery, or the signal between samples will clip in "
                    "converters and decoders."))
    if r["clipped_samples"]:
        out.append(("clipping",
                    f"Clipping: {_count(r['clipped_samples'], 'sample')} in "
                    f"{_count(r['clip_runs'], 'run')} of {s['clip_run']} or more at full "
                    "scale. The audio has probably been clipped."))
    limit = 10.0 ** (s["dc_threshold_dbfs"] / 20.0)
    dc_ch = [p for p in per if p["dc_offset"] is not None and abs(p["dc_offset"]) >= limit]
    if dc_ch:
        where = ", ".join(
            f"channel {p['channel']} {_fmt_db(p['dc_offset_dbfs'], 'dBFS')} "
            f"(mean {p['dc_offset']:+.6f})" for p in dc_ch)
        out.append(("dc-offset",
                    f"DC offset at or above {s['dc_threshold_dbfs']:.0f} dBFS on {where}: "
                    "remove it with a high-pass filter before requantizing."))
    return [k for k, _ in out], [t for _, t in out]


def format_inspection(report):
    """Render an :func:`inspect_file` report as plain text for the console.

    Parameters
    ----------
    report : dict
        As returned by :func:`inspect_file`.

    Returns
    -------
    text : str
        Several lines, no trailing newline.
    """
    r = report
    per = r["per_channel"]
    kind_words = {"pcm": "integer PCM", "grid": "float samples on an integer grid",
                  "float": "floating point"}
    cbits = r["container_bits"]
    lines = [
        f"File         {r['path']}",
        f"Format       {r['container']}, {r['subtype']}, {r['sample_rate']} Hz, "
        f"{r['channels']} channel{'s' if r['channels'] != 1 else ''}",
        f"Length       {r['frames']} frames ({r['duration_s']:.3f} s)",
        f"Bits in use  {'unknown' if r['bits_used'] is None else r['bits_used']}"
        + (f" of {cbits}" if cbits is not None else "")
        + f" ({kind_words.get(r['bits_kind'], r['bits_kind'])})",
        "",
    ]

    def num(v, fmt):
        return "n/a" if v is None else format(v, fmt)

    rows = [
        ("Bits in use", "bits_used", "d"),
        ("Sample peak (dBFS)", "peak_dbfs", "+.2f"),
        ("True peak (dBTP)", "true_peak_dbtp", "+.2f"),
        ("RMS (dBFS, AES17)", "rms_dbfs", "+.2f"),
        ("DC offset (dBFS)", "dc_offset_dbfs", "+.1f"),
        ("Clipped samples", "clipped_samples", "d"),
        ("Samples over full scale", "over_samples", "d"),
        ("Digital silence (%)", "silent_fraction", "pct"),
        ("Noise floor (dBFS)", "noise_floor_dbfs", "+.1f"),
    ]
    heads = [f"ch {p['channel']}" for p in per] + (["all"] if len(per) > 1 else [])
    label_w = max(len(label) for label, _, _ in rows) + 2
    table = [" " * label_w + "".join(f"{h:>10}" for h in heads)]
    for label, key, fmt in rows:
        values = [p[key] for p in per] + ([r[key]] if len(per) > 1 else [])
        if fmt == "pct":
            cells = [num(None if v is None else 100.0 * v, ".1f") for v in values]
        else:
            cells = [num(v, fmt) for v in values]
        table.append(f"{label:<{label_w}}" + "".join(f"{c:>10}" for c in cells))
    lines += table
    s = r["settings"]
    lines += [
        "",
        f"Clipping: runs of {s['clip_run']} or more samples at full scale.",
        f"Noise floor: {s['floor_percentile']:g}th percentile of {1000 * s['floor_block_s']:g} ms "
        "block RMS levels, silent blocks excluded.",
        "",
        "Recommendations" if r["recommendations"] else "Recommendations: none",
    ]
    lines += [f"  - {text}" for text in r["recommendations"]]
    return "\n".join(lines)
