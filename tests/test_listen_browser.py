"""The listening page in a real headless browser (Debian's chromium and chromium-driver,
driven by selenium through /usr/bin/chromedriver; no driver or browser downloads).

Loads OUTDIR/index.html from the file system, plays, switches A/B, answers blind trials by
clicking, exports the results, scores them with the CLI and checks that no script error
occurred. Skips only when chromium is not installed.
"""

import json
import os
import shutil
import subprocess
import tempfile
import time

import numpy as np
import pytest
import soundfile as sf

from requant.listening import make_listening_kit
from requant.recipe import Recipe

from helpers import cli_command

FS = 48000
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
CHROMEDRIVER = shutil.which("chromedriver") or "/usr/bin/chromedriver"

pytestmark = [pytest.mark.slow, pytest.mark.skipif(
    CHROMIUM is None,
    reason="chromium is not installed (apt-get install -y chromium chromium-driver); "
           "'make test' installs it",
)]

# Installed before the page's own scripts run: records uncaught errors and rejections.
ERROR_TRAP = """
window.__pageErrors = [];
window.addEventListener('error', function (e) {
  window.__pageErrors.push(String(e.message || e));
});
window.addEventListener('unhandledrejection', function (e) {
  window.__pageErrors.push('unhandled rejection: ' + String(e.reason));
});
"""


@pytest.fixture(scope="module")
def browser():
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        pytest.fail("chromium is installed but selenium is not: pip install selenium "
                    "(the test extra)")

    assert os.path.exists(CHROMEDRIVER), ("chromium is installed but chromedriver is not: "
                                          "apt-get install -y chromium-driver")
    profile = tempfile.mkdtemp(prefix="requant-chromium-")
    downloads = tempfile.mkdtemp(prefix="requant-downloads-")
    opts = webdriver.ChromeOptions()
    opts.binary_location = CHROMIUM
    for arg in ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                "--disable-background-networking", "--disable-component-update", "--disable-sync",
                f"--user-data-dir={profile}", "--autoplay-policy=no-user-gesture-required",
                "--mute-audio", "--window-size=1280,1600"):
        opts.add_argument(arg)
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    opts.add_experimental_option("prefs", {"download.default_directory": downloads,
                                           "download.prompt_for_download": False})
    driver = webdriver.Chrome(service=Service(CHROMEDRIVER), options=opts)
    driver.execute_cdp_cmd("Page.addScriptToEvaluateOnNewDocument", {"source": ERROR_TRAP})
    driver.downloads = downloads
    try:
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)
        shutil.rmtree(downloads, ignore_errors=True)


def wait_for(predicate, timeout=10.0, what="condition"):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        value = predicate()
        if value:
            return value
        time.sleep(0.05)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}")


def open_page(driver, folder):
    driver.get((folder / "index.html").as_uri())
    wait_for(lambda: driver.execute_script(
        "return document.getElementById('kit').getAttribute('data-ready') === '1'"),
        what="the page script to start")


def check_no_script_errors(driver):
    errors = driver.execute_script("return window.__pageErrors")
    assert errors == [], errors
    severe = [e for e in driver.get_log("browser") if e.get("level") == "SEVERE"]
    assert severe == [], severe


def audio_state(driver, el_id):
    return driver.execute_script(
        "var a = document.getElementById(arguments[0]);"
        "return {t: a.currentTime, paused: a.paused, src: a.currentSrc,"
        " err: a.error && a.error.code};",
        el_id)


def click(driver, css):
    driver.find_element("css selector", css).click()


@pytest.fixture(scope="module")
def kit(tmp_path_factory):
    d = tmp_path_factory.mktemp("browserkit")
    rng = np.random.default_rng(20)
    t = np.arange(int(3.0 * FS)) / FS
    env = np.where(t < 1.5, 1.0, 10 ** (-100 * (t - 1.5) / 1.5 / 20))
    x = 0.3 * env * np.sin(2 * np.pi * 440 * t + rng.uniform(0, 6.28))
    src = d / "tone.wav"
    sf.write(src, np.stack([x, 0.8 * x], axis=1), FS, subtype="FLOAT")
    out = d / "kit"
    make_listening_kit(src, out, recipe=Recipe(bits=12, seed=9), quiet=0.5, methods=["truncate",
                                                                                     "tpdf+hearing"])
    return out


def test_page_plays_runs_blind_trials_exports_and_scores(browser, kit, tmp_path):
    open_page(browser, kit)
    caution = browser.find_element("id", "caution")
    assert caution.is_displayed() and "low volume" in caution.text
    assert browser.execute_script("return document.getElementById('volume').value") == "20"

    # open A/B: play the original, then switch to the render at the same position
    click(browser, "#card-m1 button[data-play='au-original']")
    wait_for(lambda: audio_state(browser, "au-original")["t"] > 0.2, what="the original to play")
    assert not audio_state(browser, "au-original")["paused"]
    t_before = audio_state(browser, "au-original")["t"]
    click(browser, "#card-m1 button[data-play='au-m1']")
    wait_for(lambda: not audio_state(browser, "au-m1")["paused"], what="the render to play")
    assert audio_state(browser, "au-original")["paused"]
    assert audio_state(browser, "au-m1")["t"] >= t_before - 0.05  # position kept
    click(browser, "#card-m1 button[data-play='au-m1-error']")
    wait_for(lambda: audio_state(browser, "au-m1-error")["t"] > 0, what="the error render")
    click(browser, "#card-m1 button[data-stop]")
    assert audio_state(browser, "au-m1-error")["paused"]

    # blind trials: answer right except where planned otherwise, by clicking
    from selenium.webdriver.support.ui import Select

    plan = [("m1", True), ("m1", True), ("m1", False), ("m1", True), ("m1", True),
            ("m1", True), ("m2q", False), ("m2q", True)]
    select = Select(browser.find_element("id", "trial-comparison"))
    seen_x = []
    for i, (cid, right) in enumerate(plan):
        select.select_by_value(cid)
        click(browser, "#trial-new")
        click(browser, "#trial-play-x")
        if i == 0:
            wait_for(lambda: audio_state(browser, "au-tx")["t"] > 0, what="X to play")
        click(browser, "#trial-play-a")
        x_src = audio_state(browser, "au-tx")["src"]
        x_is_a = x_src == audio_state(browser, "au-ta")["src"]
        assert x_is_a or x_src == audio_state(browser, "au-tb")["src"]
        seen_x.append("A" if x_is_a else "B")
        answer = ("A" if x_is_a else "B") if right else ("B" if x_is_a else "A")
        click(browser, f"#answer-{answer.lower()}")
        feedback = browser.find_element("id", "trial-feedback").text
        assert feedback.startswith("Right" if right else "Not this time")
        assert browser.find_element("id", "answer-a").get_attribute("disabled") is not None

    # the page's own score table: 5 of 6, and 1 of 2
    rows = {r.get_attribute("data-comparison"): [td.text for td in
                                                 r.find_elements("css selector", "td")]
            for r in browser.find_elements("css selector", "#score-body tr")}
    assert rows["m1"][1:3] == ["5", "6"] and rows["m2q"][1:3] == ["1", "2"]
    from scipy.stats import binomtest

    # scipy.stats.binomtest as the reference for the page's own p-value
    assert float(rows["m1"][3]) == pytest.approx(
        binomtest(5, 6, 0.5, alternative="greater").pvalue, rel=1e-3)

    # export: a real download, and the same JSON in the page
    click(browser, "#export")
    path = os.path.join(browser.downloads, "requant-listening-results.json")
    wait_for(lambda: os.path.exists(path) and os.path.getsize(path) > 0, what="the download")
    saved = json.loads(open(path, encoding="utf-8").read())
    shown = json.loads(browser.execute_script(
        "return document.getElementById('results-json').value"))
    assert saved == shown
    assert [t["x"] for t in saved["trials"]] == seen_x
    assert saved["format"] == "requant-listening-results" and len(saved["trials"]) == 8

    # score it with the command line
    proc = subprocess.run(cli_command("score", path), capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 0, proc.stderr
    lines = proc.stdout.splitlines()
    m1 = next(ln for ln in lines if ln.startswith("original vs truncate:"))
    assert "5/6 correct" in m1
    assert float(m1.split("p = ")[1]) == pytest.approx(7 / 64, rel=1e-3)  # (6 + 1)/2^6
    q = next(ln for ln in lines if ln.startswith("original vs tpdf+hearing, quiet passage"))
    assert "1/2 correct" in q and float(q.split("p = ")[1]) == pytest.approx(0.75)

    check_no_script_errors(browser)


def test_trials_pick_x_at_random(browser, kit):
    # The page's coin is the browser's crypto generator, deliberately unseeded (a blind trial
    # must not be predictable). 40 trials all landing on one side has chance 2^-39.
    open_page(browser, kit)
    xs = browser.execute_script("""
        var out = [];
        for (var i = 0; i < 40; i++) {
          document.getElementById('trial-new').click();
          var x = document.getElementById('au-tx').src;
          out.push(x === document.getElementById('au-ta').src ? 'A' : 'B');
          document.getElementById('answer-a').click();
        }
        return out;""")
    assert set(xs) == {"A", "B"}
    check_no_script_errors(browser)


def test_hostile_name_shown_as_text_in_browser(browser, tmp_path):
    name = "<b>take&1 \"quoted\" 'single'.wav"
    src = tmp_path / name
    t = np.arange(int(0.6 * FS)) / FS
    sf.write(src, 0.2 * np.sin(2 * np.pi * 330 * t), FS, subtype="FLOAT")
    make_listening_kit(src, tmp_path / "k", recipe=Recipe(seed=2), methods=["tpdf"])
    open_page(browser, tmp_path / "k")
    assert browser.find_element("id", "source-name").text == name
    assert browser.execute_script("return document.querySelectorAll('b').length") == 0
    assert name in browser.title
    assert browser.execute_script(
        "return JSON.parse(document.getElementById('kit').getAttribute('data-kit')).source.name"
    ) == name
    check_no_script_errors(browser)


def test_missing_render_is_reported_not_thrown(browser, tmp_path, kit):
    # a kit folder with one render deleted: the page says so instead of failing
    broken = tmp_path / "broken"
    shutil.copytree(kit, broken)
    os.remove(broken / "m1_truncate.wav")
    open_page(browser, broken)
    click(browser, "#card-m1 button[data-play='au-m1']")
    status = wait_for(lambda: "m1_truncate.wav" in browser.find_element("id", "status").text
                      and browser.find_element("id", "status").text, what="the load message")
    assert "Could not load" in status or "did not start" in status
    assert browser.execute_script("return window.__pageErrors") == []
    browser.get_log("browser")  # the browser's own note on the missing file is expected here
