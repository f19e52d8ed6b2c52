"""``requant inspect``: what an audio file really holds.

:func:`inspect_file` streams a file and returns its figures (see
:mod:`requant.inspection.measure` for how each is found), its findings and the
"which method" advice (:mod:`requant.inspection.findings`);
:func:`format_inspection` renders them for the console
(:mod:`requant.inspection.text`).
"""

from requant._lazy import lazy_exports

_EXPORTS = {
    "inspect_file": "requant.inspection.measure",
    "DEFAULT_BLOCK_FRAMES": "requant.inspection.measure",
    "DEFAULT_FOR_BITS": "requant.inspection.measure",
    "QUIET_EXAMPLES": "requant.inspection.measure",
    "MIN_JUDGED_BLOCKS": "requant.inspection.measure",
    "NOISE_TONAL_MAX": "requant.dsp.audibility",
    "GAP_MIN_S": "requant.inspection.findings",
    "DITHER_PEAK_MAX_LSB": "requant.inspection.findings",
    "format_inspection": "requant.inspection.text",
}
__all__ = list(_EXPORTS)
__getattr__, __dir__ = lazy_exports(__name__, _EXPORTS)
