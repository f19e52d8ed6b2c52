"""Which part of a source a listening kit renders, and how long its quiet passage is."""

from __future__ import annotations

import math
from dataclasses import dataclass

from requant.errors import UsageError

__all__ = ["Excerpt", "DEFAULT_EXCERPT_SECONDS", "MAX_EXCERPT_SECONDS", "MIN_EXCERPT_SECONDS",
           "QUIET_SECONDS", "check_seconds"]

#: Default length of the quiet passage, s.
QUIET_SECONDS = 2.0
#: Default and largest excerpt, s.
DEFAULT_EXCERPT_SECONDS = 30.0
MAX_EXCERPT_SECONDS = 120.0
MIN_EXCERPT_SECONDS = 0.5


def check_seconds(name, value, *, low, high=None, allow_none=False):
    if value is None and allow_none:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise TypeError(f"{name} must be a number of seconds, not {type(value).__name__}")
    v = float(value)
    if not math.isfinite(v) or v < low or (high is not None and v > high):
        rng = f"from {low:g} to {high:g}" if high is not None else f"of at least {low:g}"
        raise UsageError(f"{name}={value!r} is out of range: give a number of seconds {rng}")
    return v


@dataclass(frozen=True)
class Excerpt:
    """Which part of the source a kit renders.

    Parameters
    ----------
    start_s : float, s, >= 0, default 0
    duration_s : float, s, 0.5..120, optional
        Default :data:`DEFAULT_EXCERPT_SECONDS`, or to the end of the file.
    """

    start_s: float = 0.0
    duration_s: float | None = None

    def __post_init__(self):
        object.__setattr__(self, "start_s", check_seconds("start", self.start_s, low=0.0))
        object.__setattr__(self, "duration_s", check_seconds(
            "duration", self.duration_s, low=MIN_EXCERPT_SECONDS, high=MAX_EXCERPT_SECONDS,
            allow_none=True))


