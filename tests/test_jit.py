"""The compiled-kernel loader (requant.dsp.native): machine code cached by us and
loaded with llvmlite must give the same bits as the plain-Python twin and as
numba's own compilation of the same source, and a broken or missing cache must
never break a conversion.

The outside reference here is the kernel's own plain-Python source run by the
Python interpreter: three independent paths (interpreter, numba dispatcher,
cached object code) must agree bit for bit. Every kernel family must load as
native code, every call must check its buffers against the declared
signature, and a fallback to numba must say so.
"""

import importlib
import inspect
import os
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest

import requant
from requant.dsp import kernel as _kernel
from requant.dsp import native
from requant.dsp import truepeak as tp
from requant.dsp.quantizer import Requantizer, compiled_kernel

SHAPER9 = (2.412, -3.370, 3.937, -4.174, 3.353, -2.205, 1.281, -0.569, 0.0847)


def _state(nch, taps, seed=3):
    rs = np.random.default_rng(seed)
    return dict(rng=rs.integers(0, 2**63, nch * 4, dtype=np.uint64),
                fbs=np.zeros(nch * (2 * taps + 1)), hp=np.zeros(nch),
                acc=np.zeros(nch * len(_kernel.ACC_FIELDS)), zs=np.zeros(nch, np.int64))


def _run(kernel, x, nch, mode, h, codes_dtype, st, want_err=1, sil_len=0, m=0):
    """The kernel on ``x`` (frames, then ``m`` frames of look-ahead), keeping runs of
    ``sil_len`` zeros silent."""
    n = x.size // nch - m
    codes = np.zeros(n * nch, dtype=codes_dtype)
    err = np.zeros(n * nch if want_err else 1, dtype=np.float32)
    hh = np.asarray(h, dtype=np.float64) if len(h) else np.zeros(1)
    bits = 16 if codes_dtype == np.int16 else 24
    shift = (16 if codes_dtype == np.int16 else 32) - bits
    scale = 2.0 ** (bits - 1)
    kernel(x, n, m, nch, st["rng"], mode, 0.5, hh, len(h), st["fbs"], st["hp"], scale,
           1 / scale, -(2 ** (bits - 1)), 2 ** (bits - 1) - 1, 2.0, shift, codes, err, want_err,
           st["acc"], sil_len, st["zs"])
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


@pytest.mark.parametrize("nch, mode, h", [(1, 2, ()), (2, 2, (1.0,)), (3, 3, ()),
                                          (2, 0, SHAPER9), (3, 1, SHAPER9)])
def test_native_equals_plain_twin_keeping_silence(nch, mode, h):
    # runs of zeros longer and shorter than 50 frames, one reaching into the look-ahead
    rs = np.random.default_rng(nch + mode)
    x = rs.uniform(-0.9, 0.9, (600, nch)).astype(np.float32)
    x[100:180, 0] = 0.0
    x[300:360] = 0.0
    x[400:440] = 0.0  # too short
    x[540:] = 0.0  # 11 frames to process, the rest in the look-ahead
    x = x.reshape(-1)
    native = compiled_kernel(np.float32, np.int16, len(h))
    a, b = _state(nch, len(h)), _state(nch, len(h))
    ca, ea = _run(native, x, nch, mode, h, np.int16, a, sil_len=50, m=49)
    cb, eb = _run(_kernel.quantize_block_plain, x, nch, mode, h, np.int16, b, sil_len=50, m=49)
    assert np.array_equal(ca, cb) and np.array_equal(ea, eb)
    for k in a:
        assert np.array_equal(a[k], b[k]), k
    silent = a["acc"].reshape(nch, -1)[:, _kernel.ACC_FIELDS.index("silent")]
    assert silent[0] == 80 + 60 + 11 and all(silent[1:] == 60 + 11)
    assert all(a["zs"] == 1)  # the last run is silent, and that decision is carried
    codes = ca.reshape(-1, nch)
    assert codes[400:440].any() or mode == 0


def test_native_path_is_in_use():
    # the fast start-up this module exists for: no numba import on the convert path
    compiled_kernel(np.float32, np.int16, 0)
    assert native.status()["quantize-f32-i16-t0"] == "native"


# one representative per family and parameter, and every dtype pair convert can ask for
_VARIANTS = [(f, kw) for f in native.KERNELS for kw in native.variants(f)]


@pytest.mark.parametrize("family, choices", _VARIANTS,
                         ids=[native.kernel_name(f, **kw) for f, kw in _VARIANTS])
def test_every_kernel_loads_natively(family, choices):
    native.kernel(family, **choices)
    assert native.status()[native.kernel_name(family, **choices)] == "native"


def test_registry_lists_the_kernels_convert_uses():
    names = {native.kernel_name(f, **kw) for f, kw in _VARIANTS}
    assert {f"quantize-{x}-{c}-t{t}" for x in ("f32", "f64") for c in ("i16", "i32")
            for t in (0, 9)} <= names
    assert {f"truepeak-dual-{x}-f32" for x in ("f32", "f64")} <= names


@pytest.mark.parametrize("family", list(native.KERNELS))
def test_signature_names_the_kernel_arguments(family):
    # the one declaration must list the Python function's parameters, in order
    fam = native.KERNELS[family]
    params = {p: values[0] for p, values in fam.params.items()}
    fn = getattr(importlib.import_module(fam.module), fam.build)(None, **params)
    assert [a[0] for a in native.signature(family)] == list(inspect.signature(fn).parameters)


@pytest.mark.slow
def test_numba_fallback_gives_the_same_bits():
    fallback = native._fallback_kernel("quantize", x=np.float32, codes=np.int16, taps=9)
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
        k(np.zeros(4, np.float32), 4, 0, 1, st["rng"], 2, 0.5, np.zeros(1), 0, st["fbs"],
          st["hp"], 32768.0, 1 / 32768, -32768, 32767, 2.0, 0, np.zeros(4, np.int32),
          np.zeros(4, np.float32), 1, st["acc"], 0, st["zs"])


_CHILD = r"""
import sys, numpy as np
from requant.dsp import native
from requant.dsp.quantizer import Requantizer
rq = Requantizer(2, bits=16, dither="tpdf", seed=5)
codes, err = rq.process(np.linspace(-0.5, 0.5, 2000, dtype=np.float32).reshape(-1, 2))
print(native.status()["quantize-f32-i16-t0"], int(codes.astype(np.int64).sum()),
      "numba" in sys.modules)
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


@pytest.mark.slow
def test_cache_is_built_then_loaded_without_numba(tmp_path):
    env = {"REQUANT_CACHE_DIR": str(tmp_path)}
    first = _child(env)  # compiles with numba and writes the cache
    assert first[:2] == ["native", _reference_sum()]
    assert sorted(p.suffix for p in tmp_path.iterdir()) == [".json", ".o"]
    second = _child(env)
    assert second == ["native", _reference_sum(), "False"]  # numba never imported


@pytest.mark.slow
def test_corrupt_cache_is_rebuilt(tmp_path):
    env = {"REQUANT_CACHE_DIR": str(tmp_path)}
    _child(env)
    (obj,) = tmp_path.glob("*.o")
    obj.write_bytes(b"not an object file")
    assert _child(env)[:2] == ["native", _reference_sum()]
    assert obj.read_bytes() != b"not an object file"


@pytest.mark.slow
def test_unwritable_cache_still_converts(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("a file where the cache directory should be")
    out = _child({"REQUANT_CACHE_DIR": str(blocker / "cache")})
    assert out[:2] == ["native", _reference_sum()]


@pytest.mark.slow
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


# -- buffer checks: a wrong length raises before the kernel runs, never writes out of bounds --

def _quantize_args(n=8, nch=2, taps=9, want_err=1):
    """Valid arguments of the quantize kernel, as a dict in declared order."""
    st = _state(nch, taps)
    return dict(x=np.zeros(n * nch, np.float32), n=n, m=0, nch=nch, rng=st["rng"], mode=2,
                offset=0.5, h=np.asarray(SHAPER9[:taps] or (0.0,)), ntaps=taps, fbs=st["fbs"],
                hp_prev=st["hp"], scale=32768.0, inv_scale=1 / 32768, kmin=-32768, kmax=32767,
                e_bound=2.0, shift=0, codes=np.zeros(n * nch, np.int16),
                err=np.zeros(n * nch if want_err else 1, np.float32), want_err=want_err,
                acc=st["acc"], sil_len=0, zs=st["zs"])


def _dual_args(n=2500, nch=2):
    """Valid arguments of the dual true-peak kernel, as a dict in declared order."""
    nsb = -(-n // tp.SUB_FRAMES)
    work = max(tp.RUN_FRAMES, tp.SUB_FRAMES)  # the least the kernel may be given
    rs = np.random.default_rng(7)
    return dict(hx=np.zeros(11 * nch), he=np.zeros(11 * nch),
                xs=(rs.uniform(-1, 1, n * nch) * np.linspace(0.1, 1, n * nch)).astype(np.float32),
                es=rs.uniform(-1e-4, 1e-4, n * nch).astype(np.float32), m=11 + n, nch=nch,
                phases=tp._PHASES_FLAT.copy(), gain=tp.PHASE_GAIN, sub=tp.SUB_FRAMES,
                run=tp.RUN_FRAMES, peak_in=np.zeros(nch), peak_out=np.zeros(nch),
                v=np.zeros(work + 11), acc=np.zeros(work), bx=np.zeros(nch * nsb),
                be=np.zeros(nch * nsb), ub=np.zeros(nsb), pk=np.zeros(nsb),
                phases32=tp._PHASES32.copy(), v32=np.zeros(work + 11, np.float32),
                acc32=np.zeros(work, np.float32))


def _peak_args(n=2500, nch=2):
    """Valid arguments of the single true-peak kernel, as a dict in declared order."""
    d = _dual_args(n, nch)
    return dict(hx=d["hx"], xs=d["xs"], m=d["m"], nch=nch, phases=d["phases"],
                fold=d["phases32"], gain=d["gain"], sub=d["sub"], run=d["run"],
                peak=d["peak_in"], bx=d["bx"], ub=d["ub"], pk=d["pk"], v=d["v"], acc=d["acc"],
                v32=d["v32"], acc32=d["acc32"])


def _loudness_args(n=9000, nch=3, signals=2):
    """Valid arguments of the K-weighting kernel, as a dict in declared order."""
    from requant.dsp.loudness import k_weighting_sos

    rs = np.random.default_rng(8)
    pairs = (nch + 1) // 2
    return dict(x=rs.uniform(-1, 1, n * nch).astype(np.float32),
                e=rs.uniform(-1e-4, 1e-4, n * nch).astype(np.float32), n=n, nch=nch, scale=1.0,
                gain=1.0, sos=np.ascontiguousarray(k_weighting_sos(48000).reshape(-1)),
                step=4800, z=np.zeros(12 * signals * pairs), part=np.zeros(2 * signals * pairs),
                ctl=np.zeros(2), sums=np.zeros(signals * nch * 2))


def _scan_args(n=5000, nch=2):
    """Valid arguments of inspect's scan kernel, as a dict in declared order."""
    from requant.dsp.scan import CHANNEL_FIELDS, LANE_FIELDS

    rs = np.random.default_rng(9)
    w = max(4, nch)
    return dict(x=rs.uniform(-1, 1, n * nch).astype(np.float32), n=n, nch=nch, scale=1.0,
                clip_level=1 - 2.0**-15, clip_run=3, grid_cap=25, floor_len=2400,
                lanes=np.zeros(len(LANE_FIELDS) * w), chans=np.zeros(len(CHANNEL_FIELDS) * nch),
                orb=np.zeros(w, np.uint64), ctl=np.zeros(2), blocks=np.zeros(2 * nch * 3))


_FAMILY_CASES = {
    "quantize": (dict(x=np.float32, codes=np.int16, taps=9), _quantize_args),
    "truepeak-dual": (dict(xs=np.float32, es=np.float32), _dual_args),
    "truepeak": (dict(xs=np.float32), _peak_args),
    "loudness": (dict(x=np.float32, signals=2), _loudness_args),
    "scan": (dict(x=np.float32), _scan_args),
}
_ARRAYS = [(f, a[0]) for f in _FAMILY_CASES for a in native.signature(f) if a[1][0].endswith("*")]


@pytest.mark.parametrize("family, arg", _ARRAYS)
def test_every_array_is_checked_against_its_length(family, arg):
    choices, make = _FAMILY_CASES[family]
    k = native.kernel(family, **choices)
    args = make()
    k(*args.values())  # the valid call runs
    args = make()
    args[arg] = args[arg][:-1]  # one element short
    before = {name: v.copy() for name, v in args.items() if isinstance(v, np.ndarray)}
    with pytest.raises(ValueError, match=f"{arg} holds"):
        k(*args.values())
    for name, v in before.items():  # nothing was written
        assert np.array_equal(args[name], v, equal_nan=True), name


@pytest.mark.parametrize("change, message", [
    (dict(ntaps=4), "ntaps=4 breaks the condition ntaps == taps"),
    (dict(n=-1), "n=-1 breaks"),
    (dict(mode=7), "mode=7 breaks"),
    (dict(n=9), "x holds 16 elements but the call needs 18"),
    (dict(nch=3), "x holds 16 elements but the call needs 24"),
])
def test_quantize_kernel_rejects_inconsistent_sizes(change, message):
    k = compiled_kernel(np.float32, np.int16, 9)
    args = _quantize_args()
    args.update(change)
    with pytest.raises(ValueError, match=message):
        k(*args.values())


def test_error_buffer_is_only_checked_when_wanted():
    k = compiled_kernel(np.float32, np.int16, 9)
    k(*_quantize_args(want_err=0).values())  # err of one element is fine without error output


def test_dual_kernel_rejects_an_error_block_shorter_than_the_input():
    k = native.kernel("truepeak-dual", xs=np.float32, es=np.float32)
    args = _dual_args()
    args["es"] = args["es"][:-2]
    with pytest.raises(ValueError, match="es holds 4998 elements but the call needs 5000"):
        k(*args.values())


def test_requantizer_rejects_short_output_buffers():
    rq = Requantizer(2, bits=16, seed=1)
    x = np.zeros((100, 2), np.float32)
    with pytest.raises(ValueError, match="codes holds"):
        rq.process(x, codes=np.zeros((99, 2), np.int16))
    with pytest.raises(ValueError, match="err holds"):
        rq.process(x, err_out=np.zeros((50, 2), np.float32))
    with pytest.raises(ValueError, match="es holds"):
        tp.DualTruePeakMeter(2).process(x, x[:60])


def test_the_numba_path_is_checked_the_same_way():
    calls = []
    spec = native._spec("quantize", dict(x=np.float32, codes=np.int16, taps=9))
    k = native._checked(spec, lambda *a: calls.append(a), pointers=False)
    k(*_quantize_args().values())
    args = _quantize_args()
    args["fbs"] = args["fbs"][:5]
    with pytest.raises(ValueError, match="fbs holds 5 elements but the call needs 38"):
        k(*args.values())
    args = _quantize_args()
    args["acc"] = args["acc"].astype(np.float32)
    with pytest.raises(TypeError, match="acc must be a contiguous float64 array"):
        k(*args.values())
    assert len(calls) == 1


# -- fallback: said once, not when asked for ---------------------------------------------------

@pytest.fixture
def fresh_loader(monkeypatch):
    """native.kernel with nothing loaded yet and the numba path replaced by the plain twin."""
    monkeypatch.setattr(native, "_loaded", {})
    monkeypatch.setattr(native, "_status", {})
    monkeypatch.setattr(native, "_warned", False)
    monkeypatch.setattr(native, "_numba_raw", lambda spec: native._build_fn(spec, None))
    monkeypatch.delenv("REQUANT_NO_NATIVE", raising=False)
    return monkeypatch


def _broken(spec):
    raise RuntimeError("llvmlite refused the object\nsecond line")


def test_fallback_warns_once_with_the_reason(fresh_loader):
    fresh_loader.setattr(native, "_native_raw", _broken)
    with pytest.warns(native.NativeFallbackWarning, match="refused the object") as rec:
        k = native.kernel("quantize", x=np.float32, codes=np.int16, taps=0)
    assert len(rec) == 1 and "second line" not in str(rec[0].message)
    assert native.status() == {"quantize-f32-i16-t0": "numba"}
    with np.errstate(over="ignore"):  # the plain twin stands in for numba here
        k(*_quantize_args(taps=0).values())  # the fallback runs, checked
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a second kernel falls back silently
        native.kernel("truepeak-dual", xs=np.float64, es=np.float32)
    assert native.status()["truepeak-dual-f64-f32"] == "numba"


def test_fallback_asked_for_does_not_warn(fresh_loader):
    fresh_loader.setenv("REQUANT_NO_NATIVE", "1")
    fresh_loader.setattr(native, "_native_raw", _broken)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        native.kernel("quantize", x=np.float32, codes=np.int16, taps=0)
    assert native.status() == {"quantize-f32-i16-t0": "numba"}


_CLI_FALLBACK = r"""
import sys
from requant.dsp import native
def broken(spec):
    raise RuntimeError("simulated loader failure")
native._native_raw = broken
from requant.cli import console
sys.argv = ["requant", *sys.argv[1:]]
console()
"""


@pytest.mark.slow
def test_cli_prints_the_fallback_as_one_warning_not_a_traceback(tmp_path):
    import soundfile as sf

    src = tmp_path / "in.wav"
    sf.write(src, 0.5 * np.sin(np.arange(4800) / 7.0), 48000, subtype="FLOAT")
    out = subprocess.run([sys.executable, "-c", _CLI_FALLBACK, "convert", str(src),
                          str(tmp_path / "o.wav"), "--bits", "16", "--seed", "1"],
                         capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    assert "Traceback" not in out.stderr
    assert out.stderr.count("NativeFallbackWarning") == 1
    assert "simulated loader failure" in out.stderr


# -- the cache lives outside the installed package ---------------------------------------------

def test_cache_dir_default_and_override(monkeypatch, tmp_path):
    monkeypatch.delenv("REQUANT_CACHE_DIR", raising=False)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path))
    assert native.cache_dir() == tmp_path / "requant"
    monkeypatch.setenv("XDG_CACHE_HOME", "relative/path")  # ignored, as the XDG spec says
    assert native.cache_dir() == Path.home() / ".cache" / "requant"
    monkeypatch.delenv("XDG_CACHE_HOME")
    assert native.cache_dir() == Path.home() / ".cache" / "requant"
    monkeypatch.setenv("REQUANT_CACHE_DIR", str(tmp_path / "mine"))
    assert native.cache_dir() == tmp_path / "mine"


@pytest.mark.slow
def test_default_cache_is_written_to_xdg_cache_home(tmp_path):
    package = Path(requant.__file__).resolve().parent
    before = set(package.rglob("requant-*.o"))
    env = dict(os.environ, XDG_CACHE_HOME=str(tmp_path))
    env.pop("REQUANT_CACHE_DIR", None)
    out = subprocess.run([sys.executable, "-c", _CHILD], env=env, capture_output=True,
                         text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    assert out.stdout.split()[:2] == ["native", _reference_sum()]
    assert sorted(p.suffix for p in (tmp_path / "requant").iterdir()) == [".json", ".o"]
    assert set(package.rglob("requant-*.o")) == before
