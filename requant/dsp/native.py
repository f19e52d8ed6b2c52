"""Compiled kernels that load without numba: numba compiles once, we keep the
machine code and load it with llvmlite.

Why: numba's own on-disk cache (``cache=True``) saves the compiling, but
loading from it still imports numba and builds its typing and target
registries. Measured on a 2-core machine (medians of 20 alternated runs of a
``python -c`` doing a 16-frame conversion), loading the block kernel costs
0.03 s over the process's imports this way and 0.56 s through numba's cache
(about 18x; the whole process 0.20 s against 0.72 s), more than the kernel's
own work on a 20-minute stereo file. DEVELOPERS.md has the numbers and the
decision to keep this module.

How: :func:`kernel` compiles a kernel over raw pointers with numba, stores the
object code (one file per kernel, signature, source, CPU and toolchain), and
in later processes hands that object to llvmlite's MCJIT, which takes a few
milliseconds. The kernel is then a ctypes function that releases the GIL. The
object has no undefined symbols (numba's ``error_model="numpy"``, no wrappers,
no allocation) and gets its own MCJIT engine, as numba gives every object the
same environment symbol names. This relies on numba internals (a compile
result's library and mangled name, numba's calling convention), so
``pyproject.toml`` pins numba and llvmlite to the tested range.

Kernel families
---------------
:data:`KERNELS` lists every family of kernels loaded here (one source, one
kernel per choice of array dtypes and build parameters). Each kernel module
declares its signature once, next to the kernel: one ``(name, code, rule)``
per argument, in order, where ``code`` is a :data:`TYPES` code or a choice
of pointer codes such as ``"f32*|f64*"`` (picked per kernel by the keyword of
that name given to :func:`kernel`), and ``rule`` is, for an array, the least
number of elements it must hold and, for a scalar, a condition it must meet
(or ``None``): Python expressions in the scalar arguments and the build
parameters. Every call checks dtypes, contiguity, those lengths and
conditions before the kernel runs, so a wrong buffer raises instead of being
written out of bounds.

Fallback
--------
If the native path fails (no llvmlite, a numba whose internals moved),
:func:`kernel` calls the same Python source through ``numba.njit`` with
arrays, which gives the same bits with the slower start-up, and warns once
per process with :class:`NativeFallbackWarning`. ``REQUANT_NO_NATIVE=1``
asks for that path without the warning. :func:`status` says which path each
kernel takes. The plain true-peak meter (:func:`requant.dsp.truepeak._kernel`)
is not loaded here: it uses numba's own cache.

Cache
-----
``$XDG_CACHE_HOME/requant`` (``~/.cache/requant``), never inside the
installed package; ``REQUANT_CACHE_DIR`` overrides it. Files are written
atomically and checked against their SHA-256 when read, so concurrent
workers that compile the same kernel at once are harmless and a damaged
entry is rebuilt. Without a writable cache every process compiles the
kernels it uses (about 2 s each) and still runs native code.
"""

import ctypes
import hashlib
import importlib
import itertools
import json
import os
import sys
import threading
import warnings
from pathlib import Path
from typing import NamedTuple

import numpy as np

__all__ = [
    "KERNELS",
    "TYPES",
    "Family",
    "NativeFallbackWarning",
    "cache_dir",
    "kernel",
    "kernel_input",
    "plain_twin",
    "kernel_name",
    "pointer_code",
    "signature",
    "status",
    "variants",
]

#: Argument type codes: (numba type name, ctypes type, numpy dtype or None for scalars).
TYPES = {
    "f32*": ("float32", ctypes.c_void_p, np.float32),
    "f64*": ("float64", ctypes.c_void_p, np.float64),
    "i16*": ("int16", ctypes.c_void_p, np.int16),
    "i32*": ("int32", ctypes.c_void_p, np.int32),
    "u64*": ("uint64", ctypes.c_void_p, np.uint64),
    "i64*": ("int64", ctypes.c_void_p, np.int64),
    "i64": ("int64", ctypes.c_int64, None),
    "f64": ("float64", ctypes.c_double, None),
}


class Family(NamedTuple):
    """One family of compiled kernels: one source, one kernel per choice.

    Attributes
    ----------
    module : str
        The module that defines the kernel; its source text is part of the
        cache key.
    build : str
        Name of its build function: ``build(jit, **params)`` returns the
        kernel, its helpers wrapped by ``jit`` (``None``: the plain twin).
    signature : str
        Name of its signature declaration (see the module docstring).
    params : dict
        Build parameters (integers), each with the values the tests load;
        any value may be asked for.
    vectorize : bool
        Compile with LLVM's straight-line (SLP) vectorizer, which numba leaves
        off by default: kernels that run several channels' (or signals')
        recursions side by side in the same code get them into one vector
        register. It changes no result (no reassociation: the same IEEE
        operations, lane by lane).
    """

    module: str
    build: str
    signature: str
    params: dict
    vectorize: bool = False


#: Every family of kernels requant loads through this module.
KERNELS = {
    "quantize": Family("requant.dsp.kernel", "build", "SIGNATURE", {"taps": (0, 9)}, True),
    "truepeak-dual": Family("requant.dsp.peakkernel", "build_dual", "DUAL_SIGNATURE", {},
                            True),
    "truepeak": Family("requant.dsp.peakkernel", "build_peak", "PEAK_SIGNATURE", {}, True),
    "residual": Family("requant.dsp.residual", "build", "SIGNATURE", {}),
    "loudness": Family("requant.dsp.loudness", "build", "SIGNATURE", {"signals": (1, 2)}, True),
    "scan": Family("requant.dsp.scan", "build", "SIGNATURE", {}, True),
    "resample": Family("requant.dsp.ratekernel", "build", "SIGNATURE", {}, True),
}


class NativeFallbackWarning(RuntimeWarning):
    """A kernel could not be loaded as native code and runs through numba instead."""


class _Arg(NamedTuple):
    name: str
    codes: tuple  # the allowed TYPES codes (one unless a choice)
    rule: str | None
    check: object  # rule compiled for eval, or None


class _Spec(NamedTuple):
    name: str
    family: Family
    args: tuple  # of _Arg
    codes: tuple  # the bound TYPES code of each argument
    params: dict


_lock = threading.Lock()
_engines = []
_loaded = {}
_status = {}
_signatures = {}
_warned = False


def _no_native():
    return os.environ.get("REQUANT_NO_NATIVE", "") not in ("", "0")


def cache_dir():
    """Directory of the compiled-kernel cache (created when first written).

    Returns
    -------
    Path
        ``$REQUANT_CACHE_DIR`` if set, else ``$XDG_CACHE_HOME/requant``,
        else ``~/.cache/requant``.
    """
    env = os.environ.get("REQUANT_CACHE_DIR")
    if env:
        return Path(env)
    base = os.environ.get("XDG_CACHE_HOME", "")
    if not os.path.isabs(base):  # the XDG spec ignores relative paths
        base = Path.home() / ".cache"
    return Path(base) / "requant"


def status():
    """``{kernel name: 'native' | 'numba'}`` for every kernel loaded so far."""
    return dict(_status)


def signature(family):
    """The parsed signature of a family of :data:`KERNELS`.

    Parameters
    ----------
    family : str
        A key of :data:`KERNELS`.

    Returns
    -------
    tuple of (name, codes, rule)
        One per argument, in order; ``codes`` is a tuple of :data:`TYPES`
        codes (more than one for a choice of dtypes).

    Raises
    ------
    ValueError
        If the kernel module's declaration is malformed.
    """
    sig = _signatures.get(family)
    if sig is not None:
        return sig
    fam = KERNELS[family]
    decl = getattr(importlib.import_module(fam.module), fam.signature)
    args = []
    seen = set(fam.params)
    for entry in decl:
        name, code, rule = entry
        codes = tuple(code.split("|"))
        where = f"{fam.module}.{fam.signature}, argument {name!r}"
        if not name.isidentifier() or name.startswith("_") or name in seen:
            raise ValueError(f"{where}: the name is not a new identifier without a leading _")
        seen.add(name)
        if any(c not in TYPES for c in codes) or (len(codes) > 1 and
                                                  any(TYPES[c][2] is None for c in codes)):
            raise ValueError(f"{where}: {code!r} is not a TYPES code or a choice of pointer codes")
        if TYPES[codes[0]][2] is not None and not rule:
            raise ValueError(f"{where}: an array needs a length rule")
        check = compile(rule, f"<{where}>", "eval") if rule else None
        args.append(_Arg(name, codes, rule, check))
    sig = _signatures[family] = tuple(args)
    return sig


def pointer_code(dtype):
    """The :data:`TYPES` code of a pointer to ``dtype`` (e.g. ``"f32*"``)."""
    dt = np.dtype(dtype)
    for code, (_, _, npdt) in TYPES.items():
        if npdt is not None and np.dtype(npdt) == dt:
            return code
    raise TypeError(f"no compiled kernel takes {dt} arrays")


def _spec(family, choices):
    if family not in KERNELS:
        raise KeyError(f"no kernel family {family!r}; known: {', '.join(KERNELS)}")
    fam = KERNELS[family]
    args = signature(family)
    choices = dict(choices)
    codes = []
    for a in args:
        if len(a.codes) == 1:
            codes.append(a.codes[0])
            continue
        if a.name not in choices:
            raise TypeError(f"kernel family {family!r} needs the dtype of {a.name!r}")
        code = pointer_code(choices.pop(a.name))
        if code not in a.codes:
            raise TypeError(f"kernel family {family!r} takes {a.name!r} as one of "
                            f"{', '.join(a.codes)}, not {code}")
        codes.append(code)
    params = {}
    for p in fam.params:
        if p not in choices:
            raise TypeError(f"kernel family {family!r} needs the build parameter {p!r}")
        params[p] = int(choices.pop(p))
    if choices:
        raise TypeError(f"kernel family {family!r} has no argument {next(iter(choices))!r}")
    dtypes = (c[:-1] for a, c in zip(args, codes, strict=True) if len(a.codes) > 1)
    name = "-".join([family, *dtypes, *(f"{p[0]}{v}" for p, v in params.items())])
    return _Spec(name, fam, args, tuple(codes), params)


def kernel_name(family, **choices):
    """The name :func:`status` and the cache give to one kernel, e.g. ``"quantize-f32-i16-t9"``."""
    return _spec(family, choices).name


def variants(family):
    """The kernels of a family the tests load: every dtype choice times the listed parameters.

    Yields
    ------
    dict
        Keywords for :func:`kernel`, e.g. ``{"x": "float32", "codes": "int16", "taps": 9}``.
    """
    fam = KERNELS[family]
    axes = [(a.name, [str(np.dtype(TYPES[c][2])) for c in a.codes])
            for a in signature(family) if len(a.codes) > 1]
    axes += [(p, list(values)) for p, values in fam.params.items()]
    for combo in itertools.product(*(values for _, values in axes)):
        yield dict(zip((name for name, _ in axes), combo, strict=True))


# -- the native path ---------------------------------------------------------------------------

def _toolchain_tag():
    """Identify numba and llvmlite without importing numba (that is the slow part)."""
    import importlib.util

    import llvmlite

    parts = [sys.version, llvmlite.__version__]
    spec = importlib.util.find_spec("numba")
    if spec is not None and spec.origin:
        ver = Path(spec.origin).with_name("_version.py")
        parts.append(ver.read_text() if ver.exists() else str(Path(spec.origin).stat().st_mtime))
    return parts


def _host():
    import llvmlite.binding as ll

    ll.initialize_native_target()
    ll.initialize_native_asmprinter()
    return ll, ll.get_host_cpu_name(), ll.get_host_cpu_features().flatten()


def _key(spec, source):
    ll, cpu, features = _host()
    h = hashlib.sha256()
    for part in (spec.name, source, ",".join(spec.codes), cpu, features, *_toolchain_tag(),
                 f"slp={int(bool(spec.family.vectorize))}"):
        h.update(part.encode())
        h.update(b"\0")
    return h.hexdigest()[:24]


def _new_engine():
    """One MCJIT engine per object file (objects share numba's symbol names)."""
    ll, cpu, features = _host()
    tm = ll.Target.from_default_triple().create_target_machine(
        cpu=cpu, features=features, jit=True, opt=3)
    engine = ll.create_mcjit_compiler(ll.parse_assembly(""), tm)
    _engines.append(engine)  # alive for the whole process: the code runs from its memory
    return engine


def _build_fn(spec, jit):
    module = importlib.import_module(spec.family.module)
    return getattr(module, spec.family.build)(jit, **spec.params)


def _compile(spec):
    """Compile the kernel for pointer arguments; return (object bytes, symbol)."""
    import numba
    from numba.core import config

    saved = config.SLP_VECTORIZE
    # numba reads the setting when it optimizes a module (numba versions that fix it when
    # the compiler starts only lose speed: the SLP vectorizer changes no result)
    config.SLP_VECTORIZE = int(bool(spec.family.vectorize)) or saved
    try:
        return _compile_now(spec, numba)
    finally:
        config.SLP_VECTORIZE = saved


def _compile_now(spec, numba):
    from numba import types

    argtypes = []
    for code in spec.codes:
        t = getattr(types, TYPES[code][0])
        argtypes.append(types.CPointer(t) if code.endswith("*") else t)
    sig = types.void(*argtypes)
    fn = _build_fn(spec, numba.njit(inline="always", error_model="numpy"))
    disp = numba.njit(sig, error_model="numpy", no_cpython_wrapper=True,
                      no_cfunc_wrapper=True)(fn)
    cres = disp.overloads[sig.args]
    return cres.library._get_compiled_object(), cres.fndesc.mangled_name


def _write_atomic(path, data):
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{threading.get_ident()}.tmp")
    try:
        with open(tmp, "wb") as f:
            f.write(data)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def _native_raw(spec):
    """The kernel's machine code as a ctypes function ``f(retptr, excinfo, *args)``."""
    source = Path(importlib.import_module(spec.family.module).__file__).read_text()
    key = _key(spec, source)
    try:
        d = cache_dir()
    except (RuntimeError, OSError):  # no home directory: compile, keep nothing
        d = None
    obj = meta = None
    if d is not None:
        obj_path = d / f"requant-{spec.name}-{key}.o"
        meta_path = d / f"requant-{spec.name}-{key}.json"
        try:
            meta = json.loads(meta_path.read_text())
            obj = obj_path.read_bytes()
            if hashlib.sha256(obj).hexdigest() != meta["sha256"]:
                raise ValueError("cache entry does not match its checksum")
        except (OSError, ValueError, KeyError, TypeError):
            obj = meta = None
    if obj is None:
        from requant.notices import compiling

        compiling(spec.name)
        obj, symbol = _compile(spec)
        meta = {"symbol": symbol, "sha256": hashlib.sha256(obj).hexdigest(),
                "args": list(spec.codes)}
        if d is not None:
            try:
                d.mkdir(parents=True, exist_ok=True, mode=0o700)
                _write_atomic(obj_path, obj)
                _write_atomic(meta_path, json.dumps(meta).encode())
            except OSError:
                pass  # no writable cache: this process still runs compiled code
    import llvmlite.binding as ll

    engine = _new_engine()
    objref = ll.ObjectFileRef.from_data(obj)
    engine.add_object_file(objref)
    _engines.append((objref, obj))  # llvmlite would free the object file under the engine
    engine.finalize_object()
    addr = engine.get_function_address(meta["symbol"])
    if not addr:
        raise RuntimeError(f"symbol {meta['symbol']!r} not found in the compiled kernel")
    # numba's calling convention: status = f(retptr, excinfo, *args); 0 is success
    proto = ctypes.CFUNCTYPE(ctypes.c_int32, ctypes.c_void_p, ctypes.c_void_p,
                             *[TYPES[c][1] for c in spec.codes])
    return proto(addr)


def _numba_raw(spec):
    """The same source through numba's dispatcher, called with arrays."""
    import numba

    return numba.njit(nogil=True, error_model="numpy")(
        _build_fn(spec, numba.njit(inline="always", error_model="numpy")))


# -- checked calls -----------------------------------------------------------------------------

def _explain(spec, values):
    """Raise the error that the fast check in a kernel's wrapper found (slow path)."""
    scope = dict(spec.params)
    scope.update((a.name, v) for a, v in zip(spec.args, values, strict=True)
                 if TYPES[a.codes[0]][2] is None)
    for a, code, v in zip(spec.args, spec.codes, values, strict=True):
        if TYPES[code][2] is None and a.check is not None and not eval(a.check, {}, scope):
            raise ValueError(f"kernel {spec.name}: {a.name}={v!r} breaks the condition {a.rule}")
    for a, code, v in zip(spec.args, spec.codes, values, strict=True):
        dt = TYPES[code][2]
        if dt is None:
            continue
        if not isinstance(v, np.ndarray) or v.dtype != dt or not v.flags.c_contiguous:
            got = f"{v.dtype} {v.shape}" if isinstance(v, np.ndarray) else type(v).__name__
            raise TypeError(f"kernel {spec.name}: {a.name} must be a contiguous "
                            f"{np.dtype(dt)} array, not {got}")
        need = eval(a.check, {}, scope)
        if v.size < need:
            raise ValueError(f"kernel {spec.name}: {a.name} holds {v.size} elements but the "
                             f"call needs {need} ({a.rule})")
    raise RuntimeError(f"kernel {spec.name}: the argument check failed without a reason")


def _checked(spec, raw, pointers):
    """A Python function that checks every argument, then calls ``raw``.

    The checks are generated from the signature as one short-circuit test (a
    few attribute reads and integer comparisons per array); only when it
    fails does :func:`_explain` find and report the problem.
    """
    names = [a.name for a in spec.args]
    scope = {"_raw": raw, "_explain": _explain, "_spec": spec, **spec.params}
    tests = [f"({a.rule})" for a, c in zip(spec.args, spec.codes, strict=True)
             if TYPES[c][2] is None and a.rule]
    passed = []
    for i, (a, code) in enumerate(zip(spec.args, spec.codes, strict=True)):
        dt = TYPES[code][2]
        if dt is None:
            passed.append(a.name)
            continue
        scope[f"_D{i}"] = np.dtype(dt)
        tests.append(f"({a.name}.dtype is _D{i} or {a.name}.dtype == _D{i}) and "
                     f"{a.name}.flags.c_contiguous and {a.name}.size >= ({a.rule})")
        passed.append(f"{a.name}.ctypes.data" if pointers else a.name)
    if pointers:
        ret, exc = ctypes.c_void_p(), ctypes.c_void_p()
        scope.update(_pret=ctypes.byref(ret), _pexc=ctypes.byref(exc), _keep=(raw, ret, exc),
                     _failed=_failed)
        call = (f"    _st = _raw(_pret, _pexc, {', '.join(passed)})\n"
                f"    if _st:\n"
                f"        _failed(_spec, _st)\n")
    else:
        call = f"    _raw({', '.join(passed)})\n"
    src = (f"def call({', '.join(names)}):\n"
           f"    try:\n"
           f"        _ok = {' and '.join(tests) or 'True'}\n"
           f"    except (AttributeError, TypeError):\n"
           f"        _ok = False\n"
           f"    if not _ok:\n"
           f"        _explain(_spec, ({', '.join(names)},))\n"
           + call)
    exec(compile(src, f"<kernel {spec.name}>", "exec"), scope)  # code made from our own declaration
    fn = scope["call"]
    fn.__doc__ = f"Kernel {spec.name} ({'native' if pointers else 'numba'}), arguments checked."
    return fn


def _failed(spec, st):
    raise RuntimeError(f"compiled kernel {spec.name} failed with status {st}")


def _warn_fallback(spec, exc):
    global _warned
    if _warned:
        return
    _warned = True
    reason = (str(exc).strip().splitlines() or [""])[0][:200] or "no message"
    warnings.warn(f"requant: kernel {spec.name} could not be loaded as native code "
                  f"({type(exc).__name__}: {reason}), so it runs through numba, which "
                  f"adds about half a second to each process", NativeFallbackWarning,
                  stacklevel=3)


def _fallback_kernel(family, **choices):
    """The checked numba-dispatcher kernel, not registered (for tests)."""
    spec = _spec(family, choices)
    return _checked(spec, _numba_raw(spec), pointers=False)


def kernel(family, **choices):
    """The compiled kernel of ``family`` for one choice of dtypes and parameters.

    Parameters
    ----------
    family : str
        A key of :data:`KERNELS`, e.g. ``"quantize"``.
    **choices
        The dtype of every argument declared with a choice of pointer codes,
        and every build parameter of the family, e.g. ``x=np.float32,
        codes=np.int16, taps=9``.

    Returns
    -------
    callable
        Takes the kernel's arguments in the declared order (arrays as
        C-contiguous numpy arrays), checks them and runs the kernel; releases
        the GIL while it runs. Built on first use and kept for the process.

    Raises
    ------
    TypeError
        For a missing or unknown choice, or (from the returned callable) an
        array of the wrong dtype or layout.
    ValueError
        From the returned callable: an array too short for the sizes passed,
        or a scalar that breaks its declared condition.

    Warns
    -----
    NativeFallbackWarning
        Once per process, when a kernel falls back to numba without
        ``REQUANT_NO_NATIVE`` asking for it.
    """
    spec = _spec(family, choices)
    with _lock:
        fn = _loaded.get(spec.name)
        if fn is not None:
            return fn
        if _no_native():
            fn = _checked(spec, _numba_raw(spec), pointers=False)
            _status[spec.name] = "numba"
        else:
            try:
                fn = _checked(spec, _native_raw(spec), pointers=True)
                _status[spec.name] = "native"
            except Exception as exc:  # any failure: the same code through numba
                fn = _checked(spec, _numba_raw(spec), pointers=False)
                _status[spec.name] = "numba"
                _warn_fallback(spec, exc)
        _loaded[spec.name] = fn
        return fn


def kernel_input(x):
    """A block as the meters' kernels take it, and its scale to full scale.

    Parameters
    ----------
    x : ndarray, (frames, channels)

    Returns
    -------
    x : ndarray
        C-contiguous float32, float64 or int32 (any other type as float64).
    scale : float
        2^-31 for int32 (libsndfile's left-justified codes), else 1.0.
    """
    x = np.ascontiguousarray(x)
    if x.dtype not in (np.float32, np.float64, np.int32):
        x = np.ascontiguousarray(x, dtype=np.float64)
    return x, (2.0**-31 if x.dtype == np.int32 else 1.0)


def plain_twin(build, *, quiet=False):
    """The plain-Python twin of a kernel family, for tests (small inputs).

    Parameters
    ----------
    build : callable
        The family's builder; ``build()`` (no ``jit``) gives the plain kernel.
    quiet : bool, default False
        Silence numpy's overflow and invalid-value warnings, which compiled
        code does not give (wrapping uint64 arithmetic; ``inf - inf``).

    Returns
    -------
    callable
        Takes the kernel's arguments; builds the plain kernel on first use.
    """
    built = []

    def twin(*args):
        if not built:
            built.append(build())
        if not quiet:
            return built[0](*args)
        with np.errstate(over="ignore", invalid="ignore"):
            return built[0](*args)

    return twin
