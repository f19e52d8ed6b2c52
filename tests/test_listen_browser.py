"""The listening page in a real headless browser (Debian's chromium and chromium-driver,
driven by selenium through /usr/bin/chromedriver; no driver or browser downloads).

Loads OUTDIR/index.html from the file system; plays every player of every comparison and
checks the loudness of what it plays (the rendered file and the page's playback gain)
against the 1 dB rule, that switching keeps the position and crossfades, the loop, seek and
keyboard controls; runs a blind method-against-method session with hidden answers, saves
it, and scores it with the CLI, seed exact. Checks that no script error occurred. Skips only
when chromium is not installed.
"""

import json
import os
import shutil
import subprocess
import tempfile
import time
from urllib.parse import unquote

import numpy as np
import pytest
import soundfile as sf

from requant.listening import make_listening_kit
from requant.recipe import Recipe

from helpers import cli_command, played_level

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


def click(driver, css):
    driver.find_element("css selector", css).click()


SEED = 4778606049103618758  # above 2^53: a JavaScript number would round it


@pytest.fixture(scope="module")
def kit(tmp_path_factory):
    """A 4-bit kit (so that some renders need a playback gain), three methods, one pair
    and a quiet passage."""
    d = tmp_path_factory.mktemp("browserkit")
    rng = np.random.default_rng(20)
    t = np.arange(int(3.0 * FS)) / FS
    env = np.where(t < 1.5, 1.0, 10 ** (-100 * (t - 1.5) / 1.5 / 20))
    x = 0.3 * env * np.sin(2 * np.pi * 440 * t + rng.uniform(0, 6.28))
    src = d / "tone.wav"
    sf.write(src, np.stack([x, 0.8 * x], axis=1), FS, subtype="FLOAT")
    out = d / "kit"
    make_listening_kit(src, out, recipe=Recipe(bits=4, seed=SEED), quiet=0.5,
                       methods=["truncate", "tpdf", "tpdf+hearing"], pairs=["tpdf,tpdf+hearing"])
    return out


def figures_of(kit):
    return json.loads((kit / "figures.json").read_text(encoding="utf-8"))


def page_volume(driver):
    return driver.execute_script("return Number(document.getElementById('volume').value) / 100")


def settled(driver, el_id, gain):
    """The element plays and its fade is done: volume = page volume x its gain."""
    s = audio_state(driver, el_id)
    want = page_volume(driver) * gain
    return (not s["paused"] and s["t"] > 0 and abs(s["vol"] - want) < 1e-6) and s


def audio_state(driver, el_id):
    return driver.execute_script(
        "var a = document.getElementById(arguments[0]);"
        "return {t: a.currentTime, paused: a.paused, src: a.currentSrc, vol: a.volume,"
        " err: a.error && a.error.code};",
        el_id)


def test_every_player_is_within_1_db_or_says_so_and_switching_keeps_position(browser, kit):
    # Issue 22: within one comparison every player plays within 1 dB of the others (ITU-R
    # BS.1770-4 loudness by pyloudnorm, the reference library, of the file the player
    # plays, plus the page's playback gain read from the element's volume), or its button
    # states the difference before it plays and the switch fades.
    figures = figures_of(kit)
    open_page(browser, kit)
    stated_ms = 1000 * figures["loudness"]["stated_fade_s"]
    short_ms = 1000 * figures["loudness"]["crossfade_s"]
    turned_down = 0
    for c in figures["comparisons"]:
        deck = f"[data-deck='{c['id']}']"
        played = {}
        previous = None
        for i, row in enumerate(c["players"]):
            button = browser.find_element("css selector",
                                          f"{deck} .players button[data-index='{i}']")
            note = button.find_element("css selector", "[data-level]")
            assert note.is_displayed() and note.text.strip()  # stated before it plays
            if row["state"] == "stated":
                assert "this one is" in note.text and "warn" in note.get_attribute("class")
            t_before = audio_state(browser, previous)["t"] if previous else 0.0
            button.click()
            el_id = button.get_attribute("data-audio")
            gain = 10 ** (row["gain_db"] / 20)
            s = wait_for(lambda el_id=el_id, gain=gain: settled(browser, el_id, gain),
                         timeout=15, what=f"{c['id']} player {i} to play at its level")
            name = unquote(os.path.basename(s["src"]))
            assert name == figures["players"][row["player"]]["file"]
            level = played_level(kit / name,
                                 20 * np.log10(s["vol"] / page_volume(browser)), c["measure"])
            played[row["player"]] = (level, row["state"])
            if previous:
                # switching keeps the position: the new player starts where the old one was
                switch_at = float(browser.execute_script(
                    "return document.getElementById('kit').getAttribute('data-last-switch-at')"))
                assert t_before - 0.01 <= switch_at <= t_before + 0.25, (t_before, switch_at)
                assert audio_state(browser, previous)["paused"]
                fade_ms = float(browser.execute_script(
                    "return document.getElementById('kit').getAttribute('data-last-fade-ms')"))
                stated = row["state"] != "matched" or c["players"][i - 1]["state"] != "matched"
                assert fade_ms == (stated_ms if stated else short_ms)
            previous = el_id
            turned_down += row["gain_db"] < 0
        matched = [lv for lv, state in played.values() if state == "matched"]
        assert max(matched) - min(matched) <= 1.0, (c["id"], played)
        click(browser, f"{deck} [data-act='stop']")
    assert turned_down >= 1  # at 4 bits the hearing-shaped render needs it
    check_no_script_errors(browser)


def test_switch_crossfades(browser, kit):
    # A/B switching at the same position without a click: both players sound for the
    # short crossfade, one falling while the other rises, instead of a cut.
    open_page(browser, kit)
    click(browser, "#card-m2 .players button[data-index='0']")
    wait_for(lambda: settled(browser, "au-original", 1.0), what="the original to play")
    browser.set_script_timeout(10)
    trace = browser.execute_async_script("""
        var done = arguments[arguments.length - 1];
        var a = document.getElementById('au-original'), b = document.getElementById('au-m2');
        var out = [];
        document.querySelector("#card-m2 .players button[data-index='1']").click();
        var t0 = performance.now();
        var timer = setInterval(function () {
          out.push([a.volume, b.volume]);
          if (performance.now() - t0 > 150) { clearInterval(timer); done(out); }
        }, 2);""")
    m2 = next(c for c in figures_of(kit)["comparisons"] if c["id"] == "m2")
    full = page_volume(browser)
    full_b = full * 10 ** (m2["players"][1]["gain_db"] / 20)
    middle = [(x, y) for x, y in trace if 0.05 * full < x < 0.95 * full
              and 0.05 * full_b < y < 0.95 * full_b]
    assert middle, trace  # an overlap, not a cut
    assert trace[-1][0] == 0 and trace[-1][1] == pytest.approx(full_b, abs=1e-6)
    falls = [x for x, _ in trace]
    assert all(b <= a + 1e-9 for a, b in zip(falls, falls[1:]))  # the old one only falls
    check_no_script_errors(browser)


def test_loop_seek_and_keys(browser, kit):
    open_page(browser, kit)
    deck = "[data-deck='m1']"
    click(browser, f"{deck} .players button[data-index='1']")
    wait_for(lambda: audio_state(browser, "au-m1")["t"] > 0.1, what="the render to play")
    # seek with the slider
    browser.execute_script("""
        var s = document.querySelector(arguments[0] + " [data-act='seek']");
        s.value = '2.0'; s.dispatchEvent(new Event('input'));""", deck)
    wait_for(lambda: 1.95 <= audio_state(browser, "au-m1")["t"] <= 2.4, what="the seek")
    # loop 0.5 s to 1.0 s: the position stays inside for two seconds of playing
    browser.execute_script("""
        var d = document.querySelector(arguments[0]);
        d.querySelector("[data-act='loop-a']").value = '0.5';
        d.querySelector("[data-act='loop-b']").value = '1.0';
        var box = d.querySelector("[data-act='loop']");
        box.checked = true; box.dispatchEvent(new Event('change'));""", deck)
    wait_for(lambda: 0.5 <= audio_state(browser, "au-m1")["t"] <= 1.0, what="the loop")
    seen = []
    end = time.monotonic() + 2.0
    while time.monotonic() < end:
        seen.append(audio_state(browser, "au-m1")["t"])
        time.sleep(0.03)
    assert min(seen) >= 0.45 and max(seen) <= 1.08, (min(seen), max(seen))
    assert max(seen) - min(seen) > 0.3  # it plays on, round the loop
    # keys: 1 switches to the original at the same place, Space pauses, l ends the loop
    from selenium.webdriver.common.keys import Keys

    body = browser.find_element("tag name", "body")
    body.send_keys("1")
    wait_for(lambda: not audio_state(browser, "au-original")["paused"], what="key 1")
    assert 0.45 <= audio_state(browser, "au-original")["t"] <= 1.1
    body.send_keys("l")
    body.send_keys(Keys.SPACE)
    wait_for(lambda: audio_state(browser, "au-original")["paused"], what="Space to pause")
    check_no_script_errors(browser)


def test_blind_method_session_hidden_saved_and_scored_exactly(browser, kit, tmp_path):
    # Blind trials between two methods (tpdf against tpdf+hearing), answers and score hidden
    # until the session ends, driven partly from the keyboard; the saved file keeps the
    # 64-bit seed exactly and requant score reads it back.
    from selenium.webdriver.common.keys import Keys
    from selenium.webdriver.support.ui import Select

    for old in os.listdir(browser.downloads):
        os.remove(os.path.join(browser.downloads, old))
    open_page(browser, kit)
    click(browser, "#hide-answers")
    browser.execute_script("var n = document.getElementById('planned-trials'); n.value = '6';"
                           "n.dispatchEvent(new Event('change'));")
    Select(browser.find_element("id", "trial-comparison")).select_by_value("p1")
    body = browser.find_element("tag name", "body")
    plan = [True, True, False, True, True, True]
    seen_x = []
    for i, right in enumerate(plan):
        if i % 2:
            body.send_keys("n")  # new trial
            body.send_keys("x")  # play X
        else:
            click(browser, "#trial-new")
            click(browser, "#trial-play-x")
        wait_for(lambda: not audio_state(browser, "au-tx")["paused"], what="X to play")
        t_x = audio_state(browser, "au-tx")["t"]
        body.send_keys("a")  # A, at the same position
        wait_for(lambda: not audio_state(browser, "au-ta")["paused"], what="A to play")
        assert audio_state(browser, "au-ta")["t"] >= t_x - 0.02
        x_is_a = audio_state(browser, "au-tx")["src"] == audio_state(browser, "au-ta")["src"]
        seen_x.append("A" if x_is_a else "B")
        answer = ("A" if x_is_a else "B") if right else ("B" if x_is_a else "A")
        if i % 2:
            body.send_keys(Keys.SHIFT, answer.lower())
        else:
            click(browser, f"#answer-{answer.lower()}")
        feedback = browser.find_element("id", "trial-feedback").text
        if i < len(plan) - 1:
            # hidden: no right or wrong, no score, no saving yet
            assert "recorded" in feedback and "Right" not in feedback and "Not this" not in feedback
            assert not browser.find_element("id", "score").is_displayed()
            assert browser.find_element("id", "export").get_attribute("disabled") is not None
    # the sixth answer ends the session: everything is shown
    assert "Session ended" in browser.find_element("id", "trial-feedback").text
    row = browser.find_element("css selector", "#score-body tr[data-comparison='p1']")
    cells = [td.text for td in row.find_elements("css selector", "td")]
    assert cells[:3] == ["tpdf vs tpdf+hearing", "5", "6"]

    click(browser, "#export")
    path = os.path.join(browser.downloads, "requant-listening-results.json")
    wait_for(lambda: os.path.exists(path) and os.path.getsize(path) > 0, what="the download")
    raw = open(path, encoding="utf-8").read()
    saved = json.loads(raw)
    assert f'"seed": "{SEED}"' in raw and saved["kit"]["seed"] == str(SEED)
    assert [t["x"] for t in saved["trials"]] == seen_x
    assert saved["session"] == {"hide_answers": True, "planned_trials": 6, "answered": 6,
                                "ended": True}
    assert all(t["comparison"] == "p1" for t in saved["trials"])
    proc = subprocess.run(cli_command("score", path), capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert f"seed {SEED}" in proc.stdout and "older page" not in proc.stdout
    line = next(ln for ln in proc.stdout.splitlines() if ln.startswith("tpdf vs tpdf+hearing:"))
    assert "5/6 correct" in line
    assert float(line.split("p = ")[1]) == pytest.approx(7 / 64, rel=1e-3)  # (6 + 1)/2^6
    check_no_script_errors(browser)


def test_trials_pick_x_at_random(browser, kit):
    # The page's coin is the browser's crypto generator, deliberately unseeded (a blind trial
    # must not be predictable). 40 trials all landing on one side has chance 2^-39.
    open_page(browser, kit)
    xs = browser.execute_script("""
        var out = [];
        document.getElementById('planned-trials').value = '100';
        document.getElementById('planned-trials').dispatchEvent(new Event('change'));
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
    click(browser, "#card-m1 .players button[data-index='1']")
    status = wait_for(lambda: "m1_truncate.wav" in browser.find_element("id", "status").text
                      and browser.find_element("id", "status").text, what="the load message")
    assert "Could not load" in status or "did not start" in status
    assert browser.execute_script("return window.__pageErrors") == []
    browser.get_log("browser")  # the browser's own note on the missing file is expected here
