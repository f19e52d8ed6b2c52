"""Listening: hear what each method does, in the open and blind.

:func:`make_listening_kit` (:mod:`.kit`) renders one excerpt with every method
(:mod:`.methods`), the error signals raised to a capped, audible level and the
quietest passage raised after requantization (:mod:`.levels`, :mod:`.render`),
and one self-contained page for A/B and blind trials, each method against the
original and named pairs against each other, every comparison loudness-matched
or its differences stated (:mod:`.page`);
:mod:`.score` scores the trials saved from that page.
"""

from requant._lazy import lazy_exports

_EXPORTS = {
    "make_listening_kit": "requant.listening.kit",
    **dict.fromkeys(["Excerpt", "DEFAULT_EXCERPT_SECONDS", "MAX_EXCERPT_SECONDS",
                     "MIN_EXCERPT_SECONDS"], "requant.listening.excerpt"),
    **dict.fromkeys(["Method", "METHOD_HEADS", "METHOD_SHAPINGS", "DEFAULT_METHODS",
                     "parse_method", "parse_methods", "parse_pair", "plan_methods"],
                    "requant.listening.methods"),
    **dict.fromkeys(["CAP_DBFS", "FADE_SECONDS", "ERROR_TARGET_DBFS", "MAX_GAIN_DB",
                     "QUIET_TARGET_DBFS", "QUIET_SECONDS", "QUIET_FLOOR_BELOW_NOISE_DB",
                     "LEVEL_MATCH_FACTOR", "cap_value", "fade_envelope", "apply_fades",
                     "hard_limit", "rounding_noise_dbfs", "error_render_gain_db",
                     "quiet_gain_db", "level_match", "quiet_floor_dbfs", "find_quiet_passage",
                     "LOUDNESS_TOLERANCE_DB", "MAX_MATCH_DB", "measure_level", "plan_levels"],
                    "requant.listening.levels"),
    **dict.fromkeys(["render_method"], "requant.listening.render"),
    **dict.fromkeys(["render_page"], "requant.listening.page"),
    **dict.fromkeys(["guessing_p_value", "score_results", "load_results", "format_scores",
                     "read_seed"], "requant.listening.score"),
}
__all__ = list(_EXPORTS)
__getattr__, __dir__ = lazy_exports(__name__, _EXPORTS)
