"""A batch's settings: a recipe plus how the library is delivered; layers and the settings id.

:class:`BatchSettings` holds the :class:`~requant.recipe.Recipe` (everything that
decides the codes; its seed is the *run* seed) and what a library batch adds:
the output format, whether to analyze each file, include/exclude patterns and
the block size. :func:`resolve_settings` layers library defaults < profile <
options given on the command line. :func:`settings_id` hashes what decides the
output files' bytes, so that a rerun with other settings converts again.
"""

from __future__ import annotations

import dataclasses
import difflib
import hashlib
import json
import os
from dataclasses import dataclass, field

from requant import __version__
from requant.audio_io.formats import DEFAULT_BLOCK_FRAMES, check_block_frames
from requant.errors import UsageError
from requant.library.tree import OUTPUT_CHOICES
from requant.recipe import RECIPE_KEYS, Recipe, RecipeError, describe_value

__all__ = ["BatchSettings", "OUTPUT_CHOICES", "BATCH_KEYS", "SETTING_KEYS", "DEFAULT_SETTINGS",
           "resolve_settings", "settings_id", "derive_seed"]

#: The batch's own keys (beside the recipe's), and what each holds (used in messages).
BATCH_KEYS = {
    "format": "one of: " + ", ".join(OUTPUT_CHOICES),
    "analyze": "true or false (measure weighted noise, signal-correlated error, true peak)",
    "include": "an array of glob patterns, such as [\"*.wav\"]",
    "exclude": "an array of glob patterns, such as [\"scratch/*\"]",
    "block_frames": "an integer number of frames per block (the output is the same for any)",
}
#: Every key a batch takes: the recipe's and its own.
SETTING_KEYS = (*RECIPE_KEYS, *BATCH_KEYS)


@dataclass(frozen=True)
class BatchSettings:
    """Everything a library batch is asked to do.

    Parameters
    ----------
    recipe : Recipe, default Recipe()
        What decides the codes. Its ``seed`` is the run seed (None: the
        previous run's, else a fresh one); each file's seed derives from it.
    format : {'same', 'wav', 'flac', 'aiff'}, default 'same'
        ``same`` keeps WAV, FLAC and AIFF sources in their format and writes
        anything else as WAV.
    analyze : bool, default False
        Also measure each file's weighted noise, signal-correlated error and
        true peak.
    include, exclude : tuple of str
        Glob patterns on the path relative to SRC (or on the name alone when
        a pattern has no ``/``).
    block_frames : int, default 65536
        Frames per block; the output is the same for any value.
    """

    recipe: Recipe = field(default_factory=Recipe)
    format: str = "same"
    analyze: bool = False
    include: tuple[str, ...] = ()
    exclude: tuple[str, ...] = ()
    block_frames: int = DEFAULT_BLOCK_FRAMES

    def __post_init__(self):
        if not isinstance(self.recipe, Recipe):
            raise TypeError(f"recipe must be a requant.Recipe, not {type(self.recipe).__name__}")
        if not isinstance(self.format, str) or self.format not in OUTPUT_CHOICES:
            hint = difflib.get_close_matches(str(self.format), OUTPUT_CHOICES, n=1)
            did = f" (did you mean {hint[0]!r}?)" if hint else ""
            raise RecipeError("format", self.format,
                              f"is not known{did}; choose one of {', '.join(OUTPUT_CHOICES)}")
        if self.format == "flac" and self.recipe.bits > 24:
            raise UsageError(f"FLAC holds at most 24 bits, not {self.recipe.bits}; choose "
                             "--format wav or aiff, or fewer bits")
        if not isinstance(self.analyze, bool):
            raise RecipeError("analyze", self.analyze,
                              f"must be true or false, not {describe_value(self.analyze)}",
                              typed=True)
        for key in ("include", "exclude"):
            pats = getattr(self, key)
            if isinstance(pats, str) or not all(isinstance(p, str) and p for p in pats):
                raise UsageError(f"{key}={pats!r} must be a list of glob patterns such as '*.wav'")
            object.__setattr__(self, key, tuple(pats))
        check_block_frames(self.block_frames)

    def replace(self, **changes) -> BatchSettings:
        """A copy with some settings changed, by their flat keys (recipe keys go to the
        recipe): ``settings.replace(bits=12, format="flac")``."""
        recipe_part = {k: v for k, v in changes.items() if k in RECIPE_KEYS}
        own = {k: v for k, v in changes.items() if k not in RECIPE_KEYS}
        if recipe_part:
            own["recipe"] = Recipe.from_dict(recipe_part, base=self.recipe)
        return dataclasses.replace(self, **own)

    def to_dict(self) -> dict:
        """The settings as plain JSON data: the recipe's keys and the batch's own."""
        return {**self.recipe.to_dict(), "format": self.format, "analyze": self.analyze,
                "include": list(self.include), "exclude": list(self.exclude),
                "block_frames": self.block_frames}


#: Library defaults, flat (the same as :func:`requant.convert.convert_file`'s).
DEFAULT_SETTINGS = BatchSettings().to_dict()


def resolve_settings(options: dict | None = None, profile: dict | None = None) -> BatchSettings:
    """Effective settings: library defaults < profile < options given.

    Parameters
    ----------
    options : dict, optional
        Explicit options (the command line), flat keys of
        :data:`SETTING_KEYS`; a value of None, or an empty include/exclude
        list, means "not given".
    profile : dict, optional
        From :func:`requant.library.profiles.load_profile` (the same keys).

    Returns
    -------
    BatchSettings

    Raises
    ------
    UsageError
        For an unknown key or a value that is not allowed.

    Examples
    --------
    >>> s = resolve_settings({"bits": 12, "dither": None}, {"bits": 8, "dither": "rpdf"})
    >>> s.recipe.bits, s.recipe.dither, s.recipe.quantizer
    (12, 'rpdf', 'round')
    """
    merged = {}
    for layer in (profile or {}, options or {}):
        for key, value in layer.items():
            if key not in SETTING_KEYS:
                raise UsageError(f"unknown batch setting {key!r}; known settings are "
                                 f"{', '.join(SETTING_KEYS)}")
            if value is None or (key in ("include", "exclude") and not value):
                continue
            merged[key] = value
    recipe = Recipe.from_dict({k: v for k, v in merged.items() if k in RECIPE_KEYS})
    own = {k: v for k, v in merged.items() if k in BATCH_KEYS}
    return BatchSettings(recipe=recipe, **own)


def _canonical(obj):
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=True)


def settings_id(settings: BatchSettings, run_seed: int) -> str:
    """Hash of everything that decides the output files' bytes.

    Parameters
    ----------
    settings : BatchSettings
    run_seed : int
        The run seed (each file's seed derives from it).

    Returns
    -------
    str
        The first 128 bits (32 hex digits) of the SHA-256 of the canonical
        JSON of the recipe's identity (:meth:`Recipe.identity`, with the run
        seed), the output format and the requant version. Custom coefficients
        enter by value, so editing a coefficient file changes the id. (Ids
        were the whole 64 digits before; a manifest row holding one still
        matches by its first 32.)
    """
    d = settings.recipe.identity()
    d["seed"] = int(run_seed)
    d["format"] = settings.format
    d["requant_version"] = __version__
    return hashlib.sha256(_canonical(d).encode("ascii")).hexdigest()[:32]


def derive_seed(run_seed: int, relpath: str) -> int:
    """A file's seed: SHA-256 of (run seed, relative path), cut to 63 bits.

    Parameters
    ----------
    run_seed : int
    relpath : str
        The source's path relative to SRC, with ``/`` separators.

    Returns
    -------
    int, 0..2**63-1
        The same for the same inputs whatever the order, the number of
        workers or the machine.

    Examples
    --------
    >>> derive_seed(1, "a/b.wav") == derive_seed(1, "a/b.wav") != derive_seed(2, "a/b.wav")
    True
    """
    raw = str(int(run_seed)).encode("ascii") + b"\0" + os.fsencode(relpath)
    return int.from_bytes(hashlib.sha256(raw).digest()[:8], "big") >> 1


def with_run_seed(settings, seed):
    """A copy of ``settings`` whose recipe carries ``seed``."""
    return dataclasses.replace(settings, recipe=settings.recipe.with_seed(seed))
