"""The listening page in a real browser (headless Chromium driven by Selenium).

Skipped, with the reason, when Chromium, chromedriver or selenium is missing (see the
``browser`` fixture in conftest.py); CI installs them (.ci/run).
"""

import json
import time

import numpy as np
import pytest
from click.testing import CliRunner

from audiodsm.cli import main
from audiodsm.evaluate.listening import ANSWERS_FORMAT, PAGE_NAME, key_path_for, make_listening_set
from audiodsm.io import write_audio_atomic

RATE = 48000
TRIALS = 4


@pytest.fixture
def listening_set(tmp_path):
    t = np.arange(RATE) / RATE
    x = 0.2 * np.sin(2 * np.pi * 440 * t) * (0.6 + 0.4 * np.sin(2 * np.pi * 2 * t))
    rng = np.random.default_rng(11)
    src = tmp_path / "src"
    src.mkdir()
    inp = write_audio_atomic(src / "tone.wav", x, RATE, subtype="FLOAT")
    a = write_audio_atomic(
        src / "tone.one.listen.wav", x + 1e-3 * rng.standard_normal(x.size), RATE, subtype="FLOAT"
    )
    b = write_audio_atomic(
        src / "tone.two.listen.wav", x + 3e-3 * rng.standard_normal(x.size), RATE, subtype="FLOAT"
    )
    folder = tmp_path / "set"
    make_listening_set([a, b], [inp], folder, trials_per_pair=TRIALS, seed=3)
    return folder


def wait_for(driver, script, timeout=20.0):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        value = driver.execute_script(script)
        if value:
            return value
        time.sleep(0.1)
    raise AssertionError(f"timed out waiting for: {script}")


def test_page_plays_a_trial_answers_and_saves_without_the_key(browser, listening_set):
    folder = listening_set
    key = json.loads(key_path_for(folder).read_text())
    browser.get((folder / PAGE_NAME).as_uri())
    by_id = browser.find_element

    # before the caution is acknowledged nothing can play; the level starts low
    assert by_id("id", "caution").is_displayed()
    assert "tweeters" in by_id("id", "caution").text
    assert not by_id("id", "play").is_enabled()
    assert int(by_id("id", "level").get_attribute("value")) <= -20
    assert browser.execute_script("return audiodsmPage.playing()") is False
    assert not browser.find_elements("css selector", "audio[autoplay], video[autoplay]")
    by_id("id", "caution-ok").click()
    assert by_id("id", "play").is_enabled()

    # blind trials: play A, switch to X while playing (same position, still playing)
    by_id("id", "mode-trials").click()
    by_id("id", "play").click()
    wait_for(browser, "return audiodsmPage.playing() && audiodsmPage.contextTime() > 0.3")
    assert browser.execute_script("return audiodsmPage.loadedClips()") >= 3
    assert by_id("id", "trial-about").text == "A = tone.one, B = tone.two; input: tone.wav"
    by_id("id", "hear-X").click()
    assert browser.execute_script("return audiodsmPage.selected()") == "t01"
    t0 = browser.execute_script("return audiodsmPage.contextTime()")
    wait_for(browser, f"return audiodsmPage.contextTime() > {t0} + 0.2")
    assert browser.execute_script("return audiodsmPage.playing()") is True

    # answer every trial with "A", then save (offered only when all are answered)
    assert not by_id("id", "save-answers").is_displayed()
    for _ in range(TRIALS):
        by_id("id", "answer-A").click()
    wait_for(browser, "return !document.getElementById('trials-done').hidden")
    by_id("id", "save-answers").click()
    downloads = browser.download_dir
    saved = wait_for(
        browser,
        "return window.audiodsmSavedAnswers || null",
    )
    end = time.monotonic() + 20
    while time.monotonic() < end and not list(downloads.glob("answers-*.json")):
        time.sleep(0.1)
    files = list(downloads.glob("answers-*.json"))
    text = files[0].read_text() if files else saved  # the page's own copy if none landed
    assert text == saved
    doc = json.loads(text)
    assert doc["format"] == ANSWERS_FORMAT and doc["set_id"] == key["set_id"]
    assert doc["answers"] == [{"trial": t["trial"], "answer": "A"} for t in key["trials"]]

    # the page never held the key: not in its DOM, not in the answers
    dom = browser.execute_script("return document.documentElement.outerHTML")
    for secret in ("x_is", key_path_for(folder).name, '"seed"'):
        assert secret not in dom and secret not in text
    pages = [folder / PAGE_NAME, folder / "summary.json", *(folder / "page").glob("*.*")]
    assert all("x_is" not in f.read_text() for f in pages)

    # and the saved file scores against the key
    answers = folder.parent / "answers.json"
    answers.write_text(text)
    r = CliRunner().invoke(
        main, ["score-answers", str(answers), "--key", str(key_path_for(folder)), "--json"]
    )
    assert r.exit_code == 0, r.output
    pair = json.loads(r.output)["pairs"][0]
    assert pair["trials"] == TRIALS
    assert pair["correct"] == sum(t["x_is"] == "A" for t in key["trials"])


def test_open_comparison_switches_at_the_same_position(browser, listening_set):
    browser.get((listening_set / PAGE_NAME).as_uri())
    browser.find_element("id", "caution-ok").click()
    browser.find_element("id", "play").click()
    wait_for(browser, "return audiodsmPage.playing() && audiodsmPage.contextTime() > 0.3")
    ids = browser.execute_script(
        "return JSON.parse(document.getElementById('manifest').textContent)"
        ".inputs[0].clips.map(c => c.id)"
    )
    assert len(ids) == 3
    # switching moves only the gains: playback continues, the position is not reset
    before = browser.execute_script("return audiodsmPage.position()")
    browser.find_element("id", f"pick-{ids[2]}").click()
    after = browser.execute_script("return audiodsmPage.position()")
    assert browser.execute_script("return audiodsmPage.selected()") == ids[2]
    assert browser.execute_script("return audiodsmPage.playing()") is True
    assert 0.0 <= after - before < 0.5 or after < before  # continued (or wrapped round the loop)
    # seeking: stopped, the slider sets the position; playing resumes from there
    browser.find_element("id", "stop").click()
    p0 = browser.execute_script("return audiodsmPage.position()")
    target = round(((p0 + 0.5) % 1.0) * 1000)
    browser.execute_script(
        f"const p = document.getElementById('position'); p.value = '{target}';"
        "p.dispatchEvent(new Event('change'));"
    )
    assert browser.execute_script("return audiodsmPage.position()") == pytest.approx(
        target / 1000, abs=0.002
    )
    browser.find_element("id", "play").click()
    wait_for(browser, "return audiodsmPage.playing()")
    moved = (browser.execute_script("return audiodsmPage.position()") - target / 1000) % 1.0
    assert moved < 0.3
    assert browser.execute_script("return audiodsmPage.selected()") == ids[2]
    # spectrogram pictures are shown, one per clip
    imgs = browser.find_elements("css selector", ".pictures img")
    assert len(imgs) == 3
    assert all(browser.execute_script("return arguments[0].naturalWidth", i) > 100 for i in imgs)
    browser.find_element("id", "stop").click()
    assert browser.execute_script("return audiodsmPage.playing()") is False
