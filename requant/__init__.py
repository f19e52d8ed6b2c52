"""requant: requantize audio to a shorter word length, and prove the result.

The public names are re-exported lazily (PEP 562), so ``import requant`` and
``requant --help`` stay fast: numpy, soundfile and numba load on first use.

>>> import requant
>>> requant.requantize([0.3, -0.3], bits=2, dither="none").tolist()
[0.5, -0.5]
"""

__version__ = "0.2.0"

from requant._lazy import lazy_exports

_EXPORTS = {
    "Recipe": "requant.recipe",
    "Shaping": "requant.recipe",
    "convert_file": "requant.convert",
    "Outputs": "requant.convert",
    "Report": "requant.report.model",
    "Requantizer": "requant.dsp.quantizer",
    "requantize": "requant.dsp.quantizer",
    "predicted_error_power_lsb2": "requant.dsp.quantizer",
    "inspect_file": "requant.inspection",
    "design_hearing": "requant.dsp.shaping",
    "resolve_shaping": "requant.dsp.shaping",
    "analyze_arrays": "requant.dsp.analysis",
    "BatchSettings": "requant.library.settings",
    "resolve_settings": "requant.library.settings",
    "run_batch": "requant.library.run",
    "make_listening_kit": "requant.listening.kit",
    "audit_pair": "requant.audit.pair",
    "audit_tree": "requant.audit.tree",
    "Excerpt": "requant.listening.excerpt",
    "RequantError": "requant.errors",
    "UsageError": "requant.errors",
    "InputError": "requant.errors",
    "OutputError": "requant.errors",
}

__all__ = ["__version__", *_EXPORTS]
__getattr__, __dir__ = lazy_exports(__name__, _EXPORTS)
