"""The compiled-kernel loader (requant.dsp.native): machine code cached by us and
loaded with llvmlite must give the same bits as the plain-Python twin and as
numba's own compilation of the same source, and a broken or missing cache must
never break a conversion.

The outside reference here is the kernel's own plain-Python source run by the
Python interpreter: three independent paths (interpreter, numba dispatcher,
cached object code) must agree bit for bit.
"""

import os
import subprocess
import sys

import numpy as np
import pytest

from requant.dsp import kernel as _kernel
from requant.dsp import native
from requant.dsp.quantizer import Requantizer, compiled_kernel

SHAPER9 = (2.412, -3.370, 3.937, -4.174, 3.353, -2.205, 1.281, -0.569, 0.0847)


def _state(nch, taps, seed=3):
    rs = np.random.default_rng(seed)
    return dict(rng=rs.integers(0, 2**63, nch * 4, dtype=np.uint64),
                fbs=np.zeros(nch * (2 * taps + 1)), hp=np.zeros(nch), acc=np.zeros(nch * 10))


def _run(kernel, x, nch, mode, h, codes_dtype, st, want_err=1):
    n = x.size // nch
    codes = np.zeros(n * nch, dtype=codes_dtype)
    err = np.zeros(n * nch if want_err else 1, dtype=np.float32)
    hh = np.asarray(h, dtype=np.float64) if len(h) else np.zeros(1)
    bits = 16 if codes_dtype == np.int16 else 24
    shift = (16 if codes_dtype == np.int16 else 32) - bits
    scale = 2.0 ** (bits - 1)
    kernel(x, n, nch, st["rng"], mode, 0.5, hh, len(h), st["fbs"], st["hp"], scale, 1 / scale,
           -(2 ** (bits - 1)), 2 ** (bits - 1) - 1, 2.0, shift, codes, err, want_err, st["acc"])
    return codes, err


CASES = [(nch, mode, h) for nch in (1, 2, 3) for mode in range(4)
         for h in ((), (1.0,), SHAPER9) if not (mode == 3 and h)]


@pytest.mark.parametrize("xd", [np.float32, np.float64])
@pytest.mark.parametrize("cd", [np.int16, np.int32])
@pytest.mark.parametrize("nch, mode, h", CASES)
def test_native_equals_plain_twin(xd, cd, nch, mode, h):
    rs = np.random.default_rng(nch * 10 + mode)
    # values beyond full scale, a NaN and an infinity exercise every counted branch
    x = rs.uniform(-1.1, 1.1, 400 * nch).astype(xd)
    x[5] = np.nan
    x[9] = np.inf
    native = compiled_kernel(xd, cd, len(h))
    a, b = _state(nch, len(h)), _state(nch, len(h))
    ca, ea = _run(native, x, nch, mode, h, cd, a)
    cb, eb = _run(_kernel.quantize_block_plain, x, nch, mode, h, cd, b)  # any tap count
    assert np.array_equal(ca, cb) and np.array_equal(ea, eb)
    for k in a:
        assert np.array_equal(a[k], b[k]), k


def test_native_path_is_in_use():
    # the fast start-up this module exists for: no numba import on the convert path
    compiled_kernel(np.float32, np.int16, 0)
    assert native.status()["quantize-f32-i16-t0"] == "native"


def test_numba_fallback_gives_the_same_bits():
    fallback = native._numba_fallback(_kernel.build)
    x = np.random.default_rng(1).uniform(-1, 1, 2 * 3000).astype(np.float32)
    a, b = _state(2, 9), _state(2, 9)
    ca, ea = _run(compiled_kernel(np.float32, np.int16, 9), x, 2, 2, SHAPER9, np.int16, a)
    cb, eb = _run(fallback, x, 2, 2, SHAPER9, np.int16, b)
    assert np.array_equal(ca, cb) and np.array_equal(ea, eb)
    assert all(np.array_equal(a[k], b[k]) for k in a)


def test_native_rejects_wrong_buffers():
    k = compiled_kernel(np.float32, np.int16, 0)
    st = _state(1, 0)
    with pytest.raises(TypeError, match="contiguous int16"):
        k(np.zeros(4, np.float32), 4, 1, st["rng"], 2, 0.5, np.zeros(1), 0, st["fbs"], st["hp"],
          32768.0, 1 / 32768, -32768, 32767, 2.0, 0, np.zeros(4, np.int32),
          np.zeros(4, np.float32), 1, st["acc"])


_CHILD = r"""
import sys, numpy as np
from requant.dsp import native
from requant.dsp.quantizer import Requantizer
rq = Requantizer(2, bits=16, dither="tpdf", seed=5)
codes, err = rq.process(np.linspace(-0.5, 0.5, 2000, dtype=np.float32).reshape(-1, 2))
print(native.status()["quantize-f32-i16-t0"], int(codes.astype(np.int64).sum()), "numba" in sys.modules)
"""


def _child(env_extra):
    env = dict(os.environ, **env_extra)
    out = subprocess.run([sys.executable, "-c", _CHILD], env=env, capture_output=True,
                         text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    return out.stdout.split()


def _reference_sum():
    rq = Requantizer(2, bits=16, dither="tpdf", seed=5)
    codes, _ = rq.process(np.linspace(-0.5, 0.5, 2000, dtype=np.float32).reshape(-1, 2))
    return str(int(codes.astype(np.int64).sum()))


def test_cache_is_built_then_loaded_without_numba(tmp_path):
    env = {"REQUANT_CACHE_DIR": str(tmp_path)}
    first = _child(env)  # compiles with numba and writes the cache
    assert first[:2] == ["native", _reference_sum()]
    assert sorted(p.suffix for p in tmp_path.iterdir()) == [".json", ".o"]
    second = _child(env)
    assert second == ["native", _reference_sum(), "False"]  # numba never imported


def test_corrupt_cache_is_rebuilt(tmp_path):
    env = {"REQUANT_CACHE_DIR": str(tmp_path)}
    _child(env)
    (obj,) = tmp_path.glob("*.o")
    obj.write_bytes(b"not an object file")
    assert _child(env)[:2] == ["native", _reference_sum()]
    assert obj.read_bytes() != b"not an object file"


def test_unwritable_cache_still_converts(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("a file where the cache directory should be")
    out = _child({"REQUANT_CACHE_DIR": str(blocker / "cache")})
    assert out[:2] == ["native", _reference_sum()]


def test_disabled_native_falls_back_to_numba():
    out = _child({"REQUANT_NO_NATIVE": "1"})
    assert out == ["numba", _reference_sum(), "True"]


@pytest.mark.parametrize("taps", [16, 64])
def test_native_equals_plain_twin_long_shapers(taps):
    # the longest custom shapers (up to shaping.MAX_TAPS = 64) through the per-tap-count
    # kernels, in blocks, against the twin run on the whole signal at once
    rs = np.random.default_rng(taps)
    h = tuple(0.5 * rs.uniform(-1, 1, taps) / taps)
    x = rs.uniform(-0.9, 0.9, 2 * 2000).astype(np.float32)
    a, b = _state(2, taps), _state(2, taps)
    native = compiled_kernel(np.float32, np.int16, taps)
    parts = [_run(native, x[i:i + 700], 2, 2, h, np.int16, a) for i in range(0, x.size, 700)]
    ca = np.concatenate([p[0] for p in parts])
    ea = np.concatenate([p[1] for p in parts])
    cb, eb = _run(_kernel.quantize_block_plain, x, 2, 2, h, np.int16, b)
    assert np.array_equal(ca, cb) and np.array_equal(ea, eb)
    assert all(np.array_equal(a[k], b[k]) for k in a)
