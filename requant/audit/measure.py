"""The second pass: the real error of the delivery, measured over the overlap.

With the offset and the gain known, each block of the delivery's codes and the
aligned master goes through the compiled kernel :mod:`requant.dsp.residual`,
which forms ``e = delivered - gain·master`` in LSBs of the delivery, leaves out
clipped samples, and sums per window (:data:`WINDOW` frames, the quiet-passage
window of the convert report's analysis) the figures every time-domain result
of the audit comes from. The error and the scaled master then feed the convert
report's own streaming analysis (:class:`requant.dsp.analysis.ErrorAnalyzer`:
Welch spectrum, weighted noise, signal-correlated error, quietest passage, and
the loudness of the master and of the delivery, ``gain·master + e``),
unchanged, so the audit and the report measure the same way.

A fixed number of evenly spread stretches of the error (:data:`RESERVOIR_CHUNKS`
of :data:`RESERVOIR_FRAMES` frames) is kept for the error's distribution
(whitened first when shaped, see :mod:`requant.audit.identify`). Memory is a
few blocks and that sample, whatever the length; the per-window sums add 48
bytes per channel and window (about 7 kB per minute of stereo).
"""

from dataclasses import dataclass

import numpy as np

from requant.audit.align import rails
from requant.dsp.analysis import ErrorAnalyzer
from requant.dsp.residual import ACC_FIELDS, WSUM_FIELDS

__all__ = ["Measurement", "measure", "RESERVOIR_CHUNKS", "RESERVOIR_FRAMES"]

#: Stretches of the error kept for its distribution, and their length in frames.
RESERVOIR_CHUNKS = 24
RESERVOIR_FRAMES = 16384
_NW = len(WSUM_FIELDS)
_NA = len(ACC_FIELDS)


@dataclass
class Measurement:
    """Everything the second pass saw.

    Attributes
    ----------
    bits : int
        The delivery's word length (the unit of every LSB figure).
    frames, channels : int
        The overlap measured.
    counted, clipped : int
        Samples (frames x channels) measured, and left out as clipped.
    windows : ndarray, (windows, channels, 6)
        Per-window sums, :data:`requant.dsp.residual.WSUM_FIELDS`, LSB.
    window_frames : int
    min_e, max_e : float, LSB
        Extremes of the error over the samples counted.
    analyzer : requant.dsp.analysis.ErrorAnalyzer
        Fed with the master as it is (not times the gain) and the error; not
        finished (the method is named first: ``set_model``). Its quietest
        passage's signal level is the master's: add the gain in dB.
    reservoir : list of ndarray (frames, channels)
        Stretches of the error, LSB; NaN where clipped.
    gain_correction : float
        δ of the whole-overlap refit (:func:`_refit`): the gain is
        ``alignment.gain·(1 + δ)``.
    """

    bits: int
    frames: int
    channels: int
    counted: int
    clipped: int
    windows: np.ndarray
    window_frames: int
    min_e: float
    max_e: float
    analyzer: ErrorAnalyzer
    reservoir: list
    gain_correction: float = 0.0

    @property
    def scale(self):
        return float(1 << (self.bits - 1))

    def totals(self):
        """Σ of each :data:`WSUM_FIELDS` over windows and channels (LSB)."""
        return self.windows.sum(axis=(0, 1))


def _reservoir_plan(frames):
    if frames <= RESERVOIR_CHUNKS * RESERVOIR_FRAMES:
        starts = np.arange(0, frames, RESERVOIR_FRAMES)
    else:
        starts = np.linspace(0, frames - RESERVOIR_FRAMES, RESERVOIR_CHUNKS).astype(np.int64)
    return [(int(s), int(min(RESERVOIR_FRAMES, frames - s))) for s in starts]


def _keep_stretches(plan, store, pos, m, codes, e_out, *, gain_lsb, shift, bits):
    """Copy the parts of the planned stretches that lie in this block (LSB, NaN clipped)."""
    n = m.shape[0]
    kmin, kmax = rails(bits)
    scale = float(1 << (bits - 1))
    for i, (s, length) in enumerate(plan):
        a, b = max(s, pos), min(s + length, pos + n)
        if a >= b:
            continue
        e = e_out[a - pos:b - pos].astype(np.float64) * scale
        k = codes[a - pos:b - pos] >> shift
        x = gain_lsb * m[a - pos:b - pos].astype(np.float64)
        e[((k >= kmax) & (x > kmax)) | ((k <= kmin) & (x < kmin))] = np.nan
        store[i][a - s:b - s] = e


def _refit(win):
    """The gain's relative correction from a fit over the whole overlap.

    ``e ≈ δ·x + c`` by least squares over every sample counted (the sums
    hold all it needs). The fit on the loud stretch
    (:func:`requant.audit.align.refine`) left δ of order 10⁻⁶ to 10⁻⁴ (few
    bits); the whole file narrows it. The sums are left as they are: ``δ·x``
    adds about 10⁻³ LSB RMS to the error, and an error that follows the
    signal must not be fitted away.
    """
    n, sx, se, sxe, sx2, _ = (win[..., i].sum() for i in range(_NW))
    if n <= 1:
        return 0.0
    vx = sx2 / n - (sx / n) ** 2
    if vx <= 0.0:
        return 0.0
    return float((sxe / n - (sx / n) * (se / n)) / vx)


def measure(master, delivered, alignment, bits, *, progress=None):
    """Measure the error over the overlap (see the module notes).

    Parameters
    ----------
    master, delivered : requant.audit.sources.Source
    alignment : requant.audit.align.Alignment
    bits : int, 1..32
        The delivery's word length.
    progress : callable(done_frames, total_frames), optional

    Returns
    -------
    Measurement
    """
    from requant.dsp import native

    ch, rate, n_all = master.channels, master.rate, alignment.overlap_frames
    # the delivery is gain x master + error: its loudness is measured from the same blocks
    an = ErrorAnalyzer(ch, rate, bits=bits, quantizer="round", dither="tpdf",
                       total_frames=n_all, true_peak=False, own_sums=False,
                       output_gain=alignment.gain)
    qw = an.QW
    block = max(qw, 1 << 16)
    kern = native.kernel("residual", m=np.dtype(master.dtype))
    scale = float(1 << (bits - 1))
    shift, (kmin, kmax) = 32 - bits, rails(bits)
    gain_lsb = alignment.gain * scale
    e_out = np.empty(block * ch, np.float32)
    wsum = np.zeros(_NW * ch * (block // qw))
    acc = np.array([0.0, np.inf, -np.inf] * ch)
    plan = _reservoir_plan(n_all)
    store = [np.full((length, ch), np.nan) for _, length in plan]
    windows = []
    d0 = alignment.start_frame
    itm = master.blocks(d0 - alignment.offset_frames, n_all, block)
    itd = delivered.blocks(d0, n_all, block)
    pos = 0
    for x, c in zip(itm, itd):
        n = min(x.shape[0], c.shape[0])
        x, c = np.ascontiguousarray(x[:n]), np.ascontiguousarray(c[:n])
        kern(x.reshape(-1), c.reshape(-1), n, ch, shift, gain_lsb, 1.0 / scale, kmin, kmax, qw,
             e_out, wsum, acc)
        nw = -(-n // qw)
        windows.append(wsum[:_NW * ch * nw].reshape(nw, ch, _NW).copy())
        es = e_out[:n * ch].reshape(n, ch)
        an.feed(x, es)  # the master unscaled: the analysis's figures of it are scaled after
        _keep_stretches(plan, store, pos, x, c, es, gain_lsb=gain_lsb, shift=shift, bits=bits)
        pos += n
        if progress is not None:
            progress(pos, n_all)
    win = np.concatenate(windows) if windows else np.zeros((0, ch, _NW))
    delta = _refit(win)
    tot = win.sum(axis=0)  # per channel, LSB
    inv = 1.0 / scale
    an.use_sums(sum_x=tot[:, 1] * inv, sum_e=tot[:, 2] * inv, sum_xe=tot[:, 3] * inv * inv,
                sum_x2=tot[:, 4] * inv * inv, sum_e2=tot[:, 5] * inv * inv)
    accr = acc.reshape(ch, _NA)
    counted = int(tot[:, 0].sum())
    return Measurement(bits=bits, frames=pos, channels=ch, counted=counted,
                       gain_correction=delta,
                       clipped=int(accr[:, 0].sum()), windows=win, window_frames=qw,
                       min_e=float(accr[:, 1].min()) if counted else 0.0,
                       max_e=float(accr[:, 2].max()) if counted else 0.0,
                       analyzer=an, reservoir=store)
