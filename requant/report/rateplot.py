"""The picture of a rate converter's filter (``requant rate show --plot``)."""

import io

import numpy as np

from requant.audio_io.atomic import AtomicOutputs
from requant.audio_io.writers import wrap_write_error
from requant.dsp.resample import REJECTION_DB, RIPPLE_DB

__all__ = ["plot_rate_filter", "render_rate_filter"]

#: Plot points of the full response; each is the largest |H| of its stretch of the grid,
#: so the stopband lobes' peaks are drawn whatever the filter's length.
_POINTS = 3000
#: Grid points per lobe of the response (a lobe is intermediate_rate / total_taps wide).
_PER_LOBE = 8


def _envelope(rf, hi):
    """(freqs, dB) of the response from 0 to ``hi``: the peak of each plot point's stretch."""
    lobes = hi / (rf.intermediate_rate / rf.total_taps)
    per = max(1, int(np.ceil(_PER_LOBE * lobes / _POINTS)))
    freqs, mag = rf.response(0.0, hi, _POINTS * per)
    mag = mag.reshape(_POINTS, per).max(axis=1)
    freqs = freqs.reshape(_POINTS, per)[:, 0]
    return freqs, 20.0 * np.log10(np.maximum(mag, 1e-15))


def render_rate_filter(rf):
    """The PNG (bytes) of a :class:`requant.dsp.resample.RateFilter`: the magnitude
    response with the 20 kHz, stopband-edge and lower-Nyquist marks, and the passband's
    deviation from 0 dB."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    hi = min(rf.intermediate_rate / 2, float(max(rf.rate_in, rf.rate_out)))
    freqs, db = _envelope(rf, hi)
    fig = Figure(figsize=(8, 6), dpi=100)
    FigureCanvasAgg(fig)
    top, bottom = fig.subplots(2, 1, gridspec_kw={"height_ratios": [3, 2]})
    top.plot(freqs / 1e3, db, color="k", lw=1.0, label="|H(f)| (peaks of the lobes)")
    nyq = min(rf.rate_in, rf.rate_out) / 2
    for f, style, label in (
            (rf.passband_edge_hz, dict(color="tab:green", ls="--"),
             f"passband edge {rf.passband_edge_hz:.0f} Hz"),
            (nyq, dict(color="tab:blue", ls=":"), f"lower Nyquist {nyq:g} Hz"),
            (rf.stopband_edge_hz, dict(color="tab:red", ls="--"),
             f"stopband edge {rf.stopband_edge_hz:.0f} Hz")):
        top.axvline(f / 1e3, lw=1.0, label=label, **style)
    top.axhline(-REJECTION_DB, color="tab:red", lw=0.8, ls=":",
                label=f"goal: {REJECTION_DB:g} dB rejection")
    top.set_xlim(0, hi / 1e3)
    top.set_ylim(-200, 10)
    top.set_xlabel("frequency (kHz)")
    top.set_ylabel("dB")
    top.set_title(f"{rf.rate_in} Hz -> {rf.rate_out} Hz ({rf.up}/{rf.down}): "
                  f"{rf.total_taps:,} taps, rejection {rf.stopband_rejection_db:.1f} dB",
                  fontsize=10)
    top.grid(True, alpha=0.3)
    top.legend(loc="upper right", fontsize=7.5)
    pf, pm = rf.response(0.0, rf.passband_edge_hz, 4000)
    dev = 20.0 * np.log10(pm)
    bottom.plot(pf / 1e3, dev * 1e6, color="k", lw=0.8)
    span = max(float(np.max(np.abs(dev))), 1e-9) * 1e6 * 1.3
    bottom.set_ylim(-span, span)
    bottom.set_xlim(0, rf.passband_edge_hz / 1e3)
    bottom.set_xlabel("frequency (kHz)")
    bottom.set_ylabel("passband deviation (µdB)")
    bottom.set_title(f"passband ripple ±{rf.passband_ripple_db:.2e} dB "
                     f"(goal ±{RIPPLE_DB:g} dB = ±{RIPPLE_DB * 1e6:g} µdB)", fontsize=9)
    bottom.grid(True, alpha=0.3)
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", facecolor="white", metadata={"Software": None})
    return buf.getvalue()


def plot_rate_filter(rf, path):
    """Write :func:`render_rate_filter`'s PNG to ``path`` atomically.

    Raises
    ------
    OutputError
        If the file cannot be written.
    """
    png = render_rate_filter(rf)
    try:
        with AtomicOutputs() as outs:
            tmp = outs.path_for(path)
            with open(tmp, "wb") as fh:
                fh.write(png)
    except OSError as exc:
        raise wrap_write_error(exc, path) from None
