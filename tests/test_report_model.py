"""The typed report: its JSON form is the file ``--report x.json`` writes, key for key.

The expected key lists below are the report's JSON structure as written before
the report became typed (docs/theory.md, "The report", lists the keys scripts
rely on); they pin it, including which keys are absent when the analysis did
not run.
"""

import dataclasses
import json
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf

from requant.convert import Outputs, convert_file
from requant.recipe import RECIPE_KEYS, Recipe
from requant.report.model import MetadataRecord, Report

from helpers import chunk, fmt_pcm, pcm24, riff_wave

RATE = 48000

TOP = ["requant_version", "created", "settings", "input", "output", "error_signal", "lsb",
       "measured", "predicted", "prediction_coverage", "channels", "warnings", "notes"]
COVERAGE = ["samples", "covered_samples", "silent_samples", "clipped_samples",
            "unchanged_samples", "clipped_beyond_model_samples", "measured", "predicted"]
RECIPE = ["bits", "quantizer", "dither", "shaping", "shaping_order", "shaping_limit_db",
          "shaping_coeffs", "shaping_source", "shaping_rate", "seed", "force_dither", "silence",
          "silence_min_ms", "channels", "downmix", "rate", "gain_db", "peak_ceiling_dbtp"]
INPUT = ["path", "format", "sample_rate", "channels", "frames", "duration_s", "subtype",
         "declared_frames"]
OUTPUT = ["path", "format", "subtype", "bits", "container_bits", "passthrough"]
FIGURES = ["snr_db", "error_power_lsb2", "error_mean_lsb", "error_rms_dbfs", "signal_rms_dbfs",
           "error_peak_dbfs", "clipped_samples"]
MEASURED = FIGURES + ["over_full_scale_samples", "shaping_overloads", "silent_frames"]
MEASURED_ANALYSED = MEASURED + ["a_weighted_noise_dbfs", "itu468_noise_dbfs",
                                "threshold_weighted_noise_dbfs", "tonal_fraction",
                                "correlation_fraction", "correlated_error_fraction",
                                "input_true_peak_dbtp", "output_true_peak_dbtp",
                                "signal_correlated", "signal_correlated_reason"]
PREDICTED = ["snr_db", "error_power_lsb2", "error_rms_dbfs"]
WEIGHTED = ["a_weighted_noise_dbfs", "itu468_noise_dbfs", "threshold_weighted_noise_dbfs"]
CHANNEL = FIGURES + ["silent_frames"]
CHANNEL_ANALYSED = CHANNEL + WEIGHTED + ["correlated_error_fraction", "input_dc_offset",
                                         "output_dc_offset", "input_true_peak_dbtp",
                                         "output_true_peak_dbtp"]
ANALYSIS = ["method", "spectrum", "quietest_passage", "histogram", "true_peak", "loudness",
            "dc_offset"]
LOUDNESS = ["input_integrated_lufs", "output_integrated_lufs", "input_range_lu", "output_range_lu",
            "channel_layout", "channel_weights"]


def keys_in_order(value):
    """The nested key structure of JSON data, with the key order."""
    if isinstance(value, dict):
        return [(k, keys_in_order(v)) for k, v in value.items()]
    if isinstance(value, list):
        return [keys_in_order(v) for v in value]
    return None


def busy(seconds=0.5, seed=3):
    rng = np.random.default_rng(seed)
    n = int(RATE * seconds)
    t = np.arange(n) / RATE
    return 0.05 * rng.standard_normal((n, 2)) + 0.2 * np.sin(2 * np.pi * 997.0 * t)[:, None]


def wav_with_chunks(path, frames=4000):
    # RIFF 1991: fmt, then a bext and a LIST chunk before the data, so there is metadata to carry
    codes = np.round(busy(frames / RATE) * 2**23).astype(np.int64)
    data, _ = riff_wave([(b"fmt ", fmt_pcm(2, RATE, 24)), (b"bext", b"take".ljust(602, b"\0")),
                         (b"LIST", b"INFO" + chunk(b"INAM", b"title\0")), (b"data", pcm24(codes))])
    path.write_bytes(data)
    return path


CASES = {
    # name: (source kind, output name, recipe, outputs, analyze)
    "analysed": ("float", "o.wav", Recipe(bits=16, seed=1), {"error": "e.wav"}, None),
    "shaped": ("float", "o.flac", Recipe(bits=12, shaping="hearing", seed=2), {}, None),
    "not analysed": ("float", "o.wav", Recipe(bits=16, seed=1), {}, False),
    "pass-through": ("pcm16", "o.wav", Recipe(bits=16, seed=1), {}, None),
    "short pass-through": ("pcm16 short", "o.wav", Recipe(bits=16, seed=1), {}, None),
    "shorter than a segment": ("float short", "o.wav", Recipe(bits=16, seed=1), {}, None),
    "empty": ("float empty", "o.wav", Recipe(bits=16, seed=1), {}, None),
    "metadata": ("wav chunks", "o.wav", Recipe(bits=16, seed=1), {"metadata": True}, None),
    "metadata dropped": ("wav chunks", "o.flac", Recipe(bits=16, seed=1), {"metadata": True},
                         False),
}


def make_source(folder, kind):
    src = folder / "in.wav"
    if kind == "wav chunks":
        return wav_with_chunks(src)
    x = busy()
    if "short" in kind:
        x = x[:10]
    if "empty" in kind:
        x = x[:0]
    sf.write(src, x, RATE, subtype="PCM_16" if kind.startswith("pcm16") else "FLOAT")
    return src


@pytest.fixture(scope="module", params=list(CASES))
def written(request, tmp_path_factory):
    """(report object, the JSON file's data, case name) for one conversion."""
    kind, out_name, recipe, extra, analyze = CASES[request.param]
    folder = tmp_path_factory.mktemp("model")
    src = make_source(folder, kind)
    extra = {k: (folder / v if k == "error" else v) for k, v in extra.items()}
    rep = convert_file(src, folder / out_name, recipe,
                       outputs=Outputs(report=folder / "x.json", **extra), analyze=analyze)
    return rep, json.loads((folder / "x.json").read_text()), request.param


def test_to_dict_is_the_written_json(written):
    rep, on_disk, _ = written
    assert isinstance(rep, Report)
    assert rep.to_dict() == on_disk
    assert keys_in_order(rep.to_dict()) == keys_in_order(on_disk)
    json.dumps(rep.to_dict(), allow_nan=False)


def test_json_structure_is_pinned(written):
    rep, d, case = written
    analysed = case not in ("not analysed", "metadata dropped")
    assert list(d) == TOP + (["analysis"] if analysed else [])
    assert list(d["settings"]) == RECIPE + ["dither_applied", "block_frames"]
    assert list(d["input"]) == INPUT
    carried = case.startswith("metadata")
    assert list(d["output"]) == OUTPUT + (["metadata"] if carried else [])
    if carried:
        assert list(d["output"]["metadata"]) == ["copied", "rewritten", "dropped", "tags"]
    assert d["error_signal"] is None or list(d["error_signal"]) == ["path", "format", "subtype",
                                                                    "gain"]
    assert list(d["measured"]) == (MEASURED_ANALYSED if analysed else MEASURED)
    assert list(d["predicted"]) == PREDICTED + (WEIGHTED if analysed else [])
    assert list(d["prediction_coverage"]) == COVERAGE
    assert list(d["prediction_coverage"]["predicted"]) == ["error_power_lsb2", "error_rms_dbfs"] \
        + WEIGHTED
    # a channel's analysis figures appear when the analysis measured spectra; a pass-through
    # states its predicted weighted noise (null) even then
    per_channel = analysed and case not in ("short pass-through", "shorter than a segment",
                                            "empty")
    for row in d["channels"]:
        assert list(row) == ["channel", "measured", "predicted"]
        assert list(row["measured"]) == (CHANNEL_ANALYSED if per_channel else CHANNEL)
        weighted = per_channel or (analysed and "pass-through" in case)
        assert list(row["predicted"]) == PREDICTED + (WEIGHTED if weighted else [])
    if analysed:
        assert list(d["analysis"]) == ANALYSIS
        assert list(d["analysis"]["loudness"]) == LOUDNESS


def test_settings_are_the_recipe_plus_three(written):
    rep, d, _ = written
    assert RECIPE == list(RECIPE_KEYS) == list(Recipe().to_dict())
    assert d["settings"]["shaping_coeffs"] == list(rep.settings.shaping_coeffs)
    assert rep.settings.bits == d["settings"]["bits"] == rep.output.bits


def test_attributes_read_what_the_json_says(written):
    rep, d, _ = written
    assert rep.measured.snr_db == d["measured"]["snr_db"]
    assert rep.predicted.error_power_lsb2 == d["predicted"]["error_power_lsb2"]
    assert rep.settings.dither_applied == d["settings"]["dither_applied"]
    assert rep.output.passthrough is d["output"]["passthrough"]
    assert list(rep.warnings) == d["warnings"] and list(rep.notes) == d["notes"]
    assert [ch.channel for ch in rep.channels] == [row["channel"] for row in d["channels"]]
    assert rep.analysed is ("analysis" in d)
    assert (rep.measured.signal_correlated is None) is ("signal_correlated" not in d["measured"])


def test_report_is_frozen(written):
    rep, _, _ = written
    with pytest.raises(dataclasses.FrozenInstanceError):
        rep.lsb = 1.0
    with pytest.raises(dataclasses.FrozenInstanceError):
        rep.measured.snr_db = 0.0


def test_metadata_record_keeps_its_error_only_when_there_is_one():
    assert "error" not in MetadataRecord(copied=("bext",)).to_dict()
    rec = MetadataRecord.from_dict({"copied": [], "rewritten": [], "dropped": ["LIST"],
                                    "tags": [], "error": "the chunks could not be read"})
    assert rec.dropped == ("LIST",)
    assert list(rec.to_dict()) == ["copied", "rewritten", "dropped", "tags", "error"]


def test_model_needs_only_the_standard_library():
    code = ("import sys, requant.report.model; "
            "bad = [m for m in ('numpy', 'soundfile', 'jinja2') if m in sys.modules]; "
            "assert not bad, bad")
    subprocess.run([sys.executable, "-c", code], check=True)
