"""Programme loudness per ITU-R BS.1770-4: K-weighting, gated blocks, integrated loudness.

:func:`integrated_loudness` measures an array in memory. The work is done
block-wise, so that a streaming meter can reuse the pieces: the signal is
K-weighted (:func:`k_weighting_sos`, one filter state carried from block to
block by ``scipy.signal.sosfilt``), its squares are summed per 100 ms step
(:func:`step_sums`), four consecutive steps make one 400 ms gating block
(75 % overlap, :func:`block_mean_squares`), and :func:`gated_loudness` applies
the two gates to the blocks' mean squares.

The standard tables the two K-weighting sections at 48 kHz only. Here each
section is turned back into its analog prototype (a second-order section in
``p = s/ω0``, by the bilinear transform pre-warped at the section's own
natural frequency ``f0``, which is read off its poles) and designed again
at the file's rate the same way. At 48 kHz that gives the tabled
coefficients back; at other rates the response keeps its shape around each
section's ``f0``.

Loudness is in LUFS (= LKFS): ``L = -0.691 + 10*log10(sum_i G_i * z_i)``,
where ``z_i`` is the mean square of channel ``i`` after K-weighting and
``G_i`` its weight (1.0 for left, right and centre, 1.41 for surrounds).
"""

import math

import numpy as np

__all__ = ["BLOCK_SECONDS", "STEP_SECONDS", "ABSOLUTE_GATE_LUFS", "RELATIVE_GATE_LU",
           "K_WEIGHTING_48K", "k_weighting_sos", "step_sums", "block_mean_squares",
           "gated_loudness", "integrated_loudness"]

#: Gating block length, s (BS.1770-4 §2.4).
BLOCK_SECONDS = 0.4
#: Step between gating blocks, s: 75 % overlap.
STEP_SECONDS = 0.1
#: Absolute gate, LUFS.
ABSOLUTE_GATE_LUFS = -70.0
#: Relative gate, LU below the loudness of the blocks above the absolute gate.
RELATIVE_GATE_LU = 10.0

#: The two K-weighting sections at 48 kHz, ``(b, a)`` each: the high shelf ("pre-filter",
#: BS.1770-4 Table 1) and the high-pass ("RLB", Table 2). Values from memory (REFERENCES.md
#: §7 records the standard's tables as unverified); tests check them against pyloudnorm.
K_WEIGHTING_48K = (
    ((1.53512485958697, -2.69169618940638, 1.19839281085285),
     (1.0, -1.69065929318241, 0.73248077421585)),
    ((1.0, -2.0, 1.0),
     (1.0, -1.99004745483398, 0.99007225036621)),
)
_TABLE_RATE = 48000.0

_OFFSET_DB = -0.691


def _prototype(b, a, rate):
    """The analog prototype of one digital section: ``(f0 Hz, numerator, denominator)``.

    The section is read as the bilinear transform of ``H(p)``, ``p = s/ω0``,
    pre-warped at ``f0`` (``p = (1/K)(1 - z^-1)/(1 + z^-1)``, ``K = tan(π f0/fs)``), where
    ``f0`` is the natural frequency of its poles. Polynomials in ``p``, highest power first.
    """
    a0, a1, a2 = (float(v) / a[0] for v in a)
    b0, b1, b2 = (float(v) / a[0] for v in b)
    k = math.sqrt((1.0 + a1 + a2) / (1.0 - a1 + a2))
    f0 = rate * math.atan(k) / math.pi

    def back(c0, c1, c2):
        return ((c0 - c1 + c2) * k * k, 2.0 * k * (c0 - c2), c0 + c1 + c2)

    return f0, back(b0, b1, b2), back(a0, a1, a2)


def _discretize(f0, num, den, rate):
    """Bilinear transform of ``H(p)`` pre-warped at ``f0`` for ``rate``: one sos row."""
    k = math.tan(math.pi * f0 / rate)

    def fwd(c2, c1, c0):
        return (c2 + c1 * k + c0 * k * k, 2.0 * (c0 * k * k - c2), c2 - c1 * k + c0 * k * k)

    b, a = fwd(*num), fwd(*den)
    return [b[0] / a[0], b[1] / a[0], b[2] / a[0], 1.0, a[1] / a[0], a[2] / a[0]]


def k_weighting_sos(rate):
    """The K-weighting filter for a sample rate, as second-order sections.

    Parameters
    ----------
    rate : float, Hz
        Above twice the shelf's natural frequency (about 3.4 kHz).

    Returns
    -------
    ndarray, float64, (2, 6)
        The shelf, then the high-pass, in ``scipy.signal.sosfilt`` form.

    Raises
    ------
    ValueError
        For a rate too low to hold the shelf.
    """
    rate = float(rate)
    rows = []
    for b, a in K_WEIGHTING_48K:
        f0, num, den = _prototype(b, a, _TABLE_RATE)
        if not math.isfinite(rate) or f0 >= rate / 2.0:
            raise ValueError(f"rate={rate!r} Hz is too low for K-weighting (the shelf sits at "
                             f"{f0:.0f} Hz)")
        rows.append(_discretize(f0, num, den, rate))
    return np.array(rows, dtype=np.float64)


def _steps(rate):
    """(frames per 100 ms step, frames per 400 ms block = 4 steps)."""
    step = max(1, int(round(STEP_SECONDS * rate)))
    return step, step * int(round(BLOCK_SECONDS / STEP_SECONDS))


def step_sums(y, step):
    """Sums of squares over whole steps of ``step`` frames, per channel.

    Parameters
    ----------
    y : ndarray, (frames, channels)
        K-weighted signal.
    step : int, frames

    Returns
    -------
    ndarray, float64, (frames // step, channels)
        A frame left over after the last whole step is not counted.
    """
    y = np.asarray(y, dtype=np.float64)
    n = y.shape[0] // step
    parts = y[: n * step].reshape(n, step, y.shape[1])
    return np.einsum("ijk,ijk->ik", parts, parts)


def block_mean_squares(sums, step):
    """Mean squares of the 400 ms gating blocks from consecutive step sums.

    Parameters
    ----------
    sums : ndarray, (steps, channels)
        :func:`step_sums`.
    step : int, frames

    Returns
    -------
    ndarray, (blocks, channels)
        Block ``j`` spans steps ``j .. j+3``; none when fewer than four steps.
    """
    per = int(round(BLOCK_SECONDS / STEP_SECONDS))
    sums = np.asarray(sums, dtype=np.float64)
    if sums.shape[0] < per:
        return np.zeros((0, sums.shape[1]))
    c = np.concatenate([np.zeros((1, sums.shape[1])), np.cumsum(sums, axis=0)])
    return (c[per:] - c[:-per]) / (per * step)


def gated_loudness(block_ms, weights=None):
    """Integrated loudness of gated blocks (BS.1770-4 §2.6), LUFS.

    Parameters
    ----------
    block_ms : ndarray, (blocks, channels)
        Mean squares of the K-weighted blocks.
    weights : sequence of float, optional
        Channel weights ``G_i``; default 1.0 each.

    Returns
    -------
    float or None
        None when no block passes the absolute gate (silence, or a signal
        shorter than one block): the loudness is undefined.
    """
    block_ms = np.asarray(block_ms, dtype=np.float64)
    g = np.ones(block_ms.shape[1]) if weights is None else np.asarray(weights, dtype=np.float64)
    if g.shape != (block_ms.shape[1],):
        raise ValueError(f"{g.size} channel weights for {block_ms.shape[1]} channels")
    power = block_ms @ g
    with np.errstate(divide="ignore"):
        lj = _OFFSET_DB + 10.0 * np.log10(power)
    above = lj > ABSOLUTE_GATE_LUFS
    if not above.any():
        return None
    relative = _OFFSET_DB + 10.0 * math.log10(float(np.mean(power[above]))) - RELATIVE_GATE_LU
    keep = above & (lj > relative)
    return _OFFSET_DB + 10.0 * math.log10(float(np.mean(power[keep])))


def integrated_loudness(x, rate, *, weights=None):
    """ITU-R BS.1770-4 integrated loudness of a signal in memory.

    Parameters
    ----------
    x : ndarray, (frames,) or (frames, channels), full scale 1.0
    rate : float, Hz
    weights : sequence of float, optional
        Channel weights (1.0 for L, R, C; 1.41 for the surrounds; leave out
        an LFE channel by giving it 0). Default: 1.0 for every channel.

    Returns
    -------
    float or None, LUFS
        None when the loudness is undefined: no 400 ms block above the
        absolute gate (-70 LUFS), or fewer than 400 ms of signal.

    Examples
    --------
    >>> t = np.arange(48000 * 2) / 48000
    >>> s = 10 ** (-23 / 20) * np.sin(2 * np.pi * 1000 * t)
    >>> round(integrated_loudness(np.stack([s, s], axis=1), 48000), 1)
    -23.0
    """
    from scipy.signal import sosfilt

    x = np.asarray(x, dtype=np.float64)
    if x.ndim == 1:
        x = x[:, None]
    step, _ = _steps(rate)
    y = sosfilt(k_weighting_sos(rate), x, axis=0)
    return gated_loudness(block_mean_squares(step_sums(y, step), step), weights)
