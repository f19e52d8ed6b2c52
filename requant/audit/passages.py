"""Where in the file the error follows the signal.

The convert report judges its quietest passage by two figures
(:func:`requant.dsp.analysis.passage_correlation`): the squared correlation
of signal and error, and the tonal share of the error's spectrum. An
undithered error follows the signal audibly where the signal is quiet, so
the audit applies the same measure, window by window
(:data:`requant.audit.measure` windows, the report's quiet-passage length):

* the squared correlation of every window, from the measuring pass's sums;
* both figures for the :data:`CANDIDATES` quietest windows that are not
  digital silence, read again from the two files (a bounded amount of work
  whatever the length).

A window is marked when either figure exceeds the report's threshold
(:data:`requant.dsp.analysis.CORRELATED_WARNING_FRACTION`); neighbouring
marked windows make one passage. Times are in the delivery's timeline.
"""

import numpy as np

from requant.audit.align import rails
from requant.dsp.analysis import CORRELATED_WARNING_FRACTION, passage_correlation

__all__ = ["correlated_passages", "window_correlation", "CANDIDATES", "MAX_PASSAGES"]

#: Quiet windows measured in full (Welch spectrum and correlation).
CANDIDATES = 24
#: Most passages listed.
MAX_PASSAGES = 20


def window_correlation(windows):
    """Squared correlation of signal and error per window, the larger over channels.

    Parameters
    ----------
    windows : ndarray (windows, channels, 6)
        Sums :data:`requant.dsp.residual.WSUM_FIELDS`, LSB.

    Returns
    -------
    rho2, level : ndarray (windows,)
        The squared correlation, and the mean square of the signal (LSB²,
        the larger over channels).
    """
    n, sx, se, sxe, sx2, se2 = (windows[..., i] for i in range(6))
    nn = np.maximum(n, 1.0)
    vx = sx2 / nn - (sx / nn) ** 2
    ve = se2 / nn - (se / nn) ** 2
    cov = sxe / nn - (sx / nn) * (se / nn)
    ok = (vx > 0) & (ve > 0)
    rho2 = np.zeros_like(vx)
    rho2[ok] = cov[ok] ** 2 / (vx[ok] * ve[ok])
    return rho2.max(axis=1), (sx2 / nn).max(axis=1)


def _window_error(master, delivered, alignment, meas, w):
    """(signal, error) of window ``w`` in LSB, clipped samples' error 0; None if silent."""
    qw = meas.window_frames
    d0 = alignment.start_frame + w * qw
    count = min(qw, meas.frames - w * qw)
    m = master.read(d0 - alignment.offset_frames, count).astype(np.float64)
    codes = delivered.read(d0, count)
    if m.shape[0] < 16 or np.count_nonzero(m) < 0.5 * m.size:
        return None  # (mostly) digital silence: not a passage, as the report decides
    scale = meas.scale
    x = alignment.gain * scale * m
    k = (codes >> (32 - meas.bits)).astype(np.float64)
    kmin, kmax = rails(meas.bits)
    e = k - x
    e[((k >= kmax) & (x > kmax)) | ((k <= kmin) & (x < kmin))] = 0.0
    return x, e


def correlated_passages(master, delivered, alignment, meas):
    """Passages where the error follows the signal: ``[{"start_s", "end_s"}]``.

    Parameters
    ----------
    master, delivered : requant.audit.sources.Source
        Open, for the quiet windows' second look.
    alignment : requant.audit.align.Alignment
    meas : requant.audit.measure.Measurement
    """
    rho2, level = window_correlation(meas.windows)
    busy = meas.windows[..., 0].min(axis=1) >= 0.5 * meas.window_frames
    marked = (rho2 > CORRELATED_WARNING_FRACTION) & busy & (level > 0)
    quiet = [int(w) for w in np.argsort(level, kind="stable") if level[w] > 0 and busy[w]]
    for w in [w for w in quiet if not marked[w]][:CANDIDATES]:
        xe = _window_error(master, delivered, alignment, meas, w)
        if xe is not None and max(passage_correlation(*xe)) > CORRELATED_WARNING_FRACTION:
            marked[w] = True
    rate = float(master.rate)
    out, w = [], 0
    while w < marked.size and len(out) < MAX_PASSAGES:
        if not marked[w]:
            w += 1
            continue
        v = w
        while v + 1 < marked.size and marked[v + 1]:
            v += 1
        first = alignment.start_frame + w * meas.window_frames
        last = alignment.start_frame + min((v + 1) * meas.window_frames, meas.frames)
        out.append({"start_s": first / rate, "end_s": last / rate})
        w = v + 1
    return out
