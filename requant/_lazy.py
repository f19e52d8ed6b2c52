"""Lazy re-exports for package faces (PEP 562).

A package's ``__init__`` names what it offers and where each name lives; the
module behind a name is imported on first use. So ``import requant`` and
``requant --help`` stay fast: numpy, soundfile and numba load only when a name
that needs them is used.
"""

import importlib

__all__ = ["lazy_exports"]


def lazy_exports(package, exports):
    """``(__getattr__, __dir__)`` for a package whose names live in its modules.

    Parameters
    ----------
    package : str
        The package's ``__name__``.
    exports : dict of str to str
        Public name -> module that defines it.
    """

    def __getattr__(name):
        module = exports.get(name)
        if module is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        value = getattr(importlib.import_module(module), name)
        setattr(importlib.import_module(package), name, value)
        return value

    def __dir__():
        return sorted(exports)

    return __getattr__, __dir__
