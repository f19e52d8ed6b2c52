"""How audible requantization noise is, and which method suits a file.

The figures behind the "which method for this file" paragraph of ``requant
inspect`` and of the convert report, and behind the hearing-threshold column
of the console summary, and that paragraph's wording (:func:`advice_paragraph`,
:func:`threshold_comparison`), so that both commands say the same thing.

Figures
-------
Levels are AES17 dBFS (a full-scale sine reads 0 dBFS), so an error of mean
square ``P`` (full scale²) reads ``10·log10(2P)``.

* **Flat TPDF noise** at ``bits``: ``P = Δ²/4`` with ``Δ = 2^-(bits-1)``
  (Lipshitz, Wannamaker & Vanderkooy 1992): −93.32 dBFS at 16 bits
  (REFERENCES.md §1).
* **Threshold-weighted noise**: the error's power spectrum weighted by
  ``W²(f)``, the inverse of Terhardt's (1979) threshold in quiet, 1 at 1 kHz
  (:func:`requant.dsp.weighting.weighting_power`), integrated over 0..fs/2:
  the level of a 1 kHz tone that the model rates as audible as the noise.
  For white noise it is the unweighted level plus
  :func:`~requant.dsp.weighting.white_noise_weighting_offset_db`; shaped by an
  NTF, plus :func:`~requant.dsp.shaping.weighted_gain_db` on top. A-weighting
  is no threshold model: a hearing-threshold shaper lowers this figure while
  raising the unweighted and the A-weighted ones.
* **Above the threshold of hearing**, dB: the threshold-weighted level heard
  at :data:`REFERENCE_PLAYBACK_DB_SPL` (a full-scale sine at 105 dB SPL) minus
  Terhardt's threshold at 1 kHz (3.37 dB SPL). At or below 0 dB the noise is
  inaudible even in silence at that loud level. The figure sums the noise over
  every frequency as if all of it fell in one critical band, so it errs on
  the audible side: a noise it calls inaudible is.
* **Rise of the file's own noise**: when a file's quietest passage is noise
  (hiss, room tone, earlier dither) at ``Q`` dBFS, adding noise at ``N`` dBFS
  raises it by ``10·log10(1 + 10^((N−Q)/10))`` dB (powers add).

Decision (:func:`advise`)
-------------------------
1. ``lossless``: the file uses no more bits than the target: nothing to add.
2. ``own-noise``: the quietest passage is noise and flat TPDF raises it by at
   most :data:`MAX_FLOOR_RISE_DB`: plain TPDF; shaping buys nothing audible.
3. ``below-threshold``: flat TPDF's noise stays at or below the threshold of
   hearing at the reference playback level: plain TPDF.
4. ``audible``: otherwise, shaping designed for the file's rate (``hearing``)
   when the rate is in the design's range, with whether even the shaped noise
   stays above the threshold (then more bits help more than any shaper);
   ``no-design`` when the rate is outside that range.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = [
    "REFERENCE_PLAYBACK_DB_SPL",
    "NOISE_TONAL_MAX",
    "MAX_FLOOR_RISE_DB",
    "tpdf_noise_dbfs",
    "predicted_noise_dbfs",
    "threshold_at_1khz_db_spl",
    "above_threshold_db",
    "floor_rise_db",
    "Advice",
    "advise",
    "advice_paragraph",
    "threshold_comparison",
]

#: Playback level for the audibility figure: a full-scale sine at this many dB SPL. Common
#: practice (loud: cinema calibration puts pink noise at -20 dBFS RMS at 85 dB SPL, so a
#: full-scale sine near 105 dB SPL). Quieter playback only makes the noise less audible.
REFERENCE_PLAYBACK_DB_SPL = 105.0

#: A passage counts as noise (then its level is a noise floor) when less than this share of
#: its power stands in spectral lines, i.e. more than 6 dB above the running median of its
#: averaged spectrum (:func:`requant.dsp.analysis.tonal_fraction`, the measure the convert
#: report applies to its error). Our choice: white or shaped noise gives well under 1 %;
#: music, tones and hum put most of their power in lines.
NOISE_TONAL_MAX = 0.10

#: Largest rise of the file's own noise floor that counts as buried, dB: half the about
#: 1 dB smallest change of level most listeners notice (common practice). Flat TPDF stays
#: within it when the file's noise lies 9.1 dB or more above it.
MAX_FLOOR_RISE_DB = 0.5


def _check_bits(bits):
    if isinstance(bits, bool) or not isinstance(bits, int) or not 1 <= bits <= 32:
        raise ValueError(f"bits={bits!r} must be an int from 1 to 32")
    return bits


def tpdf_noise_dbfs(bits):
    """Unweighted level of flat TPDF requantization noise, AES17 dBFS.

    Parameters
    ----------
    bits : int, 1..32
        Target word length.

    Returns
    -------
    float, dBFS
        ``10·log10(2·Δ²/4)``, ``Δ = 2^-(bits-1)``: −93.32 at 16 bits.
    """
    lsb = 2.0 ** -(_check_bits(bits) - 1)
    return 10.0 * math.log10(2.0 * lsb * lsb / 4.0)


def _spectrum_mean(sample_rate, weighting, coeffs, dither):
    """``mean over 0..fs/2 of W²·S`` with ``S`` the error spectrum shape (1 for white)."""
    import numpy as np

    from requant.dsp.weighting import band_mean, frequency_grid, weighting_power

    f = frequency_grid(sample_rate)
    s = np.ones_like(f)
    if len(coeffs):
        from requant.dsp.shaping import ntf_response

        s = np.abs(ntf_response(coeffs, f, sample_rate)) ** 2
    if dither == "tpdf-hp":
        # quantizer Δ²/12 plus high-passed RPDF Δ²/12·2(1 − cos ω), over the white Δ²/4
        # (REFERENCES.md §9, from the dither's definition)
        s = s * (1.0 + 2.0 * (1.0 - np.cos(2.0 * np.pi * f / sample_rate))) / 3.0
    return float(band_mean(np.asarray(weighting_power(weighting, f)) * s, f))


def predicted_noise_dbfs(bits, sample_rate, *, weighting="threshold", dither="tpdf",
                         coeffs=()):
    """Predicted weighted level of the requantization error, AES17 dBFS.

    Parameters
    ----------
    bits : int, 1..32
    sample_rate : float, Hz
    weighting : {"threshold", "a", "itu468", "flat"}, default "threshold"
        :mod:`requant.dsp.weighting`; 1 at 1 kHz.
    dither : {"tpdf", "rpdf", "none", "tpdf-hp"}, default "tpdf"
        Its error power (:data:`requant.dsp.quantizer.DITHER_POWER_LSB2`);
        white, but for ``tpdf-hp`` (REFERENCES.md §9).
    coeffs : sequence of float
        Error-feedback coefficients (``NTF = 1 − Σ h_k z^-k``); empty for none.

    Returns
    -------
    float, dBFS
        ``10·log10(2·σ²·Δ²·mean(W²·S))``. A truncating quantizer's bias sits at
        0 Hz, where these weightings are (close to) 0, and is left out.
    """
    from requant.dsp.quantizer import DITHER_POWER_LSB2

    lsb = 2.0 ** -(_check_bits(bits) - 1)
    power = DITHER_POWER_LSB2[dither] * lsb * lsb
    return 10.0 * math.log10(2.0 * power * _spectrum_mean(float(sample_rate), weighting,
                                                          tuple(coeffs), dither))


def threshold_at_1khz_db_spl():
    """Terhardt's (1979) threshold in quiet at 1 kHz, dB SPL (3.37)."""
    from requant.dsp.weighting import terhardt_threshold_db

    return float(terhardt_threshold_db(1000.0))


def above_threshold_db(threshold_weighted_dbfs, *, playback_db_spl=REFERENCE_PLAYBACK_DB_SPL):
    """How far a threshold-weighted noise lies above the threshold of hearing, dB.

    Parameters
    ----------
    threshold_weighted_dbfs : float, dBFS
        From :func:`predicted_noise_dbfs` or a measurement (weighting 1 at 1 kHz).
    playback_db_spl : float, dB SPL
        Where a full-scale sine plays.

    Returns
    -------
    float, dB
        Positive: above the threshold in quiet (audible in silence at that level).
    """
    return threshold_weighted_dbfs + playback_db_spl - threshold_at_1khz_db_spl()


def floor_rise_db(floor_dbfs, added_dbfs):
    """How much noise at ``added_dbfs`` raises a noise floor at ``floor_dbfs``, dB."""
    return 10.0 * math.log10(1.0 + 10.0 ** ((added_dbfs - floor_dbfs) / 10.0))


@dataclass(frozen=True)
class Advice:
    """Which method suits a file at one word length, and the figures why.

    Attributes
    ----------
    bits : int
        Target word length.
    sample_rate : float, Hz
    choice : str
        ``"none-needed"`` (lossless), ``"tpdf"`` (plain TPDF) or ``"hearing"``
        (TPDF shaped by the hearing-threshold design).
    reason : str
        ``"lossless"``, ``"own-noise"``, ``"below-threshold"``, ``"audible"`` or
        ``"no-design"`` (see the module notes).
    bits_in_use : int or None
    quiet_dbfs : float or None, dBFS
        The quietest passage's level.
    quiet_is_noise : bool or None
        Whether that passage is noise (None: not known).
    tpdf_dbfs : float, dBFS
        Flat TPDF's unweighted level.
    tpdf_threshold_dbfs : float, dBFS
        Flat TPDF's threshold-weighted level.
    tpdf_above_threshold_db : float, dB
        ... heard at :attr:`playback_db_spl`, above the threshold in quiet.
    hearing_threshold_dbfs, hearing_above_threshold_db : float or None
        The same for TPDF shaped by the hearing design at this rate (None when
        the rate is outside the design's range).
    hearing_benefit_db : float or None, dB
        Flat minus shaped threshold-weighted level (positive: shaping is quieter).
    hearing_total_gain_db : float or None, dB
        The shaper's total (unweighted) noise power gain.
    floor_rise_tpdf_db, floor_rise_hearing_db : float or None, dB
        How much each raises the file's own noise (only when it is noise).
    playback_db_spl : float, dB SPL
    """

    bits: int
    sample_rate: float
    choice: str
    reason: str
    bits_in_use: int | None
    quiet_dbfs: float | None
    quiet_is_noise: bool | None
    tpdf_dbfs: float
    tpdf_threshold_dbfs: float
    tpdf_above_threshold_db: float
    hearing_threshold_dbfs: float | None
    hearing_above_threshold_db: float | None
    hearing_benefit_db: float | None
    hearing_total_gain_db: float | None
    floor_rise_tpdf_db: float | None
    floor_rise_hearing_db: float | None
    playback_db_spl: float = REFERENCE_PLAYBACK_DB_SPL

    @property
    def shaped_still_audible(self):
        """Even the shaped noise stays above the threshold at the reference level."""
        return self.hearing_above_threshold_db is not None and self.hearing_above_threshold_db > 0

    def to_dict(self):
        """Plain values for JSON."""
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


def _hearing(bits, rate):
    """(threshold-weighted dBFS, total gain dB) of TPDF shaped by the hearing design, or
    (None, None) outside the design's rate range."""
    from requant.dsp import shaping

    if not shaping.MIN_DESIGN_RATE_HZ <= rate <= shaping.MAX_DESIGN_RATE_HZ:
        return None, None
    h = shaping.design_hearing(rate)
    return (predicted_noise_dbfs(bits, rate, coeffs=tuple(h)), shaping.noise_gain_db(h))


def advise(bits, sample_rate, *, quiet_dbfs=None, quiet_is_noise=None, bits_in_use=None,
           playback_db_spl=REFERENCE_PLAYBACK_DB_SPL):
    """Which method suits a file at ``bits`` (see the module notes for the rules).

    Parameters
    ----------
    bits : int, 1..32
        Target word length.
    sample_rate : float, Hz
        The rate the file is requantized at.
    quiet_dbfs : float, dBFS, optional
        Level of the file's quietest passage (digital silence excluded).
    quiet_is_noise : bool, optional
        Whether that passage is noise rather than music (None: unknown, taken
        as not noise).
    bits_in_use : int, optional
        The word length the file really uses on an integer grid (None: finer
        than any, e.g. floating-point content).
    playback_db_spl : float, dB SPL, default :data:`REFERENCE_PLAYBACK_DB_SPL`

    Returns
    -------
    Advice
    """
    bits = _check_bits(bits)
    rate = float(sample_rate)
    flat = tpdf_noise_dbfs(bits)
    flat_thr = predicted_noise_dbfs(bits, rate)
    hear_thr, hear_gain = _hearing(bits, rate)
    rise_flat = rise_hear = None
    if quiet_is_noise and quiet_dbfs is not None:
        rise_flat = floor_rise_db(quiet_dbfs, flat)
        if hear_gain is not None:
            rise_hear = floor_rise_db(quiet_dbfs, flat + hear_gain)
    above_flat = above_threshold_db(flat_thr, playback_db_spl=playback_db_spl)
    above_hear = (None if hear_thr is None
                  else above_threshold_db(hear_thr, playback_db_spl=playback_db_spl))
    if bits_in_use is not None and 0 < bits_in_use <= bits:
        choice, reason = "none-needed", "lossless"
    elif rise_flat is not None and rise_flat <= MAX_FLOOR_RISE_DB:
        choice, reason = "tpdf", "own-noise"
    elif above_flat <= 0.0:
        choice, reason = "tpdf", "below-threshold"
    elif hear_thr is None:
        choice, reason = "tpdf", "no-design"
    else:
        choice, reason = "hearing", "audible"
    return Advice(
        bits=bits, sample_rate=rate, choice=choice, reason=reason, bits_in_use=bits_in_use,
        quiet_dbfs=quiet_dbfs, quiet_is_noise=quiet_is_noise, tpdf_dbfs=flat,
        tpdf_threshold_dbfs=flat_thr, tpdf_above_threshold_db=above_flat,
        hearing_threshold_dbfs=hear_thr, hearing_above_threshold_db=above_hear,
        hearing_benefit_db=None if hear_thr is None else flat_thr - hear_thr,
        hearing_total_gain_db=hear_gain, floor_rise_tpdf_db=rise_flat,
        floor_rise_hearing_db=rise_hear, playback_db_spl=float(playback_db_spl))


# ---------------------------------------------------------------------------
# wording


def _db(v):
    return f"{v:.1f}"


def _side(v, *, above="above", below="below"):
    """``'3.2 dB above'`` / ``'3.2 dB below'`` for a signed difference."""
    return f"{abs(v):.1f} dB {above if v > 0 else below}"


def _level(a):
    """The sentence about the quietest passage against flat TPDF's noise, or ''."""
    if a.quiet_dbfs is None:
        return ""
    d = a.quiet_dbfs - a.tpdf_dbfs
    where = (f"{_side(d)} flat TPDF's noise at {a.bits} bits ({_db(a.tpdf_dbfs)} dBFS)")
    if a.quiet_is_noise:
        return f"The file's own noise floor sits at {_db(a.quiet_dbfs)} dBFS, {where}. "
    kind = " (music or tones, not noise)" if a.quiet_is_noise is False else ""
    covered = ": the noise will cover it" if d < 0 else ""
    return f"The quietest passage sits at {_db(a.quiet_dbfs)} dBFS{kind}, {where}{covered}. "


def _loud(a):
    return f"played loud (a full-scale sine at {a.playback_db_spl:g} dB SPL)"


def advice_paragraph(a):
    """One paragraph: which method suits the file at ``a.bits`` bits, and why in numbers.

    Parameters
    ----------
    a : requant.dsp.audibility.Advice

    Returns
    -------
    str
        Plain text (ASCII digits and signs), no trailing newline.
    """
    head = f"At {a.bits} bits and {a.sample_rate:g} Hz: "
    if a.reason == "lossless":
        return (head + f"no method needed. Only {a.bits_in_use} bits are in use, so "
                f"converting to {a.bits} bits is exact (no dither, no shaping).")
    return head + _lower_first(_body(a))


def _body(a):
    """The paragraph after its head, for every reason but ``lossless``."""
    text = _level(a)
    weighted = (f"Weighted by the hearing threshold (Terhardt 1979), flat TPDF's noise is "
                f"{_db(a.tpdf_threshold_dbfs)} dBFS")
    shaped = ""
    if a.hearing_benefit_db is not None:
        shaped = (f"the hearing-threshold shaper designed for {a.sample_rate:g} Hz lowers it "
                  f"by {_db(a.hearing_benefit_db)} dB")
    if a.reason == "own-noise":
        text += (f"Flat TPDF raises that floor by {a.floor_rise_tpdf_db:.2f} dB, too little to "
                 "notice: the added noise hides under the file's own")
        if a.floor_rise_hearing_db is not None:
            text += (f"; shaping would lower its audible part by {_db(a.hearing_benefit_db)} dB "
                     f"but add {_db(a.hearing_total_gain_db)} dB of total noise (a rise of "
                     f"{a.floor_rise_hearing_db:.2f} dB), so it buys nothing here")
        return text + ". Use plain TPDF (--dither tpdf)."
    if a.reason == "below-threshold":
        text += (f"{weighted}, {_side(a.tpdf_above_threshold_db)} the threshold of hearing "
                 f"even when {_loud(a)}: plain TPDF (--dither tpdf) is inaudible here")
        if shaped:
            text += f"; {shaped}, to no audible benefit"
        return text + "."
    text += (f"{weighted}: {_loud(a)} it would lie {_side(a.tpdf_above_threshold_db)} the "
             "threshold of hearing in quiet, in pauses and fades. ")
    if a.reason == "no-design":
        return text + (f"No hearing-threshold design exists at {a.sample_rate:g} Hz (it covers "
                       "8000 to 384000 Hz): use plain TPDF (--dither tpdf), or more bits.")
    text += (shaped[0].upper() + shaped[1:] + f", to {_side(a.hearing_above_threshold_db)} the "
             "threshold: use --dither tpdf --shaping hearing.")
    if a.shaped_still_audible:
        text += (" Even shaped, the noise stays audible when played loud: more bits help more "
                 "than any shaper.")
    return text + (f" Shaping raises the total noise power by {_db(a.hearing_total_gain_db)} dB, "
                   "so SNR and A-weighted figures get worse while the audible noise falls.")


def _lower_first(text):
    return text[:1].lower() + text[1:]


def threshold_comparison(measured_dbfs, flat_dbfs, *, bits, predicted=False):
    """``'-109.4 dBFS measured, 15.3 dB below flat TPDF at 16 bits (-94.1 dBFS predicted)'``.

    Parameters
    ----------
    measured_dbfs : float
        The method's threshold-weighted noise (measured, or predicted when
        ``predicted``).
    flat_dbfs : float
        Flat TPDF's predicted threshold-weighted noise at ``bits``.
    bits : int
    predicted : bool
        Whether ``measured_dbfs`` is a prediction.
    """
    d = measured_dbfs - flat_dbfs
    how = "predicted" if predicted else "measured"
    rel = "the same as" if abs(d) < 0.05 else _side(d)
    return (f"{_db(measured_dbfs)} dBFS {how}, {rel} flat TPDF at {bits} bits "
            f"({_db(flat_dbfs)} dBFS predicted)")
