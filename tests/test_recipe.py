"""The recipe: one frozen settings object, validated in one place, one dictionary form."""

import dataclasses
import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from requant.dsp.quantizer import DITHER_MODELS, Requantizer
from requant.errors import InputError, UsageError
from requant.recipe import (
    DITHERS,
    QUANTIZERS,
    RECIPE_KEYS,
    SEED_MAX,
    Recipe,
    RecipeError,
    RecipeTypeError,
    Shaping,
)


def test_defaults():
    r = Recipe()
    assert (r.bits, r.quantizer, r.dither, r.shaping.kind, r.seed, r.force_dither) == (
        16, "round", "tpdf", "none", None, False)
    # one LSB at 16 bits, full scale 1.0: 2^-15 (the report's convention)
    assert r.lsb == 2.0 ** -15


def test_frozen():
    r = Recipe()
    with pytest.raises(dataclasses.FrozenInstanceError):
        r.bits = 8
    assert r.replace(bits=8).bits == 8 and r.bits == 16


@pytest.mark.parametrize("fields, error, match", [
    ({"bits": 33}, RecipeError, r"bits=33 is out of range; it must be an integer word length "
                                r"from 1 to 32"),
    ({"bits": 0}, RecipeError, "out of range"),
    ({"bits": 16.0}, RecipeTypeError, "bits must be an integer .* not the number 16.0"),
    ({"bits": True}, RecipeTypeError, "not the boolean true"),
    ({"quantizer": "nearest"}, RecipeError, "choose one of round, truncate"),
    ({"dither": "tpfd"}, RecipeError, r"did you mean 'tpdf'\?\); choose one of none, rpdf"),
    ({"shaping": "hearin"}, RecipeError, r"did you mean 'hearing'"),
    ({"shaping": [1.0, float("nan")]}, UsageError, "finite"),
    ({"seed": -1}, RecipeError, "seed=-1 is out of range"),
    ({"seed": SEED_MAX + 1}, RecipeError, "out of range"),
    ({"force_dither": 1}, RecipeTypeError, "force_dither must be true or false"),
    ({"dither": "tpdf-hp", "shaping": "first-order"}, RecipeError,
     "not independent from sample to sample"),
])
def test_one_line_errors(fields, error, match):
    with pytest.raises(error, match=match) as info:
        Recipe(**fields)
    assert "\n" not in str(info.value) and info.value.exit_code == 2


def test_type_errors_are_type_errors_too():
    # python-soundfile's split (STYLE.md): the wrong kind of value is a TypeError
    with pytest.raises(TypeError):
        Recipe(bits="16")


def test_errors_reworded_for_a_file():
    with pytest.raises(RecipeError) as info:
        Recipe(dither="tpfd")
    assert info.value.sentence(spaced=True, where="profile 'p.toml'").startswith(
        "profile 'p.toml': dither = 'tpfd' is not known")


@pytest.mark.parametrize("shaping", ["none", "first-order", "hearing", "1.5,-0.5", [0.25]])
def test_dict_round_trip(shaping):
    r = Recipe(bits=12, quantizer="truncate", dither="rpdf", shaping=shaping, seed=7,
               force_dither=True)
    d = r.to_dict()
    assert set(d) == set(RECIPE_KEYS)
    assert Recipe.from_dict(json.loads(json.dumps(d))) == r


def test_hearing_takes_the_design_defaults():
    s = Shaping.parse("hearing")
    assert (s.order, s.limit_db) == (9, 13.0)
    assert Shaping.parse("hearing", order=5, limit_db=9.5) == Shaping("hearing", 5, 9.5)
    assert Shaping("first-order", order=5).order is None  # only the hearing design has one


def test_from_dict_layers_over_a_base():
    base = Recipe(bits=12, shaping=Shaping("hearing", order=5))
    r = Recipe.from_dict({"shaping_limit_db": 9.0}, base=base)
    assert r.bits == 12 and r.shaping == Shaping("hearing", order=5, limit_db=9.0)
    assert Recipe.from_dict({"bits": 8}, base=base).shaping == base.shaping
    with pytest.raises(RecipeError, match="not a recipe setting"):
        Recipe.from_dict({"bitz": 8})
    with pytest.raises(RecipeError, match="shaping_order=0 is out of range"):
        Recipe.from_dict({"shaping_order": 0})  # wrong even when the design is not used


def test_coefficient_file_is_read_into_the_recipe(tmp_path):
    path = tmp_path / "h.json"
    path.write_text(json.dumps({"coefficients": [1.0, -0.25], "sample_rate": 44100}))
    r = Recipe(shaping=str(path))
    assert r.shaping.kind == "custom" and r.shaping.coeffs == (1.0, -0.25)
    assert r.shaping.source == str(path) and r.shaping.rate == 44100.0
    path.write_text("[9.0]")  # the recipe holds the coefficients, not the file
    assert Recipe.from_dict(r.to_dict()) == r
    r.shaping.check_rate(44100)
    with pytest.raises(UsageError, match="made for 44100 Hz but the audio is 48000 Hz"):
        r.shaping.check_rate(48000)
    # the file name is for people: it does not enter what decides the bits
    assert "shaping_source" not in r.identity()
    with pytest.raises(InputError, match="cannot read shaping file"):
        Recipe(shaping=str(tmp_path / "absent.json"))


def test_relative_coefficient_file_beside_a_base_dir(tmp_path):
    (tmp_path / "f").mkdir()
    (tmp_path / "f" / "h.json").write_text("[0.5]")
    r = Recipe.from_dict({"shaping": "f/h.json"}, base_dir=str(tmp_path))
    assert r.shaping.coeffs == (0.5,) and r.shaping.source == str(tmp_path / "f" / "h.json")


def test_absurd_coefficients_are_refused():
    with pytest.raises(UsageError, match="cannot shape noise usefully"):
        Recipe(shaping=[1e308])


def test_every_dither_has_a_model():
    # a dither named in requant.recipe but missing from the kernel's table would fail at
    # import; check the two agree name for name
    assert tuple(DITHER_MODELS) == DITHERS
    # Lipshitz, Wannamaker & Vanderkooy (1992), JAES 40(5): rounding error power per dither,
    # in LSB²: none 1/12 (busy signal), RPDF 1/6, TPDF 1/4
    assert DITHER_MODELS["none"].power_lsb2 == pytest.approx(1 / 12)
    assert DITHER_MODELS["rpdf"].power_lsb2 == pytest.approx(1 / 6)
    assert DITHER_MODELS["tpdf"].power_lsb2 == pytest.approx(1 / 4)


def test_requantizer_from_recipe_gives_the_same_bits():
    x = np.random.default_rng(3).uniform(-0.5, 0.5, (4000, 2))
    r = Recipe(bits=8, dither="rpdf", seed=11)
    a, _ = Requantizer.from_recipe(r, 2, sample_rate=48000).process(x, error=False)
    b, _ = Requantizer(2, bits=8, dither="rpdf", seed=11, silence_frames=960).process(
        x, error=False)
    assert np.array_equal(a, b)
    a, _ = Requantizer.from_recipe(r.replace(silence="dither"), 2).process(x, error=False)
    b, _ = Requantizer(2, bits=8, dither="rpdf", seed=11).process(x, error=False)
    assert np.array_equal(a, b)
    with pytest.raises(UsageError, match="no seed yet"):
        Requantizer.from_recipe(Recipe(), 2)


@settings(max_examples=200, deadline=None)
@given(bits=st.integers(1, 32), quantizer=st.sampled_from(QUANTIZERS),
       dither=st.sampled_from(DITHERS),
       shaping=st.one_of(st.sampled_from(["none", "first-order", "hearing"]),
                         st.lists(st.floats(-4, 4, allow_nan=False), min_size=1, max_size=64)),
       seed=st.one_of(st.none(), st.integers(0, SEED_MAX)), force=st.booleans())
def test_any_valid_recipe_survives_its_json(bits, quantizer, dither, shaping, seed, force):
    if dither == "tpdf-hp" and shaping != "none":
        with pytest.raises(RecipeError):
            Recipe(bits, quantizer, dither, shaping, seed, force)
        return
    r = Recipe(bits, quantizer, dither, shaping, seed, force)
    assert Recipe.from_dict(json.loads(json.dumps(r.to_dict()))) == r


def test_a_report_is_enough_to_repeat_a_conversion(tmp_path):
    import soundfile as sf

    from requant.convert import Outputs, convert_file

    src = tmp_path / "in.wav"
    sf.write(src, np.random.default_rng(5).uniform(-0.3, 0.3, (4800, 2)), 48000,
             subtype="FLOAT")
    convert_file(src, tmp_path / "a.wav", Recipe(bits=12, shaping="hearing"),
                 outputs=Outputs(report=tmp_path / "a.json"))
    settings = json.loads((tmp_path / "a.json").read_text())["settings"]
    again = Recipe.from_settings(settings)
    assert again.seed is not None and again.shaping.kind == "hearing"
    convert_file(src, tmp_path / "b.wav", again)
    assert (tmp_path / "a.wav").read_bytes() == (tmp_path / "b.wav").read_bytes()
