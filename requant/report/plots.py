"""The report's pictures, drawn with matplotlib from the analyzer's arrays.

Drawing only: every figure comes from the typed report
(:class:`~requant.report.model.Report`) and from the arrays an
:class:`~requant.dsp.analysis.ErrorAnalyzer` keeps after ``finish()``.
Pictures are drawn with a bare :class:`matplotlib.figure.Figure` on the Agg
canvas (no pyplot, no change of the global backend); matplotlib is imported
only inside the functions that draw.

Conventions
-----------
Levels per bin: the noise power in one bin of width ``fs/L`` (``L`` the
Welch segment length), ``10·log10(2·PSD·fs/L)`` dBFS, where ``PSD`` is the
one-sided density in full scale²/Hz. The factor 2 makes a full-scale sine
read 0 dBFS (AES17). The spectrum pictures average this power over
1/:data:`PLOT_BANDS_PER_OCTAVE`-octave bands where bins are denser than
that; a band mean of per-bin powers is still a per-bin level.
"""

import io
import math

import numpy as np

from requant.report.tables import fmt_int, fmt_zero_db

__all__ = ["render_pictures", "PICTURE_KINDS", "PLOT_BANDS_PER_OCTAVE", "TIME_VIEW_S"]

#: Pictures in report order: kind -> file-name suffix of the Markdown PNG.
PICTURE_KINDS = {
    "error_spectrum": "_error_spectrum.png",
    "noise_transfer": "_noise_transfer.png",
    "error_histogram": "_error_histogram.png",
    "quiet_passage": "_quiet_passage.png",
}
#: Bands per octave of the averaging in the spectrum pictures.
PLOT_BANDS_PER_OCTAVE = 48
#: Length of the time view around the quietest passage, seconds.
TIME_VIEW_S = 0.006

_DPI = 96
_COLORS = ("#1f5fa8", "#c0392b", "#2e7d32", "#7b3fa0", "#d9822b", "#00838f", "#6d4c41",
           "#ad1457")
_PRED = "#1a1a1a"
_FREQ_TICKS = (10, 20, 50, 100, 200, 500, 1000, 2000, 5000, 10000, 20000, 50000, 100000,
               200000)


def render_pictures(report, analyzer):
    """Draw the report's pictures as PNG bytes, in report order.

    Parameters
    ----------
    report : requant.report.model.Report
    analyzer : requant.dsp.analysis.ErrorAnalyzer or None

    Returns
    -------
    list of dict
        Each with ``kind`` (a key of :data:`PICTURE_KINDS`), ``title``,
        ``caption``, ``alt`` and ``png`` (bytes). Empty without an analyzer.
        With one there are always the error spectrum and the histogram (with
        the prediction alone when the file is too short to measure), plus the
        noise transfer when shaped and the time view when a quiet passage
        was found.
    """
    if analyzer is None or getattr(analyzer, "freqs", None) is None:
        return []
    out = [_plot_error_spectrum(report, analyzer)]
    if np.asarray(analyzer.coeffs).size:
        out.append(_plot_noise_transfer(report, analyzer))
    out.append(_plot_histogram(report, analyzer))
    if getattr(analyzer, "quiet_samples", None) is not None:
        out.append(_plot_quiet_passage(report, analyzer))
    return out


def _figure(width, height, rows=1, *, sharex=True, height_ratios=None):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=_DPI)
    FigureCanvasAgg(fig)
    kw = {"height_ratios": height_ratios} if height_ratios else None
    axs = fig.subplots(rows, 1, sharex=sharex, squeeze=False, gridspec_kw=kw)[:, 0]
    return fig, list(axs)


def _png(fig):
    buf = io.BytesIO()
    # zlib level 1: a third faster than the default 6 for about 8 % more bytes
    fig.savefig(buf, format="png", dpi=_DPI, facecolor="white",
                metadata={"Software": None}, pil_kwargs={"compress_level": 1})
    return buf.getvalue()


def _hz_label(v, _pos=None):
    if v >= 1000:
        k = v / 1000.0
        return f"{k:g}k"
    return f"{v:g}"


def _freq_axis(ax, lo, hi):
    from matplotlib.ticker import FixedLocator, FuncFormatter, NullLocator

    ax.set_xscale("log")
    ax.xaxis.set_major_locator(FixedLocator([t for t in _FREQ_TICKS if lo <= t <= hi]))
    ax.xaxis.set_major_formatter(FuncFormatter(_hz_label))
    ax.xaxis.set_minor_locator(NullLocator())
    ax.set_xlim(lo, hi)


def _style(ax, *, ylabel=None, xlabel=None):
    from matplotlib.ticker import MaxNLocator

    ax.yaxis.set_major_locator(MaxNLocator(7))
    ax.grid(True, color="#d0d0d0", lw=0.6)
    ax.tick_params(labelsize=8)
    if ylabel:
        ax.set_ylabel(ylabel, fontsize=9)
    if xlabel:
        ax.set_xlabel(xlabel, fontsize=9)


def _legend(ax, loc="best"):
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc=loc, fontsize=7.5, framealpha=0.85)


def _note(ax, text):
    ax.text(0.5, 0.5, text, transform=ax.transAxes, ha="center", va="center", fontsize=9,
            color="#555555", wrap=True)


def _log_bands(freqs, power, per_octave=PLOT_BANDS_PER_OCTAVE):
    """Average ``power`` (last axis = FFT bins) in log-spaced bands.

    Bins 1..L/2-1 only: 0 Hz has no place on a log axis, and the Nyquist
    bin of a one-sided PSD holds half a bin's power. Returns band centre
    frequencies (mean of the bins' frequencies) and the band-mean power.
    """
    f = np.asarray(freqs[1:-1], dtype=np.float64)
    p = np.asarray(power, dtype=np.float64)[..., 1:-1]
    band = np.floor(np.log2(f / f[0]) * per_octave + 1e-9).astype(np.int64)
    starts = np.flatnonzero(np.r_[True, band[1:] != band[:-1]])
    counts = np.diff(np.r_[starts, f.size])
    fc = np.add.reduceat(f, starts) / counts
    pm = np.add.reduceat(p, starts, axis=-1) / counts
    return fc, pm


def _per_bin_db(psd, df):
    p = np.asarray(psd, dtype=np.float64) * (2.0 * df)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(p > 0.0, 10.0 * np.log10(np.where(p > 0.0, p, 1.0)), np.nan)


def _ylim(ax, arrays, *, span=90.0, pad=5.0, min_range=20.0):
    vals = [np.asarray(a, dtype=np.float64).ravel() for a in arrays]
    vals = [v[np.isfinite(v)] for v in vals if v.size]
    vals = np.concatenate(vals) if vals else np.zeros(0)
    if vals.size == 0:
        return
    hi = float(vals.max()) + pad
    lo = max(float(vals.min()) - pad, hi - span)
    if hi - lo < min_range:
        mid = 0.5 * (hi + lo)
        lo, hi = mid - min_range / 2, mid + min_range / 2
    ax.set_ylim(lo, hi)


def _channel_label(c, nch):
    return "measured" if nch == 1 else f"measured, channel {c + 1}"


def _fmt_total(v, power):
    if v is None:
        return fmt_zero_db(power)
    return f"{v:.2f}"


def _plot_error_spectrum(report, an):
    from requant.dsp.weighting import weighting_power

    rate = float(an.rate)
    df = rate / an.L
    freqs = np.asarray(an.freqs, dtype=np.float64)
    fig, (ax1, ax2) = _figure(8.0, 6.4, 2)
    weights = ((weighting_power("a", freqs), "#1f5fa8", "A", "a_weighted_noise_dbfs"),
               (weighting_power("itu468", freqs), "#c0392b", "468", "itu468_noise_dbfs"))
    pred = None if report.output.passthrough else an.predicted_psd(freqs)
    shown1, shown2 = [], []
    psd = an.psd_error
    if psd is not None and not np.any(psd[:, 1:-1] > 0):
        for ax in (ax1, ax2):
            _note(ax, "no error: the output equals the input")
    elif psd is not None:
        for c in range(psd.shape[0]):
            shown1.append(_band_line(ax1, freqs, psd[c], df, color=_COLORS[c % len(_COLORS)],
                                     lw=1.0, label=_channel_label(c, psd.shape[0])))
        shown2 += _weighted_lines(ax2, freqs, psd.mean(axis=0), df, weights, report.measured,
                                  "measured", lw=1.0)
    else:
        _note(ax1, f"too short to measure: the spectrum needs at least {an.L} frames")
    if pred is not None:
        shown1.append(_band_line(ax1, freqs, pred, df, color=_PRED, lw=1.4, ls="--",
                                 label="predicted"))
        shown2 += _weighted_lines(ax2, freqs, pred, df, weights, report.predicted, "predicted",
                                  lw=1.4, ls="--")
    for ax, shown in ((ax1, shown1), (ax2, shown2)):
        _freq_axis(ax, freqs[1], rate / 2.0)
        _ylim(ax, shown)
        _style(ax, ylabel="dBFS per bin")
        if not shown:
            ax.set_yticks([])
        _legend(ax, loc="upper left")
    ax1.set_title("Unweighted", fontsize=9.5, loc="left")
    ax2.set_title("Weighted: A (IEC 61672-1) and ITU-R BS.468-4 (RMS detector), "
                  "mean of the channels", fontsize=9.5, loc="left")
    ax2.set_xlabel("frequency, Hz", fontsize=9)
    fig.subplots_adjust(left=0.09, right=0.98, top=0.95, bottom=0.08, hspace=0.22)
    return {
        "kind": "error_spectrum",
        "title": "Error spectrum, measured against the prediction",
        "alt": "Error spectrum per channel in dBFS per bin against frequency, with the "
               "predicted level, unweighted and weighted.",
        "caption": (f"Noise power per bin of width {df:.2f} Hz, 10·log10(2·PSD·fs/L) dBFS, "
                    f"averaged in 1/{PLOT_BANDS_PER_OCTAVE}-octave bands above the bin "
                    "spacing. Solid: measured from the error signal (Welch); dashed: the "
                    "dither model's spectrum through the noise-shaping filter. In the weighted "
                    "panel the area under each curve is the weighted total; the legend quotes "
                    "the measured one over every sample (see the method table)."),
        "png": _png(fig),
    }


def _band_line(ax, freqs, power, df, **style):
    """Plot ``power`` (per FFT bin) as per-bin dBFS averaged in bands; return the levels."""
    fc, pm = _log_bands(freqs, power)
    y = _per_bin_db(pm, df)
    ax.plot(fc, y, **style)
    return y


def _weighted_lines(ax, freqs, power, df, weights, figures, what, **style):
    """The A- and 468-weighted curves of ``power``, labelled with the totals in ``figures``
    (the report's measured or predicted figures); returns their levels."""
    shown = []
    for w, color, name, key in weights:
        total = _fmt_total(getattr(figures, key), figures.error_power_lsb2)
        shown.append(_band_line(ax, freqs, power * w, df, color=color,
                                label=f"{name}-weighted, {what} (total {total} dBFS)", **style))
    return shown


def _plot_noise_transfer(report, an):
    from requant.dsp.quantizer import error_spectrum_lsb2
    from requant.dsp.shaping import noise_gain_db, ntf_response
    from requant.dsp.weighting import weighting_db

    rate = float(an.rate)
    h = np.asarray(an.coeffs, dtype=np.float64)
    lo, hi = max(10.0, rate / an.L), rate / 2.0
    f = np.geomspace(lo, hi, 600)
    ntf_db = 10.0 * np.log10(np.maximum(np.abs(ntf_response(h, f, rate)) ** 2, 1e-30))
    fig, (ax,) = _figure(8.0, 4.2)
    shown = [ntf_db]
    if an.psd_error is not None:
        # the dither's own spectrum, unshaped (flat but for high-passed TPDF)
        unshaped = 2.0 * error_spectrum_lsb2(an.dither, an.freqs, rate) / an.scale ** 2 / rate
        fc, pm = _log_bands(an.freqs, an.psd_error.mean(axis=0) / unshaped)
        y = _per_bin_db(pm, 0.5)  # 10·log10(ratio)
        sel = fc >= lo
        ax.plot(fc[sel], y[sel], color="#9aa7b4", lw=1.0,
                label="measured: error spectrum ÷ unshaped dither spectrum")
        shown.append(y[sel])
    ax.plot(f, ntf_db, color=_PRED, lw=1.8, label="|NTF|², the designed shaping")
    ax.plot(f, weighting_db("a", f), color="#1f5fa8", lw=1.0, ls="--",
            label="A-weighting (IEC 61672-1)")
    ax.plot(f, weighting_db("itu468", f), color="#c0392b", lw=1.0, ls="--",
            label="ITU-R BS.468-4 weighting")
    ax.axhline(0.0, color="#888888", lw=0.8)
    _freq_axis(ax, lo, hi)
    top = max(10.0, float(np.nanmax(np.concatenate([np.ravel(v) for v in shown]))) + 5.0)
    ax.set_ylim(max(-60.0, float(np.nanmin(ntf_db)) - 10.0), top)
    _style(ax, ylabel="dB", xlabel="frequency, Hz")
    _legend(ax, loc="upper left")
    ax.set_title(f"order {h.size}, total noise power gain {noise_gain_db(h):+.2f} dB",
                 fontsize=9.5, loc="left")
    fig.subplots_adjust(left=0.09, right=0.98, top=0.92, bottom=0.12)
    return {
        "kind": "noise_transfer",
        "title": "Noise-shaping filter",
        "alt": "The noise transfer function's power in dB against frequency, with the "
               "A and ITU-R 468 weighting curves and the measured ratio.",
        "caption": ("|NTF(f)|² of the error-feedback filter (0 dB = plain dither), with the "
                    "weighting curves it is judged by (0 dB at 1 kHz). The grey line is the "
                    "measured error spectrum divided by the unshaped dither's own spectrum: it "
                    "should follow the black one."),
        "png": _png(fig),
    }


def _plot_histogram(report, an):
    from requant.dsp.quantizer import error_pdf, predicted_error_power_lsb2

    hist = (report.analysis.histogram if report.analysis is not None else None) or {}
    edges = np.asarray(hist.get("edges_lsb") or an.hist_edges, dtype=np.float64)
    counts = np.asarray(hist.get("counts") or np.zeros(edges.size - 1), dtype=np.float64)
    outside = int(hist.get("outside") or 0)
    total = counts.sum() + outside
    passthrough = bool(report.output.passthrough)
    fig, (ax,) = _figure(8.0, 3.8)
    n = np.concatenate(([1.0], -np.asarray(an.coeffs, dtype=np.float64)))
    sigma = math.sqrt(predicted_error_power_lsb2("round", an.dither, an.coeffs))  # no bias
    half = max(4.0 * sigma, 1.5)
    if total > 0:
        width = np.diff(edges)
        dens = counts / (total * width)
        ax.stairs(dens, edges, fill=True, color="#9ec1e6", alpha=0.9,
                  label=f"measured ({fmt_int(total)} samples"
                        + (f", {fmt_int(outside)} outside the range)" if outside else ")"))
        nz = np.flatnonzero(counts)
        if nz.size:
            half = max(half, abs(edges[nz[0]]), abs(edges[nz[-1] + 1]))
    else:
        _note(ax, "too short to measure: no complete analysis segment")
    half = min(half * 1.05, max(abs(edges[0]), abs(edges[-1])))
    if not passthrough:
        x = np.linspace(-half, half, 801)
        pdf = error_pdf(x, quantizer=an.quantizer, dither=an.dither, coeffs=an.coeffs)
        how = ("Gaussian with the predicted mean and variance" if n.size > 1
               else "Lipshitz, Wannamaker & Vanderkooy (1992)")
        ax.plot(x, pdf, color=_PRED, lw=1.4, label=f"theory: {how}")
    ax.set_xlim(-half, half)
    ax.set_ylim(bottom=0.0)
    _style(ax, ylabel="probability density, 1/LSB", xlabel="error (output − input), LSB")
    _legend(ax, loc="upper right")
    fig.subplots_adjust(left=0.09, right=0.98, top=0.95, bottom=0.14)
    return {
        "kind": "error_histogram",
        "title": "Error histogram",
        "alt": "Histogram of the error in LSB with the theoretical probability density.",
        "caption": ("The error of every analysed sample, in LSB of the output word length, "
                    "against the theoretical density for the quantizer, dither and shaping "
                    "used (for a busy signal). Without dither a quiet or simple signal "
                    "piles the error onto a few values."),
        "png": _png(fig),
    }


def _time_view(x, rate):
    """(channel, first frame, frames) of the close-up: the channel with most energy in the
    passage ``x`` (frames, channels), and its stretch of :data:`TIME_VIEW_S` with most signal."""
    ch = int(np.argmax(np.sum(x * x, axis=0)))
    n = int(min(x.shape[0], max(32, round(TIME_VIEW_S * rate))))
    c2 = np.concatenate(([0.0], np.cumsum(x[:, ch] ** 2)))
    hop = max(1, n // 4)
    starts = np.arange(0, x.shape[0] - n + 1, hop)
    s0 = int(starts[np.argmax(c2[starts + n] - c2[starts])])
    return ch, s0, n


def _plot_quiet_passage(report, an):
    x, e = an.quiet_samples
    x = np.asarray(x, dtype=np.float64)
    e = np.asarray(e, dtype=np.float64)
    rate = float(an.rate)
    scale = float(an.scale)
    q = (report.analysis.quietest_passage if report.analysis is not None else None) or {}
    start_s = float(q.get("start_s") or 0.0)
    ch, s0, n = _time_view(x, rate)
    seg = slice(s0, s0 + n)
    t = np.arange(n) * (1000.0 / rate)
    xi = x[seg, ch] * scale
    yo = (x[seg, ch] + e[seg, ch]) * scale
    ee = e[seg, ch] * scale
    fig, (ax1, ax2) = _figure(8.0, 4.8, 2, height_ratios=(3, 2))
    h_out, = ax1.plot(t, yo, color="#e08a7e", lw=1.0, drawstyle="steps-mid",
                      label="output codes")
    h_in, = ax1.plot(t, xi, color="#1f5fa8", lw=1.6, drawstyle="steps-mid", label="input")
    ax2.plot(t, ee, color="#2e7d32", lw=1.0, drawstyle="steps-mid",
             label="error = output − input")
    ax2.axhline(0.0, color="#888888", lw=0.8)
    for ax in (ax1, ax2):
        _style(ax, ylabel="LSB")
        ax.set_xlim(t[0], t[-1])
    ax1.legend(handles=[h_in, h_out], loc="upper right", fontsize=7.5, framealpha=0.85)
    _legend(ax2, loc="upper right")
    from matplotlib.ticker import MaxNLocator

    for ax, v in ((ax1, np.r_[xi, yo]), (ax2, ee)):
        if v.size and np.ptp(v) < 12:
            ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax2.set_xlabel(f"time, ms after {start_s + s0 / rate:.4f} s", fontsize=9)
    lvl = q.get("signal_rms_dbfs")
    level = "digital silence" if lvl is None else f"{lvl:.1f} dBFS RMS"
    ax1.set_title(f"channel {ch + 1}; passage at {start_s:.3f} s, {level}", fontsize=9.5,
                  loc="left")
    fig.subplots_adjust(left=0.09, right=0.98, top=0.93, bottom=0.11, hspace=0.12)
    return {
        "kind": "quiet_passage",
        "title": "Close-up of the quietest passage",
        "alt": "Input, output and error in LSB over a few milliseconds of the quietest "
               "passage.",
        "caption": (f"{1000.0 * n / rate:.1f} ms of the quietest passage, where channel "
                    f"{ch + 1} carries most signal, in LSB of the {an.bits}-bit output. "
                    "With dither the error looks like noise; without it, it repeats the "
                    "shape of the signal."),
        "png": _png(fig),
    }
