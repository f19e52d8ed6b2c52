"""HTML and Markdown reports: self-contained, escaped, atomic, with pictures.

Outside references used here:

* PNG files are checked with Pillow (a reference decoder) and against the PNG
  signature of ISO/IEC 15948 (PNG specification, section 5.2).
* Markdown is parsed with markdown-it-py (a CommonMark reference
  implementation, installed with rich, which typer requires) with the
  GitHub table extension; what the reader sees is its HTML.
* HTML escaping follows the HTML5 rule that ``<`` and ``&`` in text are
  written as ``&lt;`` and ``&amp;`` (HTML Living Standard, 13.1.4).
"""

import base64
import io
import os
import re
from pathlib import Path
from urllib.parse import unquote

import numpy as np
import pytest
import soundfile as sf

from requant.audio_io.atomic import AtomicOutputs
from requant.convert import Outputs, convert_file
from requant.recipe import Recipe
from requant.report import plots as report_plots
from requant.report import render as report_render

RATE = 48000
HOSTILE = "<b>take&1.wav"
HOSTILE_ESCAPED = "&lt;b&gt;take&amp;1.wav"  # HTML Living Standard, 13.1.4 (text escaping)
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # ISO/IEC 15948, section 5.2


def busy_signal(seconds=1.5, seed=7):
    """Stereo noise plus a 997 Hz tone, ending in a quiet fade (seeded)."""
    rng = np.random.default_rng(seed)
    n = int(RATE * seconds)
    t = np.arange(n) / RATE
    x = 0.05 * rng.standard_normal((n, 2)) + 0.2 * np.sin(2 * np.pi * 997.0 * t)[:, None]
    fade = np.ones(n)
    fade[n // 2:] = np.geomspace(1.0, 1e-3, n - n // 2)
    return x * fade[:, None]


def img_sources(html):
    return re.findall(r"<img\b[^>]*\bsrc=\"([^\"]*)\"", html)


def assert_valid_png(data):
    from PIL import Image  # reference decoder

    assert data[:8] == PNG_SIGNATURE
    with Image.open(io.BytesIO(data)) as im:
        im.verify()
    with Image.open(io.BytesIO(data)) as im:
        assert im.format == "PNG" and im.size[0] > 300 and im.size[1] > 200


def markdown_to_html(text):
    markdown_it = pytest.importorskip("markdown_it")
    return markdown_it.MarkdownIt("commonmark").enable("table").render(text)


@pytest.fixture(scope="module")
def source(tmp_path_factory):
    folder = tmp_path_factory.mktemp("src")
    path = folder / HOSTILE
    sf.write(path, busy_signal(), RATE, subtype="FLOAT")
    return path


@pytest.fixture(scope="module", params=["none", "hearing"])
def converted(request, source, tmp_path_factory):
    """One conversion per shaping, with an HTML and a Markdown report."""
    folder = tmp_path_factory.mktemp(f"out-{request.param}")
    html = folder / "report.html"
    md = folder / "<b>take&1 report.md"  # space and markup in the pictures' names too
    recipe = Recipe(bits=16, dither="tpdf", shaping=request.param, seed=3)
    rep = convert_file(source, folder / "a.wav", recipe, outputs=Outputs(report=html))
    convert_file(source, folder / "b.wav", recipe, outputs=Outputs(report=md))
    return {"shaping": request.param, "report": rep, "html": html.read_text("utf-8"),
            "md_path": md, "md": md.read_text("utf-8"), "folder": folder}


# ------------------------------------------------------------------------------------------
# HTML


def test_html_uses_no_network(converted):
    html = converted["html"]
    for target in re.findall(r"\b(?:src|href|action|poster|data)\s*=\s*[\"']?([^\"'\s>]*)",
                             html, flags=re.I):
        assert not re.match(r"(?i)(https?:|ftp:|//)", target.strip()), target
    low = html.lower()
    for needle in ("@import", "url(", "<script", "<link", "<iframe", "<object", "<embed"):
        assert needle not in low, needle
    assert "http://" not in low and "https://" not in low


def test_html_pictures_are_embedded_pngs(converted):
    srcs = img_sources(converted["html"])
    expected = 4 if converted["shaping"] != "none" else 3  # + noise transfer when shaped
    assert len(srcs) == expected
    for src in srcs:
        prefix = "data:image/png;base64,"
        assert src.startswith(prefix)
        assert_valid_png(base64.b64decode(src[len(prefix):], validate=True))


def test_html_shows_measured_and_predicted_weighted_noise(converted):
    html = converted["html"]
    m, p = converted["report"].measured, converted["report"].predicted
    for key in ("a_weighted_noise_dbfs", "itu468_noise_dbfs", "snr_db", "error_rms_dbfs"):
        mv, pv = getattr(m, key), getattr(p, key)
        assert mv is not None and pv is not None
        assert f">{mv:.2f}<" in html, key
        assert f">{pv:.2f}<" in html, key
    # BS.468-4 prescribes a quasi-peak detector; the report must say it used RMS.
    assert "RMS detector" in html and "quasi-peak" in html
    assert "10·log10(2·PSD·fs/L)" in html


def test_html_escapes_the_file_name(converted):
    html = converted["html"]
    assert HOSTILE_ESCAPED in html
    assert "<b>take" not in html and "take&1" not in html


def test_html_without_analyzer_has_tables_only(converted, tmp_path):
    path = tmp_path / "plain.html"
    with AtomicOutputs() as outs:
        report_render.write_html(converted["report"], None, path, outs)
    html = path.read_text("utf-8")
    assert img_sources(html) == []
    assert "<table>" in html and HOSTILE_ESCAPED in html
    assert sorted(os.listdir(tmp_path)) == ["plain.html"]


# ------------------------------------------------------------------------------------------
# Markdown


def test_markdown_pictures_lie_beside_it_and_are_valid(converted):
    folder, md = converted["folder"], converted["md"]
    links = re.findall(r"!\[[^\]]*\]\(([^)\s]+)\)", md)
    expected = 4 if converted["shaping"] != "none" else 3
    assert len(links) == expected
    names = set(os.path.basename(p) for p in report_render.picture_paths(converted["md_path"])
                .values())
    for link in links:
        assert "/" not in link and " " not in link  # relative, and one token
        name = unquote(link)
        assert name in names
        assert_valid_png((folder / name).read_bytes())
    on_disk = {n for n in os.listdir(folder) if n.endswith(".png")}
    assert on_disk == {unquote(link) for link in links}


def test_markdown_renders_escaped_names_and_working_images(converted):
    # What a CommonMark reader shows (markdown-it-py, raw HTML allowed as in CommonMark).
    html = markdown_to_html(converted["md"])
    assert HOSTILE_ESCAPED in html
    assert "<b>take" not in html
    srcs = img_sources(html)
    assert len(srcs) >= 3
    for src in srcs:
        assert (converted["folder"] / unquote(src)).is_file()
    assert html.count("<table>") >= 5


def test_markdown_shows_weighted_figures(converted):
    md = converted["md"]
    m, p = converted["report"].measured, converted["report"].predicted
    for key in ("a_weighted_noise_dbfs", "itu468_noise_dbfs"):
        assert f"| {getattr(m, key):.2f} | {getattr(p, key):.2f} |" in md, key


@pytest.mark.parametrize("text", [
    HOSTILE, "a|b", "*x* _y_ `z`", "[link](//evil.example/x.png)", "# head", "1. item",
    "- item", "\\ & < > ~~s~~ $x$", "line\nbreak", "===", "> quote", "<http://x.example/>",
])
def test_markdown_text_escape_is_literal(text):
    # markdown-it-py must show exactly the text (newline shown as U+FFFD), inside a table cell too.
    import html as html_mod

    shown = text.replace("\n", "\ufffd")
    escaped = report_render._md_text(text, block=True)
    assert report_render._md_text("    " + text, block=True) == escaped  # no indented code
    body = re.sub(r"</?p>|\n", "", markdown_to_html(escaped))
    assert "<" not in body  # no element at all: no raw HTML, link, emphasis or heading
    assert html_mod.unescape(body) == shown
    table = "| h |\n|---|\n| " + report_render._md_text(text) + " |\n"
    cell = re.search(r"<td>(.*?)</td>", markdown_to_html(table), flags=re.S).group(1)
    assert "<" not in cell
    assert html_mod.unescape(cell) == shown


@pytest.mark.parametrize("name", ["plain.wav", "a`b.wav", "``x``", " spaced ", "p|q.wav",
                                  HOSTILE])
@pytest.mark.parametrize("table", [False, True])
def test_markdown_code_span_is_literal(name, table):
    import html as html_mod

    span = report_render._md_code(name, table=table)
    if table:
        out = markdown_to_html("| h |\n|---|\n| " + span + " |\n")
    else:
        out = markdown_to_html(span)
    code = re.search(r"<code>(.*?)</code>", out, flags=re.S).group(1)
    assert "<" not in code
    assert html_mod.unescape(code) == name


# ------------------------------------------------------------------------------------------
# failure and special inputs


@pytest.mark.parametrize("ext", ["html", "md"])
def test_failing_render_leaves_nothing_behind(tmp_path, monkeypatch, ext):
    src = tmp_path / "in.wav"
    sf.write(src, busy_signal(seconds=0.8), RATE, subtype="FLOAT")

    def boom(*args, **kwargs):
        raise RuntimeError("drawing failed")

    monkeypatch.setattr(report_plots, "_plot_quiet_passage", boom)
    with pytest.raises(RuntimeError, match="drawing failed"):
        convert_file(src, tmp_path / "out.wav", Recipe(seed=1),
                     outputs=Outputs(error=tmp_path / "err.wav", report=tmp_path / f"r.{ext}"))
    assert sorted(os.listdir(tmp_path)) == ["in.wav"]


@pytest.mark.parametrize("dither, warned", [("none", True), ("tpdf", False)])
def test_undithered_quiet_8_bit_shows_signal_correlated_warning(tmp_path, dither, warned):
    # A 997 Hz sine of 1.5 LSB peak at 8 bits: rounding without dither makes the error a
    # function of the signal (Lipshitz, Wannamaker & Vanderkooy 1992); TPDF removes that.
    t = np.arange(RATE) / RATE
    x = 1.5 / 128 * np.sin(2 * np.pi * 997.0 * t)
    src = tmp_path / "quiet.wav"
    sf.write(src, np.stack([x, 0.8 * x], axis=1), RATE, subtype="FLOAT")
    path = tmp_path / "r.html"
    rep = convert_file(src, tmp_path / "q.wav", Recipe(bits=8, dither=dither, seed=2),
                       outputs=Outputs(report=path))
    html = path.read_text("utf-8")
    alert = re.search(r"<section class=\"alert\".*?</section>", html, flags=re.S)
    assert rep.measured.signal_correlated is warned
    if warned:
        assert alert is not None and "signal-correlated error" in alert.group(0)
    else:
        assert alert is None or "signal-correlated error" not in alert.group(0)


@pytest.mark.parametrize("case", ["short", "silent", "on-grid", "mono-shaped"])
def test_reports_for_special_inputs_still_have_pictures(tmp_path, case):
    rng = np.random.default_rng(11)
    if case == "short":  # shorter than one analysis segment
        data, subtype = 0.1 * rng.standard_normal((2000, 2)), "FLOAT"
    elif case == "silent":
        data, subtype = np.zeros((RATE, 2)), "FLOAT"
    elif case == "on-grid":  # 16-bit codes to 16 bits: written unchanged, no error at all
        data, subtype = rng.integers(-3000, 3000, (RATE, 2)).astype(np.int16), "PCM_16"
    else:
        data, subtype = 0.1 * rng.standard_normal(RATE), "FLOAT"
    src = tmp_path / "in.wav"
    sf.write(src, data, RATE, subtype=subtype)
    shaping = "hearing" if case == "mono-shaped" else "none"
    for ext in ("html", "md"):
        convert_file(src, tmp_path / f"o_{ext}.wav", Recipe(seed=4, shaping=shaping),
                     outputs=Outputs(report=tmp_path / f"r.{ext}"))
    html = (tmp_path / "r.html").read_text("utf-8")
    srcs = img_sources(html)
    assert len(srcs) >= 2
    for s in srcs:
        assert_valid_png(base64.b64decode(s.split(",", 1)[1]))
    assert "nan" not in re.sub(r"<[^>]*>", " ", html).split()
    md = (tmp_path / "r.md").read_text("utf-8")
    assert len(re.findall(r"!\[[^\]]*\]\(([^)\s]+)\)", md)) == len(srcs)
    leftovers = [n for n in os.listdir(tmp_path) if n.endswith(".requant-part")]
    assert leftovers == []


def test_picture_paths_sit_beside_the_report(tmp_path):
    paths = report_render.picture_paths(tmp_path / "my take.md")
    assert set(paths) == set(report_render.PICTURE_KINDS)
    for kind, p in paths.items():
        assert Path(p).parent == tmp_path
        assert Path(p).name == "my take" + report_render.PICTURE_KINDS[kind]
