"""The command line: exit codes, one-line errors, defaults, start-up."""

import inspect
import json
import os
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf

from requant.cli import main

from helpers import run_cli


@pytest.fixture
def src(tmp_path):
    p = tmp_path / "in.wav"
    t = np.arange(24000) / 48000
    sf.write(p, 0.5 * np.sin(2 * np.pi * 997 * t), 48000, subtype="FLOAT")
    return p


def test_convert_writes_everything(tmp_path, src):
    out, err, rep = tmp_path / "o.wav", tmp_path / "e.wav", tmp_path / "r.json"
    code, stdout, stderr = run_cli("convert", src, out, "--bits", 12, "--seed", 5,
                                   "--error", err, "--report", rep)
    assert code == 0, stderr
    assert out.exists() and err.exists() and rep.exists()
    data = json.loads(rep.read_text())
    assert data["settings"]["seed"] == 5 and data["output"]["bits"] == 12
    assert "SNR" in stdout


@pytest.mark.parametrize("args, message", [
    (["--bits", "0"], "--bits"),
    (["--bits", "33"], "--bits"),
    (["--dither", "gauss"], "--dither"),
    (["--quantizer", "nearest"], "--quantizer"),
    (["--seed", "-4"], "--seed"),
    (["--block-frames", "0"], "--block-frames"),
])
def test_invalid_option_values(tmp_path, src, args, message):
    code, out, err = run_cli("convert", src, tmp_path / "o.wav", *args)
    assert code == 2
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and message in lines[0] and "Traceback" not in err
    assert not (tmp_path / "o.wav").exists()


@pytest.mark.parametrize("case", ["missing", "garbage", "lossy", "exists", "self", "symlink",
                                  "nofolder", "error-flac", "report-ext", "nan"])
def test_error_cases_one_line_exit_2(tmp_path, src, case):
    out = tmp_path / "o.wav"
    extra = []
    inp = src
    if case == "missing":
        inp = tmp_path / "nope.wav"
    elif case == "garbage":
        inp = tmp_path / "garbage.wav"
        inp.write_bytes(os.urandom(3000))
    elif case == "lossy":
        out = tmp_path / "o.mp3"
    elif case == "exists":
        out.write_bytes(b"x")
    elif case == "self":
        out = src
        extra = ["--overwrite"]
    elif case == "symlink":
        out = tmp_path / "link.wav"
        out.symlink_to(src)
        extra = ["--overwrite"]
    elif case == "nofolder":
        out = tmp_path / "no" / "o.wav"
    elif case == "error-flac":
        extra = ["--error", tmp_path / "e.flac"]
    elif case == "report-ext":
        extra = ["--report", tmp_path / "r.txt"]
    elif case == "nan":
        inp = tmp_path / "nan.wav"
        x = np.zeros(1000, dtype=np.float32)
        x[500] = np.nan
        sf.write(inp, x, 1000, subtype="FLOAT")
    before = {p.name: p.read_bytes() for p in tmp_path.iterdir()
              if p.is_file() and not p.is_symlink()}
    code, stdout, stderr = run_cli("convert", inp, out, *extra)
    assert code == 2, (stdout, stderr)
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("requant: error: "), stderr
    assert "Traceback" not in stderr
    after = {p.name: p.read_bytes() for p in tmp_path.iterdir()
             if p.is_file() and not p.is_symlink()}
    assert after == before  # inputs untouched, nothing new or partial


def test_debug_shows_traceback(tmp_path):
    code, _, stderr = run_cli("--debug", "convert", tmp_path / "nope.wav", tmp_path / "o.wav")
    assert code != 0 and "Traceback" in stderr


def test_cli_defaults_match_library_defaults():
    # the CLI must not drift from the library's defaults (python-soundfile's meta-test idea)
    import typer.main

    from requant.cli import app
    from requant.convert import Outputs, convert_file
    from requant.recipe import Recipe, Shaping

    cmd = typer.main.get_command(app).commands["convert"]
    cli = {p.name: getattr(p.default, "value", p.default) for p in cmd.params}
    recipe, outputs = Recipe(), Outputs()
    for name in ("bits", "quantizer", "dither", "seed", "force_dither"):
        assert cli[name] == getattr(recipe, name), name
    assert cli["shaping"] == recipe.shaping.kind
    hearing = Shaping("hearing")  # None on the command line means the design's defaults
    assert (cli["shaping_order"], cli["shaping_limit"]) == (None, None)
    assert Shaping.parse("hearing", order=None, limit_db=None) == hearing
    assert cli["overwrite"] == outputs.overwrite and cli["error"] == outputs.error
    assert cli["report"] in (None, []) and outputs.report is None
    lib = inspect.signature(convert_file).parameters
    assert cli["block_frames"] == lib["block_frames"].default


def test_help_does_not_import_heavy_modules():
    code = ("import sys; from requant.cli import main; rc = main(['--help']); "
            "heavy = [m for m in ('numpy', 'scipy', 'soundfile', 'numba', 'matplotlib') "
            "if m in sys.modules]; print(heavy)")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert proc.stdout.strip().splitlines()[-1] == "[]"


def test_version_and_no_args():
    assert main(["--version"]) == 0
    assert main([]) == 2


def test_few_bits_prints_caution(tmp_path, src):
    code, _, stderr = run_cli("convert", src, tmp_path / "o.wav", "--bits", 4)
    assert code == 0 and "Caution" in stderr


def test_inspect_reports_bits_in_use(tmp_path):
    # 16-bit codes held in a 24-bit file: 16 bits in use, converting to 16 is lossless
    p = tmp_path / "in24.wav"
    codes = (np.arange(-3000, 3000, dtype=np.int32) * 5 << 16).reshape(-1, 1)
    sf.write(p, codes, 48000, subtype="PCM_24")
    out = tmp_path / "facts.json"
    code, stdout, stderr = run_cli("inspect", p, "--json", out)
    assert code == 0, stderr
    data = json.loads(out.read_text())
    assert data["bits_used"] == 16
    assert "lossless" in stdout


def test_shaper_show_prints_figures_and_exports(tmp_path):
    js, png = tmp_path / "h.json", tmp_path / "h.png"
    code, stdout, stderr = run_cli("shaper", "show", "--rate", 44100, "--json", js, "--png", png)
    assert code == 0, stderr
    assert "Gerzon-Craven" in stdout and "ITU-R BS.468-4" in stdout
    assert json.loads(js.read_text())["sample_rate"] == 44100
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # the exported coefficients drive a conversion
    code, _, stderr = run_cli("shaper", "show", "--rate", 44100, "--shaping", js)
    assert code == 0, stderr


@pytest.mark.parametrize("args", [["--rate", "100"], ["--rate", "44100", "--shaping", "1,nan"],
                                  ["--rate", "44100", "--shaping", "none"]])
def test_shaper_show_bad_values(args):
    code, _, stderr = run_cli("shaper", "show", *args)
    assert code == 2 and len(stderr.strip().splitlines()) == 1 and "Traceback" not in stderr


def test_package_reexports_lazily():
    import requant

    for name in requant.__all__:
        assert getattr(requant, name) is not None, name
    code = ("import sys, requant; print([m for m in ('numpy', 'soundfile', 'numba') "
            "if m in sys.modules])")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert proc.stdout.strip() == "[]"
