"""Notices the library gives its caller about pauses (a kernel compiling), without printing.

The library never prints. A caller that wants to tell people about a pause
registers a function with :func:`on_compile`; the command line does, so that
the one-off compile of a kernel on a new machine is one line on stderr
instead of a silent wait. This module imports nothing, so the command line
can set the hook without loading numpy.
"""

__all__ = ["on_compile", "compiling", "COMPILE_SECONDS"]

#: About how long one kernel takes to compile on a 2-core machine, seconds (measured:
#: 1.5 to 3 s per kernel; a first conversion compiles two to six).
COMPILE_SECONDS = 2

_HOOKS = {"compile": None}


def on_compile(fn):
    """Call ``fn(kernel_name)`` before a kernel is compiled (None: no notice)."""
    _HOOKS["compile"] = fn


def compiling(name):
    """Tell the registered caller that kernel ``name`` is about to be compiled."""
    fn = _HOOKS["compile"]
    if fn is not None:
        fn(name)
