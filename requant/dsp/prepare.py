"""The stages before the quantizer: channels, then rate, then gain, in float64.

A :class:`Preparer` turns the source's blocks into the blocks the requantizer
dithers, in the order the design gives (read -> channels -> rate -> gain ->
quantize): the error signal and the report are then those of the *prepared*
input (output minus the gained, converted input), at the delivered rate and
channels.

- **Channels** (:data:`requant.recipe.DOWNMIX_LAWS`): several channels become
  one by ``mean`` (their average: correlated full-scale channels stay at full
  scale, so nothing that did not clip before can clip) or ``-3db`` (their sum
  times 1/√N: equal power for uncorrelated channels); one becomes two by
  copying it. A file of more than two channels is not folded to two: which
  channel is which is a speaker layout requant does not guess.
- **Rate**: :class:`requant.dsp.resample.Resampler` (linear-phase, exact
  rational ratio, time-aligned, the same bits for any block size).
- **Gain**: one factor 10^(dB/20) for the whole file, in float64. With a
  true-peak ceiling the file is measured first (:func:`measure_true_peak`:
  the same channels and rate, ITU-R BS.1770-4 true peak) and the gain lowered
  so that the true peak lands on the ceiling (:func:`ceiling_gain_db`): a
  gain, never a limiter.

Each stage is skipped when it does nothing for this file, so a recipe without
them costs nothing, and :meth:`Preparer.for_file` returns None when no stage
applies.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from requant.errors import UsageError

__all__ = ["Preparer", "PreparedFacts", "ceiling_gain_db", "measure_true_peak"]


@dataclass(frozen=True)
class PreparedFacts:
    """What the stages before the quantizer did to one file, for the report.

    Attributes
    ----------
    channels_in, channels_out : int
    downmix : str or None
        The law used when channels were folded to one; None otherwise.
    rate_in, rate_out : int, Hz
    rate_filter : dict or None
        The resampler's design facts (:meth:`requant.dsp.resample.RateFilter.to_dict`).
    gain_db : float, dB
        The gain applied (the recipe's, lowered by the ceiling if needed).
    gain_asked_db : float, dB
        The recipe's gain.
    ceiling_dbtp : float or None, dBTP
    true_peak_before_dbtp : float or None, dBTP
        The prepared input's true peak before the gain (measured only for a ceiling).
    """

    channels_in: int
    channels_out: int
    downmix: str | None
    rate_in: int
    rate_out: int
    rate_filter: dict | None
    gain_db: float
    gain_asked_db: float
    ceiling_dbtp: float | None
    true_peak_before_dbtp: float | None

    @property
    def true_peak_after_dbtp(self):
        """The prepared input's true peak after the gain, dBTP (None if not measured)."""
        if self.true_peak_before_dbtp is None:
            return None
        return self.true_peak_before_dbtp + self.gain_db

    def to_dict(self):
        d = {k: getattr(self, k) for k in self.__dataclass_fields__}
        d["true_peak_after_dbtp"] = self.true_peak_after_dbtp
        return d

    def sentence(self):
        """One line for people: what was done before the quantizer."""
        parts = []
        if self.channels_out != self.channels_in:
            if self.channels_out == 1:
                parts.append(f"{self.channels_in} channels folded to mono ({self.downmix})")
            else:
                parts.append("mono copied to both channels")
        if self.rate_out != self.rate_in:
            parts.append(f"rate {self.rate_in} -> {self.rate_out} Hz")
        if self.ceiling_dbtp is not None:
            tp = self.true_peak_before_dbtp
            where = "silent" if tp is None or not math.isfinite(tp) else f"{tp:+.2f} dBTP"
            parts.append(f"gain {self.gain_db:+.2f} dB (true peak {where} before gain; "
                         f"ceiling {self.ceiling_dbtp:g} dBTP)")
        elif self.gain_db:
            parts.append(f"gain {self.gain_db:+.2f} dB")
        return "; ".join(parts)


def _channel_plan(recipe, channels_in):
    """(channels out, downmix law or None)."""
    want = recipe.channels
    if want is None or want == channels_in:
        return channels_in, None
    if want == 1:
        return 1, recipe.downmix
    if channels_in == 1:  # want == 2
        return 2, None
    raise UsageError(f"the source has {channels_in} channels; requant folds any number of "
                     "channels to one (--channels 1) and copies one to two, but does not guess "
                     "a speaker layout to fold to two; give --channels 1 or leave it out")


def ceiling_gain_db(gain_db, true_peak_dbtp, ceiling_dbtp):
    """The one gain that keeps the gained true peak at or under the ceiling, dB.

    ``gain_db`` when ``true_peak_dbtp + gain_db`` is already at or under the
    ceiling (or the file is silent), else ``ceiling_dbtp − true_peak_dbtp``:
    a ceiling lowers, it never raises.
    """
    if ceiling_dbtp is None or true_peak_dbtp is None or not math.isfinite(true_peak_dbtp):
        return float(gain_db)
    return float(min(gain_db, ceiling_dbtp - true_peak_dbtp))


class Preparer:
    """Channels, rate and gain of one file, streaming, float64 out.

    Parameters
    ----------
    recipe : requant.recipe.Recipe
    channels_in : int
    rate_in : int, Hz
    gain_db : float, dB, optional
        The gain to apply (default: the recipe's; the caller passes the
        ceiling's lowered gain after :func:`measure_true_peak`).
    with_gain : bool, default True
        False for the measuring pass (channels and rate only).

    Notes
    -----
    :meth:`process` returns the prepared frames that are complete so far; the
    resampler holds some back, and :meth:`finish` returns them, so that a file
    of ``n`` frames gives :meth:`frames_out` ``(n)`` frames. The output does
    not depend on how the input is cut into blocks.
    """

    def __init__(self, recipe, channels_in, rate_in, *, gain_db=None, with_gain=True):
        self.channels_in = int(channels_in)
        self.rate_in = int(rate_in)
        self.channels_out, self.downmix = _channel_plan(recipe, self.channels_in)
        self.rate_out = self.rate_in if recipe.rate is None else int(recipe.rate)
        gain_db = recipe.gain_db if gain_db is None else float(gain_db)
        self.gain_db = gain_db if with_gain else 0.0
        self._gain = 10.0 ** (self.gain_db / 20.0)
        self._resampler = None
        self.rate_filter = None
        if self.rate_out != self.rate_in:
            from requant.dsp.resample import Resampler, design

            self._resampler = Resampler(self.rate_in, self.rate_out, self.channels_out)
            self.rate_filter = design(self.rate_in, self.rate_out).to_dict()

    @classmethod
    def for_file(cls, recipe, channels_in, rate_in):
        """A preparer when some stage applies to this file, else None."""
        if not recipe.changes_input:
            return None
        prep = cls(recipe, channels_in, rate_in)
        if (prep.channels_out == prep.channels_in and prep.rate_out == prep.rate_in
                and prep.gain_db == 0.0 and recipe.peak_ceiling_dbtp is None):
            return None
        return prep

    def frames_out(self, frames_in):
        """Frames out for ``frames_in`` frames in."""
        if self._resampler is None:
            return int(frames_in)
        from requant.dsp.resample import Resampler

        return int(Resampler.frames_out(frames_in, self.rate_in, self.rate_out))

    def _channels(self, x):
        if self.channels_out == self.channels_in:
            return np.asarray(x, dtype=np.float64)
        if self.channels_out == 2:  # one copied to two
            return np.repeat(np.asarray(x, dtype=np.float64), 2, axis=1)
        s = np.sum(x, axis=1, dtype=np.float64, keepdims=True)
        if self.downmix == "mean":
            return s * (1.0 / self.channels_in)
        return s * (1.0 / math.sqrt(self.channels_in))

    def _gained(self, y):
        if self._gain != 1.0:
            y *= self._gain
        return np.ascontiguousarray(y)

    def process(self, x):
        """The prepared frames of one block that are complete: float64 (m, channels_out)."""
        y = self._channels(x)
        if y is x:  # float64 input with nothing to do to its channels: never write into it
            y = y.copy()
        if self._resampler is not None:
            y = self._resampler.process(y)
        return self._gained(y)

    def finish(self):
        """The frames held back at the end of the file (none without a rate change)."""
        if self._resampler is None:
            return np.zeros((0, self.channels_out))
        return self._gained(self._resampler.finish())

    def facts(self, recipe, *, true_peak_before_dbtp=None):
        """What was done, as :class:`PreparedFacts`."""
        return PreparedFacts(
            channels_in=self.channels_in, channels_out=self.channels_out, downmix=self.downmix,
            rate_in=self.rate_in, rate_out=self.rate_out, rate_filter=self.rate_filter,
            gain_db=self.gain_db, gain_asked_db=recipe.gain_db,
            ceiling_dbtp=recipe.peak_ceiling_dbtp, true_peak_before_dbtp=true_peak_before_dbtp)


def measure_true_peak(blocks, recipe, channels_in, rate_in):
    """The true peak of the prepared input before any gain, dBTP (max over channels).

    Parameters
    ----------
    blocks : iterable of ndarray (frames, channels_in)
        The whole file, in order.

    Returns
    -------
    float
        dBTP (ITU-R BS.1770-4 Annex 2, :class:`requant.dsp.truepeak.TruePeakMeter`);
        −inf for digital silence; None when the file holds a NaN or infinite sample
        (the conversion itself then stops with the place of the bad sample).
    """
    from requant.dsp.truepeak import TruePeakMeter

    prep = Preparer(recipe, channels_in, rate_in, with_gain=False)
    meter = TruePeakMeter(prep.channels_out)
    for x in blocks:
        y = prep.process(x)
        if not np.isfinite(y).all():
            return None
        meter.process(y)
    tail = prep.finish()
    if not np.isfinite(tail).all():
        return None
    meter.process(tail)
    meter.finish()
    return float(np.max(meter.true_peak_dbtp))
