"""Figures from running sums: SNR, error power in LSB², levels in dBFS.

dBFS follows AES17: a full-scale sine reads 0 dBFS, so a mean square ``p``
(full scale 1.0) is ``10*log10(2*p)`` dBFS and a full-scale square wave
reads +3.01 dBFS.
"""

import math

__all__ = ["power_to_dbfs", "ratio_db", "measured_figures", "predicted_figures"]


def power_to_dbfs(mean_square):
    """Mean square (full scale 1.0) in dBFS per AES17; None for zero."""
    if mean_square <= 0.0:
        return None
    return 10.0 * math.log10(2.0 * mean_square)


def ratio_db(num, den):
    """10*log10(num/den); None when either is zero (no finite answer)."""
    if num <= 0.0 or den <= 0.0:
        return None
    return 10.0 * math.log10(num / den)


def measured_figures(*, sum_x2, sum_e, sum_e2, frames, scale, clipped, max_abs_e):
    """Measured figures for one channel or for all together.

    Parameters
    ----------
    sum_x2 : float
        Sum of squared input samples (full scale 1.0).
    sum_e, sum_e2 : float
        Sum and sum of squares of the error (output minus input), in LSB.
    frames : int
        Number of samples summed.
    scale : float
        2**(bits-1): LSBs per unit of full scale.
    clipped : int
        Samples whose code was held at the end of the range.
    max_abs_e : float, LSB
        Largest error magnitude.

    Returns
    -------
    dict
        ``snr_db`` = 10*log10(sum x² / sum ε²), ``error_power_lsb2``,
        ``error_mean_lsb``, ``error_rms_dbfs``, ``signal_rms_dbfs``,
        ``error_peak_dbfs``, ``clipped_samples``. Figures with no finite value
        (silence, or no error at all) are None.
    """
    if frames == 0:
        return {"snr_db": None, "error_power_lsb2": None, "error_mean_lsb": None,
                "error_rms_dbfs": None, "signal_rms_dbfs": None, "error_peak_dbfs": None,
                "clipped_samples": int(clipped)}
    e_fs2 = sum_e2 / (scale * scale)
    peak = max_abs_e / scale
    return {
        "snr_db": ratio_db(sum_x2, e_fs2),
        "error_power_lsb2": sum_e2 / frames,
        "error_mean_lsb": sum_e / frames,
        "error_rms_dbfs": power_to_dbfs(e_fs2 / frames),
        "signal_rms_dbfs": power_to_dbfs(sum_x2 / frames),
        "error_peak_dbfs": None if peak <= 0.0 else 20.0 * math.log10(peak),
        "clipped_samples": int(clipped),
    }


def predicted_figures(*, power_lsb2, sum_x2, frames, scale):
    """Predicted figures from the model's error power per sample (LSB²)."""
    if frames == 0:
        return {"snr_db": None, "error_power_lsb2": power_lsb2, "error_rms_dbfs": None}
    p_fs = power_lsb2 / (scale * scale)
    return {
        "snr_db": ratio_db(sum_x2 / frames, p_fs),
        "error_power_lsb2": power_lsb2,
        "error_rms_dbfs": power_to_dbfs(p_fs),
    }
