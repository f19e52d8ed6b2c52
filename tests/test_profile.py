"""Tests for delivery profiles (TOML) and how they layer with options.

The TOML reader is Python's tomllib (TOML 1.0); the rules quoted beside the
syntax cases are from the TOML v1.0.0 specification (toml.io).
"""

import json

import numpy as np
import pytest
import soundfile as sf

from requant.errors import UsageError
from requant.library import (
    MANIFEST_NAME,
    read_details,
    read_manifest,
    resolve_settings,
    run_batch,
)
from requant.library.profiles import (
    PROFILE_KEYS,
    ProfileError,
    load_profile,
    parse_profile,
)

from helpers import run_cli

GOOD = """
description = "Game SFX: 12-bit FLAC"
bits = 12
quantizer = "truncate"
dither = "rpdf"
shaping = "hearing"
shaping_order = 5
shaping_limit_db = 9.5
force_dither = true
silence = "dither"
silence_min_ms = 35
analyze = true
format = "flac"
include = ["*.wav"]
exclude = ["scratch/*"]
seed = 20240501
channels = 1
downmix = "-3db"
rate = 44100
gain_db = -1.5
peak_ceiling_dbtp = -1.0
"""


def test_good_profile_gives_every_key(tmp_path):
    path = tmp_path / "sfx.toml"
    path.write_text(GOOD)
    prof = load_profile(path)
    assert prof == {"bits": 12, "quantizer": "truncate", "dither": "rpdf",
                    "shaping": "hearing", "shaping_order": 5, "shaping_limit_db": 9.5,
                    "force_dither": True, "silence": "dither", "silence_min_ms": 35,
                    "analyze": True, "format": "flac",
                    "include": ["*.wav"],
                    "exclude": ["scratch/*"], "seed": 20240501, "channels": 1,
                    "downmix": "-3db", "rate": 44100, "gain_db": -1.5,
                    "peak_ceiling_dbtp": -1.0}
    assert set(prof) | {"description"} == set(PROFILE_KEYS)


def test_shaping_forms(tmp_path):
    assert parse_profile("shaping = [1.5, -0.5]")["shaping"] == "1.5,-0.5"
    (tmp_path / "filters").mkdir()
    (tmp_path / "filters" / "h.json").write_text("[0.5]")
    prof = load_profile_text(tmp_path, 'shaping = "filters/h.json"')
    assert prof["shaping"] == str(tmp_path / "filters" / "h.json")  # beside the profile
    assert parse_profile('include = "*.wav"')["include"] == ["*.wav"]


def load_profile_text(folder, text):
    path = folder / "p.toml"
    path.write_text(text)
    return load_profile(path)


@pytest.mark.parametrize("text, match", [
    ("bitz = 16", r"unknown key 'bitz' \(did you mean 'bits'\?\)"),
    ("jobs = 4", "unknown key 'jobs'"),
    ("[batch]\nbits = 16", "unknown key 'batch'"),
    ('bits = "16"', "bits must be an integer .* not the string '16'"),
    ("bits = 16.0", "bits must be an integer .* not the number 16.0"),
    ("bits = true", "bits must be an integer .* not the boolean true"),
    ("bits = 0", "bits = 0 is out of range"),
    ("bits = 33", "bits = 33 is out of range"),
    ('dither = "tpfd"', r"dither = 'tpfd' is not known \(did you mean 'tpdf'\?\)"),
    ('quantizer = "nearest"', "quantizer = 'nearest' is not known"),
    ('format = "mp3"', "format = 'mp3' is not known"),
    ('format = "flac"\nbits = 32', "FLAC holds at most 24 bits"),
    ('shaping = "hearin"', r"did you mean 'hearing'"),
    # the loop's noise model needs dither independent from sample to sample (Lipshitz,
    # Wannamaker & Vanderkooy 2004): the recipe refuses high-passed TPDF with shaping
    ('dither = "tpdf-hp"\nshaping = "hearing"', "not independent from sample to sample"),
    ("shaping = [1e300]", "cannot shape noise usefully"),
    ("shaping = [1, true]", "finite numbers"),
    ("shaping_order = 0", "shaping_order = 0 is out of range"),
    ("shaping_limit_db = 45.0", "out of range"),
    ('force_dither = "yes"', "force_dither must be true or false"),
    ("analyze = 1", "analyze must be true or false"),
    ("include = [1]", "item 1 is the integer 1"),
    ("seed = -1", "seed = -1 is out of range"),
    # TOML v1.0.0: a string value must be quoted; a bare word is not a value
    ("dither = tpdf", "is not valid TOML"),
    # TOML v1.0.0: defining a key twice is invalid
    ("bits = 16\nbits = 12", "is not valid TOML"),
])
def test_bad_profiles(text, match):
    with pytest.raises(ProfileError, match=match) as info:
        parse_profile(text, source="profile 'x.toml'")
    message = str(info.value)
    assert "\n" not in message and message.startswith("profile 'x.toml'")
    assert isinstance(info.value, UsageError) and info.value.exit_code == 2


def test_unreadable_profiles(tmp_path):
    with pytest.raises(ProfileError, match="does not exist"):
        load_profile(tmp_path / "nope.toml")
    with pytest.raises(ProfileError, match="is a folder"):
        load_profile(tmp_path)
    (tmp_path / "latin1.toml").write_bytes('description = "caf\xe9"'.encode("latin-1"))
    with pytest.raises(ProfileError, match="not UTF-8"):
        load_profile(tmp_path / "latin1.toml")


def test_layers_defaults_profile_options():
    prof = parse_profile('bits = 8\ndither = "rpdf"\ninclude = ["a/*"]')
    s = resolve_settings({"bits": 12, "dither": None, "include": None}, prof)
    assert (s.recipe.bits, s.recipe.dither, s.include) == (12, "rpdf", ("a/*",))  # option > profile
    assert s.recipe.quantizer == "round" and s.format == "same"  # library defaults below both


@pytest.fixture
def src(tmp_path):
    folder = tmp_path / "lib"
    folder.mkdir()
    rng = np.random.default_rng(11)
    sf.write(folder / "a.wav", 0.2 * rng.standard_normal((400, 1)), 8000, subtype="PCM_24")
    return folder


@pytest.mark.parametrize("text, match", [
    ('dither = "tpfd"', "did you mean 'tpdf'"),
    ("bits = 99", "out of range"),
    ("bits = = 3", "not valid TOML"),
])
def test_bad_profile_on_the_command_line(tmp_path, src, text, match):
    prof = tmp_path / "bad.toml"
    prof.write_text(text)
    code, out, err = run_cli("batch", src, tmp_path / "out", "--profile", prof)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and match in lines[0], err
    assert "Traceback" not in err and not (tmp_path / "out").exists()


def test_profile_drives_a_batch_and_options_override(tmp_path, src):
    prof = tmp_path / "delivery.toml"
    prof.write_text('bits = 8\nformat = "aiff"\nseed = 77\n')
    summary = run_batch(src, tmp_path / "out", resolve_settings({"bits": 12},
                                                                load_profile(prof)), jobs=1)
    ev = [e for e in read_manifest(tmp_path / "out" / MANIFEST_NAME)[0]
          if e["status"] == "converted"][0]
    figures = read_details(tmp_path / "out")[(ev["run_id"], ev["source"])]["figures"]
    assert ev["output"] == "a.aiff" and figures["bits"] == 12
    assert summary["run_seed"] == 77
    # libsndfile is the oracle for what was written
    info = sf.info(tmp_path / "out" / "a.aiff")
    assert info.format == "AIFF" and info.subtype == "PCM_16"
    # 12-bit codes in a 16-bit container leave the low 4 bits zero
    codes, _ = sf.read(tmp_path / "out" / "a.aiff", dtype="int16")
    assert np.all(codes % 16 == 0)
    saved = json.loads((tmp_path / "out" / "requant-summary.json").read_text())
    assert saved["settings"]["bits"] == 12 and saved["settings"]["format"] == "aiff"
