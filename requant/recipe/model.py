"""The recipe itself: :class:`Shaping` and :class:`Recipe`, frozen and validated."""

from __future__ import annotations

import dataclasses
import difflib
import math
import os
from dataclasses import dataclass, field
from typing import ClassVar

from requant.recipe.coefficients import (
    _check_design_rate,
    _read_coefficient_file,
    _validate_values,
    parse_coefficients,
)
from requant.recipe.values import (
    DEFAULT_LIMIT_DB,
    DEFAULT_ORDER,
    DEFAULT_SILENCE_MIN_MS,
    DITHERS,
    DOWNMIX_LAWS,
    QUANTIZERS,
    RECIPE_KEYS,
    SHAPING_KINDS,
    SHAPING_NAMES,
    SILENCE_MODES,
    RecipeError,
    _check_bool,
    _check_ceiling,
    _check_channels,
    _check_gain,
    _check_rate,
    _check_seed,
    _check_silence_min,
    _choice,
    _is_number,
    _typed,
    check_bits,
    check_dither_in_loop,
    check_shaping_limit,
    check_shaping_order,
    silence_min_frames,
)

# --------------------------------------------------------------------------- shaping

@dataclass(frozen=True)
class Shaping:
    """Noise shaping: which filter feeds the quantizer's error back.

    Parameters
    ----------
    kind : {'none', 'first-order', 'hearing', 'custom'}, default 'none'
        ``first-order``: NTF = 1 − z⁻¹. ``hearing``: designed for each
        file's own sample rate from Terhardt's (1979) threshold in quiet
        (:func:`requant.dsp.shaping.design_hearing`). ``custom``: the
        coefficients given.
    order : int, 1..64, default 9 for ``hearing`` (None otherwise)
        Order of the ``hearing`` design.
    limit_db : float, dB, (0, 30], default 13 for ``hearing`` (None otherwise)
        Limit on the ``hearing`` design's total noise power gain.
    coeffs : tuple of float, for ``custom``
        Feedback coefficients h_1..h_K (1 to 64); NTF(z) = 1 − Σ h_k z⁻ᵏ.
    source : str, optional
        The JSON file the coefficients came from (for people; not part of
        what decides the output).
    rate : float, Hz, optional
        The sample rate the coefficients were made for; audio at another
        rate is refused. None: any rate.

    Use :meth:`parse` to turn what a user typed into a ``Shaping``.
    """

    kind: str = "none"
    order: int | None = None
    limit_db: float | None = None
    coeffs: tuple[float, ...] = ()
    source: str | None = None
    rate: float | None = None

    def __post_init__(self):
        kind = _choice("shaping", self.kind, SHAPING_KINDS)
        if kind == "hearing":
            order = DEFAULT_ORDER if self.order is None else check_shaping_order(self.order)
            limit = (DEFAULT_LIMIT_DB if self.limit_db is None
                     else check_shaping_limit(self.limit_db))
        else:
            order = limit = None  # they belong to the hearing design only
        if kind == "custom":
            if isinstance(self.coeffs, (str, bytes)) or not hasattr(self.coeffs, "__len__"):
                raise _typed("shaping_coeffs", self.coeffs)
            coeffs = _validate_values(list(self.coeffs), "shaping coefficients")
            rate = self.rate
            if rate is not None and (not _is_number(rate) or not math.isfinite(rate) or rate <= 0):
                raise RecipeError("shaping_rate", rate, f"must be {RECIPE_KEYS['shaping_rate']}")
            rate = None if rate is None else float(rate)
            source = None if self.source is None else str(self.source)
        else:
            if self.coeffs:
                raise RecipeError("shaping_coeffs", list(self.coeffs),
                                  f"belongs to custom shaping, not {kind!r}")
            coeffs, rate, source = (), None, None
        for name, value in (("order", order), ("limit_db", limit), ("coeffs", coeffs),
                            ("rate", rate), ("source", source)):
            object.__setattr__(self, name, value)

    @classmethod
    def parse(cls, spec, *, order=None, limit_db=None, base_dir=None):
        """What a user typed, as a ``Shaping``.

        Parameters
        ----------
        spec : str, os.PathLike, sequence of float or Shaping
            ``none``, ``first-order``, ``hearing``, a path ending in ``.json``
            (read now: the recipe holds the coefficients), a comma list
            ``h1,h2,...``, or a list of numbers.
        order, limit_db : optional
            The ``hearing`` design's order and limit (ignored for other kinds).
        base_dir : str, optional
            Folder against which a relative ``.json`` path is resolved (a
            profile's own folder).

        Raises
        ------
        UsageError, InputError
            One sentence naming what is wrong.
        """
        if isinstance(spec, Shaping):
            if spec.kind == "hearing" and (order is not None or limit_db is not None):
                return dataclasses.replace(spec, order=spec.order if order is None else order,
                                           limit_db=spec.limit_db if limit_db is None else limit_db)
            return spec
        if spec is None:
            spec = "none"
        if isinstance(spec, (list, tuple)):
            return cls("custom", coeffs=_validate_values(list(spec), "shaping coefficients"))
        if not isinstance(spec, (str, os.PathLike)):
            raise _typed("shaping", spec)
        text = os.fspath(spec).strip()
        if text in ("none", "first-order"):
            return cls(text)
        if text == "hearing":
            return cls("hearing", order=order, limit_db=limit_db)
        if text.lower().endswith(".json"):
            path = text
            if base_dir is not None and not os.path.isabs(path):
                path = os.path.join(base_dir, path)
            path = os.path.abspath(path)
            coeffs, rate = _read_coefficient_file(path)
            return cls("custom", coeffs=coeffs, source=path, rate=rate)
        if any(c.isdigit() for c in text):
            return cls("custom", coeffs=parse_coefficients(text))
        hint = difflib.get_close_matches(text, SHAPING_NAMES, n=1)
        did = f" (did you mean {hint[0]!r}?)" if hint else ""
        raise RecipeError("shaping", text, f"is not known; use one of {', '.join(SHAPING_NAMES)}, "
                                           "a .json file, or coefficients separated by commas"
                                           f"{did}")

    @property
    def name(self):
        """How reports and people name it: the kind, or the file for coefficients from one."""
        if self.kind == "custom" and self.source:
            return self.source
        return self.kind

    @property
    def label(self):
        """A short ASCII label: ``none``, ``first-order``, ``hearing``, ``file`` or ``custom``."""
        if self.kind == "custom" and self.source:
            return "file"
        return self.kind

    def check_rate(self, sample_rate):
        """Refuse audio at another rate than the one the coefficients were made for."""
        if self.rate is not None:
            _check_design_rate(self.rate, sample_rate, self.source or "coefficients")

    def describe(self):
        """One phrase: ``hearing (order 9, limit 13 dB)``, ``custom (3 taps)``."""
        if self.kind == "hearing":
            return f"hearing (order {self.order}, limit {self.limit_db:g} dB)"
        if self.kind == "custom":
            where = f" from {self.source}" if self.source else ""
            return f"custom ({len(self.coeffs)} taps{where})"
        return self.kind


# --------------------------------------------------------------------------- the recipe

#: The keys of the stages before the quantizer (channels, rate, gain).
_PREPARE_KEYS = ("channels", "downmix", "rate", "gain_db", "peak_ceiling_dbtp")

_FLAT_SHAPING = ("shaping", "shaping_order", "shaping_limit_db", "shaping_coeffs",
                 "shaping_source", "shaping_rate")


@dataclass(frozen=True)
class Recipe:
    """Everything that decides the output bits of a requantization.

    Parameters
    ----------
    bits : int, 1..32, default 16
        Target word length. One LSB is Δ = 2^−(bits−1), full scale 1.0.
    quantizer : {'round', 'truncate'}, default 'round'
        ``round``: nearest code, mid-tread, Δ·⌊x/Δ + ½⌋ (exact halves go up).
        ``truncate``: toward minus infinity, as dropping two's-complement bits
        does.
    dither : {'none', 'rpdf', 'tpdf', 'tpdf-hp'}, default 'tpdf'
        Added before quantizing: rectangular (1 LSB peak to peak),
        triangular (2 LSB p-p), or high-passed triangular r[n] − r[n−1].
        Predicted error power: Δ²/12, Δ²/6, Δ²/4, Δ²/4 (Lipshitz, Wannamaker
        & Vanderkooy 1992); truncation adds Δ²/4 of bias.
    shaping : Shaping or str, default 'none'
        Noise shaping; a string or a list of numbers goes through
        :meth:`Shaping.parse`. High-passed TPDF is refused inside a shaping
        loop (it is not independent from sample to sample).
    seed : int, 0..2**63−1, or None, default None
        The same seed gives bit-identical output. None: a fresh seed is drawn
        at conversion time and recorded in the report. In a library batch it
        is the run seed, from which each file's seed derives.
    force_dither : bool, default False
        Dither even when the input already lies on the target grid (otherwise
        such input is written unchanged).
    silence : {'keep', 'dither'}, default 'keep'
        ``keep``: in every run of at least ``silence_min_ms`` of exact zeros,
        per channel, the output is exact zeros and the error is zero (no
        dither hiss out of nothing; the shaping filter's and the high-passed
        dither's memory are cleared there). ``dither``: zeros are dithered
        like any other sample.
    silence_min_ms : float, ms, (0, 10000], default 20
        The shortest run of exact zeros kept silent
        (:data:`DEFAULT_SILENCE_MIN_MS` says why 20); in frames, see
        :meth:`silence_frames`.
    channels : {1, 2} or None, default None
        The delivered channels; None keeps the source's. Several channels
        become one by ``downmix``; one becomes two by copying it. Applied first.
    downmix : {'mean', '-3db'}, default 'mean'
        How several channels become one (:data:`DOWNMIX_LAWS`).
    rate : int, Hz, 8000..384000, or None, default None
        The delivered sample rate; None keeps the source's. Converted in
        float64 (:mod:`requant.dsp.resample`) after the channels, before the
        gain; dither, shaping, the error signal and the report are those of
        the new rate.
    gain_db : float, dB, −60..+60, default 0
        A gain applied in float64 before dither: the error signal is the
        output minus the *gained* input.
    peak_ceiling_dbtp : float, dBTP, −60..0, or None, default None
        A true-peak ceiling (ITU-R BS.1770-4 true peak): the file is measured
        first, and if its true peak after ``gain_db`` is above the ceiling
        the gain is lowered by the difference (one gain for the whole file;
        never a limiter, never a raise).

    Notes
    -----
    A ``Recipe`` is frozen and validated when made; invalid values raise
    :class:`RecipeError` with one sentence. ``to_dict``/``from_dict`` give
    its JSON form; :meth:`identity` is what a batch hashes into its settings
    id. Use :meth:`replace` for a changed copy.
    """

    bits: int = 16
    quantizer: str = "round"
    dither: str = "tpdf"
    shaping: Shaping = field(default_factory=Shaping)
    seed: int | None = None
    force_dither: bool = False
    silence: str = "keep"
    silence_min_ms: float = DEFAULT_SILENCE_MIN_MS
    channels: int | None = None
    downmix: str = "mean"
    rate: int | None = None
    gain_db: float = 0.0
    peak_ceiling_dbtp: float | None = None

    #: Dictionary keys that are not fields of their own (the shaping's parts).
    FLAT_SHAPING_KEYS: ClassVar[tuple[str, ...]] = _FLAT_SHAPING

    def __post_init__(self):
        object.__setattr__(self, "bits", check_bits(self.bits))
        _choice("quantizer", self.quantizer, QUANTIZERS)
        _choice("dither", self.dither, DITHERS)
        if not isinstance(self.shaping, Shaping):
            object.__setattr__(self, "shaping", Shaping.parse(self.shaping))
        object.__setattr__(self, "seed", _check_seed(self.seed))
        _check_bool("force_dither", self.force_dither)
        _choice("silence", self.silence, SILENCE_MODES)
        object.__setattr__(self, "silence_min_ms", _check_silence_min(self.silence_min_ms))
        object.__setattr__(self, "channels", _check_channels(self.channels))
        _choice("downmix", self.downmix, DOWNMIX_LAWS)
        object.__setattr__(self, "rate", _check_rate(self.rate))
        object.__setattr__(self, "gain_db", _check_gain(self.gain_db))
        object.__setattr__(self, "peak_ceiling_dbtp", _check_ceiling(self.peak_ceiling_dbtp))
        check_dither_in_loop(self.dither, self.shaping.kind != "none")

    @property
    def lsb(self):
        """One LSB at :attr:`bits`, full scale 1.0: 2^−(bits−1)."""
        return 2.0 ** -(self.bits - 1)

    def silence_frames(self, sample_rate):
        """The shortest silent run in frames at ``sample_rate`` (at least 1); 0 when
        silence is dithered."""
        if self.silence != "keep":
            return 0
        return silence_min_frames(self.silence_min_ms, sample_rate)

    def replace(self, **changes):
        """A copy with some fields changed (validated again)."""
        return dataclasses.replace(self, **changes)

    def with_seed(self, seed):
        """A copy with ``seed``."""
        return dataclasses.replace(self, seed=seed)

    def to_dict(self):
        """The recipe as plain JSON data (flat keys, see :data:`RECIPE_KEYS`)."""
        s = self.shaping
        return {
            "bits": self.bits,
            "quantizer": self.quantizer,
            "dither": self.dither,
            "shaping": s.kind,
            "shaping_order": s.order,
            "shaping_limit_db": s.limit_db,
            "shaping_coeffs": list(s.coeffs),
            "shaping_source": s.source,
            "shaping_rate": s.rate,
            "seed": self.seed,
            "force_dither": self.force_dither,
            "silence": self.silence,
            "silence_min_ms": self.silence_min_ms,
            "channels": self.channels,
            "downmix": self.downmix,
            "rate": self.rate,
            "gain_db": self.gain_db,
            "peak_ceiling_dbtp": self.peak_ceiling_dbtp,
        }

    @classmethod
    def from_dict(cls, data, *, base=None, base_dir=None):
        """A recipe from its dictionary form, or from part of one.

        Parameters
        ----------
        data : mapping
            Keys of :data:`RECIPE_KEYS`; missing keys come from ``base``.
            ``shaping`` may be a kind, a ``.json`` path, a comma list or a
            list of numbers (as in a profile); ``shaping_coeffs`` with
            ``shaping = 'custom'`` gives the coefficients directly.
        base : Recipe, optional
            Where missing keys come from (default: the library defaults).
        base_dir : str, optional
            Folder for a relative ``.json`` shaping file.

        Raises
        ------
        RecipeError
            For an unknown key or a value that is not allowed.
        """
        base = base or cls()
        unknown = [k for k in data if k not in RECIPE_KEYS]
        if unknown:
            hint = difflib.get_close_matches(unknown[0], list(RECIPE_KEYS), n=1)
            did = f" (did you mean {hint[0]!r}?)" if hint else ""
            raise RecipeError(unknown[0], data[unknown[0]],
                              f"is not a recipe setting{did}; known settings are "
                              f"{', '.join(RECIPE_KEYS)}")
        fields = {k: data[k] for k in ("bits", "quantizer", "dither", "seed", "force_dither",
                                        "silence", "silence_min_ms", *_PREPARE_KEYS)
                  if k in data}
        if any(k in data for k in _FLAT_SHAPING):
            fields["shaping"] = _shaping_from_flat(data, base.shaping, base_dir)
        return dataclasses.replace(base, **fields)

    @classmethod
    def from_settings(cls, settings):
        """The recipe of a report's or a batch summary's ``settings`` block (the keys they
        add beside the recipe's, such as ``dither_applied``, are left out)."""
        return cls.from_dict({k: v for k, v in settings.items() if k in RECIPE_KEYS})

    def identity(self):
        """What decides the output bits, for hashing: :meth:`to_dict` without the
        file name a custom filter came from (its coefficients are there)."""
        d = self.to_dict()
        d.pop("shaping_source")
        if self.silence != "keep":
            d.pop("silence_min_ms")  # it decides nothing then
        # the stages before the quantizer count only when they do something, so a library
        # converted before they existed keeps its settings id
        if not self.changes_input:
            for key in _PREPARE_KEYS:
                d.pop(key)
        elif self.channels != 1:
            d.pop("downmix")
        return d

    @property
    def changes_input(self):
        """Whether anything happens to the input before the quantizer (channels, rate,
        gain, ceiling). Whether a change is needed for a given file (its channels or
        rate may already be the target's) is decided by :mod:`requant.dsp.prepare`."""
        return (self.channels is not None or self.rate is not None or self.gain_db != 0.0
                or self.peak_ceiling_dbtp is not None)

    def describe(self):
        """One line for people: ``16-bit, round, dither tpdf, shaping none, seed 7``."""
        seed = "fresh seed" if self.seed is None else f"seed {self.seed}"
        forced = ", dither forced" if self.force_dither else ""
        silence = (f"silence kept (>= {self.silence_min_ms:g} ms)" if self.silence == "keep"
                   else "silence dithered")
        before = ""
        if self.channels is not None:
            before += (f", mono ({self.downmix} downmix)" if self.channels == 1
                       else ", stereo")
        if self.rate is not None:
            before += f", {self.rate} Hz"
        if self.gain_db:
            before += f", gain {self.gain_db:+g} dB"
        if self.peak_ceiling_dbtp is not None:
            before += f", true peak at most {self.peak_ceiling_dbtp:g} dBTP"
        return (f"{self.bits}-bit, {self.quantizer}, dither {self.dither}, shaping "
                f"{self.shaping.describe()}, {seed}{forced}, {silence}{before}")


def _shaping_from_flat(data, current, base_dir):
    """The Shaping a flat dict describes (keys left out keep ``current``'s values)."""
    kind = data.get("shaping", current.kind if "shaping" not in data else None)
    order = data.get("shaping_order")
    limit = data.get("shaping_limit_db")
    if order is not None:  # out of range is wrong whatever the shaping (it is ignored otherwise)
        order = check_shaping_order(order)
    if limit is not None:
        limit = check_shaping_limit(limit)
    if kind == "custom" or ("shaping_coeffs" in data and data.get("shaping_coeffs")
                            and "shaping" not in data):
        return Shaping("custom", coeffs=data.get("shaping_coeffs", current.coeffs),
                       source=data.get("shaping_source"), rate=data.get("shaping_rate"))
    if kind == current.kind and "shaping" not in data:
        if kind == "hearing":
            return Shaping("hearing", order=current.order if order is None else order,
                           limit_db=current.limit_db if limit is None else limit)
        return current
    return Shaping.parse(kind, order=order, limit_db=limit, base_dir=base_dir)
