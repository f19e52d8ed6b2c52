"""Files that describe a shaping filter: its JSON export and the plot of |NTF|."""

import json
import os
import tempfile
from pathlib import Path

import numpy as np

from requant.audio_io.atomic import TEMP_SUFFIX, temp_stem
from requant.dsp.shaping import as_rate, as_taps, describe, noise_gain_db, ntf_response
from requant.dsp.weighting import weighting_db
from requant.errors import OutputError, UsageError

__all__ = ["plot_ntf", "export_json"]


def plot_ntf(h, sample_rate, path, *, title=None):
    """Write a PNG of ``|NTF|`` in dB beside the weighting curves.

    Parameters
    ----------
    h : array_like of float
        Feedback coefficients.
    sample_rate : float, Hz
        Sample rate.
    path : str or os.PathLike
        Output PNG file.
    title : str, optional
        Plot title; by default the order, rate and total gain.

    Raises
    ------
    OutputError
        If the file cannot be written.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    h = as_taps(h)
    rate = as_rate(sample_rate)
    f = np.geomspace(10.0, rate / 2.0, 2000)
    ntf_db = 10.0 * np.log10(np.maximum(np.abs(ntf_response(h, f, rate)) ** 2, 1e-30))
    # A bare Figure on the Agg canvas: no pyplot, no global backend change.
    fig = Figure(figsize=(8, 4.5), dpi=100)
    FigureCanvasAgg(fig)
    ax = fig.subplots()
    ax.semilogx(f, ntf_db, color="k", lw=2, label="|NTF|² (noise shaping)")
    for name, label in (
        ("threshold", "hearing-threshold weight (Terhardt 1979)"),
        ("a", "A-weighting (IEC 61672-1)"),
        ("itu468", "ITU-R BS.468-4 weighting"),
    ):
        ax.semilogx(f, weighting_db(name, f), lw=1, ls="--", label=label)
    ax.axhline(0.0, color="0.6", lw=0.8)
    ax.set_xlim(10.0, rate / 2.0)
    ax.set_ylim(-60.0, 40.0)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("dB")
    ax.set_title(
        title or f"order {h.size} at {rate:g} Hz, total noise gain {noise_gain_db(h):+.2f} dB"
    )
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(loc="upper left", fontsize=8)
    fig.tight_layout()
    _atomic_write(Path(path), lambda fh: fig.savefig(fh, format="png"), binary=True)


def _atomic_write(path, write, *, binary=False):
    """Write via a temporary file in the same folder, then rename."""
    folder = path.parent if str(path.parent) else Path(".")
    tmp = None
    try:
        stem = temp_stem(folder, path.name)
        fd, tmp = tempfile.mkstemp(prefix=f".{stem}.", suffix=TEMP_SUFFIX, dir=folder)
        with os.fdopen(fd, "wb" if binary else "w",
                       **({} if binary else {"encoding": "utf-8"})) as fh:
            write(fh)
        os.replace(tmp, path)
        tmp = None
    except OSError as exc:
        raise OutputError(
            f"cannot write {str(path)!r} ({exc.strerror or exc}); check the folder exists "
            "and is writable"
        ) from None
    finally:
        if tmp is not None and os.path.exists(tmp):
            os.unlink(tmp)


def export_json(h, sample_rate, path, *, name=None, design=None):
    """Write a shaping filter and its figures to a JSON file.

    Parameters
    ----------
    h : array_like of float
        Feedback coefficients (1 to 64).
    sample_rate : float, Hz
        Sample rate the filter is meant for (recorded, and checked by
        :func:`load_coefficients`).
    path : str or os.PathLike
        Output file.
    name : str, optional
        A label recorded in the file.
    design : dict, optional
        Design parameters to record (e.g. ``{"order": 9, "max_gain_db": 13}``).

    Raises
    ------
    OutputError
        If the file cannot be written.

    Notes
    -----
    The file holds ``"coefficients"`` (h, for error feedback
    ``u = x - Σ h_k e[n-k]``), ``"ntf"`` (n = [1, -h]) and the figures of
    :func:`describe`; :func:`load_coefficients` reads it back.
    """
    h = as_taps(h)
    if h.size == 0:
        raise UsageError("there are no coefficients to export (shaping 'none')")
    info = describe(h, sample_rate)
    doc = {"requant_shaping": 1, "name": name, "design": design, **info}
    text = json.dumps(doc, indent=2) + "\n"
    _atomic_write(Path(path), lambda fh: fh.write(text))
