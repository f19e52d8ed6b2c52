"""Compiled kernels that load without numba: numba compiles once, we keep the
machine code and load it with llvmlite.

numba's own on-disk cache saves the compiling, but loading from it still
imports numba and builds its typing and target registries: about 0.45 s of
every process on the machines we measured, a quarter of a 20-minute
conversion. This module compiles a kernel over raw pointers with numba,
stores the object code (one file per kernel, signature, CPU and toolchain),
and in later processes hands that object to llvmlite's MCJIT, which takes a
few milliseconds. The kernel is then a ctypes function that releases the GIL.

If anything here fails (no writable cache, a numba whose internals moved),
:func:`load` falls back to calling the same Python source through
``numba.njit`` with arrays, which gives the same bits, only with the slower
start-up. :func:`status` says which path is in use.

The cache lives in ``requant/__pycache__`` when writable, else in
``$XDG_CACHE_HOME/requant`` (``~/.cache/requant``); ``REQUANT_CACHE_DIR``
overrides both. Files are written atomically, so concurrent workers that
compile the same kernel at once are harmless.
"""

import ctypes
import hashlib
import json
import os
import sys
import threading
from pathlib import Path

import numpy as np

__all__ = ["load", "pointer_code", "status", "cache_dir", "TYPES"]

#: Argument type codes: (numba type name, ctypes type, numpy dtype or None for scalars).
TYPES = {
    "f32*": ("float32", ctypes.c_void_p, np.float32),
    "f64*": ("float64", ctypes.c_void_p, np.float64),
    "i16*": ("int16", ctypes.c_void_p, np.int16),
    "i32*": ("int32", ctypes.c_void_p, np.int32),
    "u64*": ("uint64", ctypes.c_void_p, np.uint64),
    "i64": ("int64", ctypes.c_int64, None),
    "f64": ("float64", ctypes.c_double, None),
}

_lock = threading.Lock()
_engines = []
_loaded = {}
_status = {}


def cache_dir():
    """Directory of the compiled-kernel cache (created on demand)."""
    env = os.environ.get("REQUANT_CACHE_DIR")
    if env:
        return Path(env)
    here = Path(__file__).resolve().parent / "__pycache__"
    try:
        here.mkdir(exist_ok=True)
        if os.access(here, os.W_OK):
            return here
    except OSError:
        pass
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "requant"


def status():
    """``{kernel name: 'native' | 'numba'}`` for every kernel loaded so far."""
    return dict(_status)


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


def _key(name, source, argcodes):
    ll, cpu, features = _host()
    h = hashlib.sha256()
    for part in (name, source, ",".join(argcodes), cpu, features, *_toolchain_tag()):
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


def _compile(build, argcodes):
    """Compile ``build(jit)`` for pointer arguments; return (object bytes, symbol)."""
    import numba
    from numba import types

    argtypes = []
    for code in argcodes:
        tname = TYPES[code][0]
        t = getattr(types, tname)
        argtypes.append(types.CPointer(t) if code.endswith("*") else t)
    sig = types.void(*argtypes)
    fn = build(numba.njit(inline="always", error_model="numpy"))
    disp = numba.njit(sig, error_model="numpy", no_cpython_wrapper=True,
                      no_cfunc_wrapper=True)(fn)
    cres = disp.overloads[sig.args]
    return cres.library._get_compiled_object(), cres.fndesc.mangled_name


def _write_atomic(path, data):
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{threading.get_ident()}.tmp")
    with open(tmp, "wb") as f:
        f.write(data)
    os.replace(tmp, path)


def _native(name, build, source, argcodes):
    key = _key(name, source, argcodes)
    d = cache_dir()
    obj_path = d / f"requant-{name}-{key}.o"
    meta_path = d / f"requant-{name}-{key}.json"
    try:
        meta = json.loads(meta_path.read_text())
        obj = obj_path.read_bytes()
        if hashlib.sha256(obj).hexdigest() != meta["sha256"]:
            raise ValueError("cache entry does not match its checksum")
    except (OSError, ValueError, KeyError):
        obj, symbol = _compile(build, argcodes)
        meta = {"symbol": symbol, "sha256": hashlib.sha256(obj).hexdigest(), "args": argcodes}
        try:
            d.mkdir(parents=True, exist_ok=True)
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
                             *[TYPES[c][1] for c in argcodes])
    cfn = proto(addr)
    ret = ctypes.c_void_p()
    exc = ctypes.c_void_p()
    pret, pexc = ctypes.byref(ret), ctypes.byref(exc)
    dtypes = [TYPES[c][2] for c in argcodes]

    def call(*args):
        conv = []
        for a, dt in zip(args, dtypes):
            if dt is None:
                conv.append(a)
            else:
                if a.dtype != dt or not a.flags.c_contiguous:
                    raise TypeError(f"kernel {name}: expected a contiguous {np.dtype(dt)} array, "
                                    f"got {a.dtype} {a.shape}")
                conv.append(a.ctypes.data)
        st = cfn(pret, pexc, *conv)
        if st != 0:
            raise RuntimeError(f"compiled kernel {name} failed with status {st}")

    call.keep = (cfn, ret, exc)  # keep the ctypes objects alive with the function
    return call


def _numba_fallback(build):
    import numba

    return numba.njit(nogil=True, error_model="numpy")(
        build(numba.njit(inline="always", error_model="numpy")))


def pointer_code(dtype):
    """The :data:`TYPES` code of a pointer to ``dtype`` (e.g. ``"f32*"``)."""
    dt = np.dtype(dtype)
    for code, (_, _, npdt) in TYPES.items():
        if npdt is not None and np.dtype(npdt) == dt:
            return code
    raise TypeError(f"no compiled kernel takes {dt} arrays")


def load(name, build, source_file, argcodes):
    """The compiled kernel ``name`` for one argument signature.

    Parameters
    ----------
    name : str
        Cache name, e.g. ``"quantize-f32-i16"``.
    build : callable
        ``build(jit)`` returns the kernel's Python function, its helpers
        wrapped by ``jit`` (see :func:`requant.dsp.kernel.build`).
    source_file : str or Path
        The file that defines the kernel; its text is part of the cache key
        (read only when ``name`` is not loaded yet in this process).
    argcodes : sequence of str
        One code from :data:`TYPES` per argument. Pointer codes take
        C-contiguous numpy arrays of that dtype.

    Returns
    -------
    callable
        Takes the arguments as numpy arrays and Python scalars; releases the
        GIL while it runs.
    """
    with _lock:
        fn = _loaded.get(name)
        if fn is not None:
            return fn
        try:
            if os.environ.get("REQUANT_NO_NATIVE"):
                raise RuntimeError("native kernels disabled by REQUANT_NO_NATIVE")
            fn = _native(name, build, Path(source_file).read_text(), list(argcodes))
            _status[name] = "native"
        except Exception:  # any failure: the same code through numba
            fn = _numba_fallback(build)
            _status[name] = "numba"
        _loaded[name] = fn
        return fn
