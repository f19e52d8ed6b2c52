"""The recipe: everything that decides the output bits, in one frozen object.

A :class:`Recipe` holds the target word length, the quantizer, the dither,
the noise shaping (:class:`Shaping`), the seed and whether to dither audio
that already lies on the target grid. It validates itself when it is made,
in this module only, and it has one dictionary form (:meth:`Recipe.to_dict`,
:meth:`Recipe.from_dict`) that the report's ``settings`` block, the batch
manifest's settings id, delivery profiles and cluster tasks all use.

How the output is *written* (paths, overwrite, container, block size,
progress) is not part of the recipe: the same recipe gives the same codes
whatever the block size or the destination.

Validation errors are :class:`RecipeError` (a :class:`~requant.errors.UsageError`):
one sentence naming the field, the value and what is allowed. They keep the
three parts apart (``field``, ``value``, ``problem``) so that a profile can
say the same thing in its own words (``profile 'x.toml': dither = 'tpfd' is
not known ...``).

>>> r = Recipe(bits=12, shaping="hearing")
>>> r.bits, r.shaping.kind, r.shaping.order, r.shaping.limit_db
(12, 'hearing', 9, 13.0)
>>> Recipe.from_dict(r.to_dict()) == r
True
"""


from requant.recipe.coefficients import (
    load_coefficients,
    parse_coefficients,
)
from requant.recipe.model import (
    Recipe,
    Shaping,
)
from requant.recipe.values import (
    DEFAULT_LIMIT_DB,
    DEFAULT_ORDER,
    DEFAULT_SILENCE_MIN_MS,
    DITHERS,
    DOWNMIX_LAWS,
    MAX_CEILING_DBTP,
    MAX_GAIN_DB,
    MAX_LIMIT_DB,
    MAX_RATE,
    MAX_SILENCE_MIN_MS,
    MAX_TAPS,
    MIN_CEILING_DBTP,
    MIN_RATE,
    QUANTIZERS,
    RECIPE_KEYS,
    SEED_MAX,
    SHAPING_KINDS,
    SHAPING_NAMES,
    SILENCE_MODES,
    RecipeError,
    RecipeTypeError,
    check_bits,
    check_dither_in_loop,
    check_shaping_limit,
    check_shaping_order,
    describe_value,
    silence_min_frames,
)

__all__ = [
    "QUANTIZERS",
    "DITHERS",
    "SHAPING_KINDS",
    "SHAPING_NAMES",
    "MAX_TAPS",
    "DEFAULT_ORDER",
    "DEFAULT_LIMIT_DB",
    "MAX_LIMIT_DB",
    "SEED_MAX",
    "SILENCE_MODES",
    "DEFAULT_SILENCE_MIN_MS",
    "MAX_SILENCE_MIN_MS",
    "MAX_GAIN_DB",
    "MIN_CEILING_DBTP",
    "MAX_CEILING_DBTP",
    "DOWNMIX_LAWS",
    "MIN_RATE",
    "MAX_RATE",
    "RECIPE_KEYS",
    "RecipeError",
    "RecipeTypeError",
    "Shaping",
    "Recipe",
    "parse_coefficients",
    "load_coefficients",
    "check_bits",
    "check_shaping_order",
    "check_shaping_limit",
    "check_dither_in_loop",
    "describe_value",
    "silence_min_frames",
]
