"""requant: requantize audio to a shorter word length, and prove the result.

The public names are re-exported lazily (PEP 562), so ``import requant`` and
``requant --help`` stay fast: numpy, soundfile and numba load on first use.

>>> import requant
>>> requant.requantize([0.3, -0.3], bits=2, dither="none").tolist()
[0.5, -0.5]
"""

__version__ = "0.1.0"

_EXPORTS = {
    "convert_file": "requant.convert",
    "Requantizer": "requant.dsp.quantizer",
    "requantize": "requant.dsp.quantizer",
    "predicted_error_power_lsb2": "requant.dsp.quantizer",
    "inspect_file": "requant.inspection",
    "design_hearing": "requant.dsp.shaping",
    "resolve_shaping": "requant.dsp.shaping",
    "analyze_arrays": "requant.dsp.analysis",
    "run_batch": "requant.library",
    "make_listening_kit": "requant.listen",
    "RequantError": "requant.errors",
    "UsageError": "requant.errors",
    "InputError": "requant.errors",
    "OutputError": "requant.errors",
}

__all__ = ["__version__", *_EXPORTS]


def __getattr__(name):
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'requant' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(__all__)
