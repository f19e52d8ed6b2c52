"""The rules for signals raised for listening: a stated gain, then a hard cap on the peaks.

Error signals and quiet passages are raised so they can be heard. Whatever the
gain, no written sample may exceed :data:`CAP_DBFS`. The listening kit
(:mod:`requant.listening`) and ``requant convert --error-gain`` follow the
same rules from here.

Levels are in dBFS per AES17 (a full-scale sine is 0 dBFS): a mean square
``p`` is ``10*log10(2*p)`` dBFS; peaks are ``20*log10(|x|)`` dBFS.
"""

import math

import numpy as np

__all__ = ["CAP_DBFS", "ERROR_TARGET_DBFS", "MAX_GAIN_DB", "cap_value", "hard_limit",
           "noise_dbfs", "raise_to_target_db"]

#: Hard limit on every raised signal, dBFS sample peak.
CAP_DBFS = -6.0

#: Level a reference noise of the target word length is raised to, dBFS RMS.
ERROR_TARGET_DBFS = -40.0

#: Most gain applied to any raised signal, dB.
MAX_GAIN_DB = 120.0


def cap_value(cap_dbfs=CAP_DBFS):
    """The largest float32 magnitude that does not exceed ``cap_dbfs``.

    Returns
    -------
    numpy.float32
        ``10**(cap_dbfs/20)`` rounded down to float32, so that the written
        32-bit float samples never read above the cap.
    """
    exact = 10.0 ** (cap_dbfs / 20.0)
    c = np.float32(exact)
    while float(c) > exact:
        c = np.nextafter(c, np.float32(0.0))
    return c


def hard_limit(x, *, cap_dbfs=CAP_DBFS):
    """Clip to the cap and return float32 samples whose peak is <= the cap.

    Returns
    -------
    y : ndarray, float32
    limited : int
        Samples that had to be clipped.
    """
    c = cap_value(cap_dbfs)
    x = np.asarray(x, dtype=np.float64)
    limited = int(np.count_nonzero(np.abs(x) > float(c)))
    y = np.clip(x, -float(c), float(c)).astype(np.float32)
    np.clip(y, -c, c, out=y)  # the cast could round a clipped value up
    return y, limited


def noise_dbfs(power_lsb2, bits):
    """Level of a noise of ``power_lsb2`` LSB² at ``bits``, dBFS RMS (AES17).

    Plain rounding noise (Δ²/12) at 16 bits is -98.09 dBFS, the familiar
    6.02·N + 1.76 dB below a full-scale sine; TPDF-dithered error (Δ²/4) is
    4.77 dB above that.
    """
    delta = 2.0 ** -(bits - 1)
    return 10.0 * math.log10(2.0 * power_lsb2 * delta * delta)


def raise_to_target_db(power_lsb2, bits, *, target_dbfs=ERROR_TARGET_DBFS,
                       max_gain_db=MAX_GAIN_DB):
    """Gain that puts a noise of ``power_lsb2`` LSB² at ``bits`` at ``target_dbfs``, dB.

    Returns
    -------
    float, dB
        ``min(target_dbfs - noise_dbfs(power_lsb2, bits), max_gain_db)``;
        negative at few bits, where the error is loud already.
    """
    return min(target_dbfs - noise_dbfs(power_lsb2, bits), max_gain_db)
