"""The listening page in a real browser: Debian's chromium driven by Selenium.

The driver is the system's ``/usr/bin/chromedriver``, given explicitly, so nothing is
downloaded; ``.ci/run`` installs ``chromium`` and ``chromium-driver``. The tests skip,
saying why, only where those two programs are missing.
"""

from __future__ import annotations

import json
import shutil
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from listenkit import make_listen_kit

from pipeline.listen import load_picks
from pipeline.listen.server import ListenServer

pytestmark = pytest.mark.slow

CHROMEDRIVER = "/usr/bin/chromedriver"
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.fixture(scope="module")
def kit(tmp_path_factory):
    return make_listen_kit(tmp_path_factory.mktemp("listen-browser"))


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    if CHROMIUM is None or not Path(CHROMEDRIVER).is_file():
        pytest.skip("needs Debian's chromium and chromium-driver "
                    "(apt-get install chromium chromium-driver; .ci/run installs them)")
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    opts = webdriver.ChromeOptions()
    opts.binary_location = CHROMIUM
    for flag in ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                 "--no-first-run", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--window-size=1400,1000",
                 f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}"):
        opts.add_argument(flag)
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(executable_path=CHROMEDRIVER), options=opts)
    driver.set_page_load_timeout(60)
    yield driver
    driver.quit()


def _wait(predicate, what: str, timeout: float = 30.0):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        value = predicate()
        if value:
            return value
        time.sleep(0.1)
    raise AssertionError(f"timed out waiting for {what}")


def _open(driver, srv: ListenServer) -> None:
    driver.get(srv.url)
    _wait(lambda: driver.execute_script("return document.body.dataset.ready === 'true'"),
          "the page to load its sounds")


def _press(driver, *keys: str) -> None:
    from selenium.webdriver.common.action_chains import ActionChains

    ActionChains(driver).send_keys(*keys).perform()


def _card_state(driver, card_id: str) -> dict:
    return driver.execute_script(
        "const li = document.querySelector(`li[data-id=\"${arguments[0]}\"]`);"
        "return {mark: li.dataset.mark, text: li.querySelector('.mark').textContent,"
        " volume: li.querySelector('audio').volume};", card_id)


def test_page_plays_marks_and_matches_loudness(kit, browser, tmp_path):
    from selenium.webdriver.common.keys import Keys

    srv = ListenServer([kit.long, kit.short], bank=kit.bank)
    srv.start()
    try:
        _open(browser, srv)
        sounds = srv.records()["sounds"]
        ids = browser.execute_script(
            "return [...document.querySelectorAll('#sounds > li')].map(li => li.dataset.id)")
        assert ids == [s["id"] for s in sounds] and len(ids) == 12

        # every card's audio element decodes, to the WAV's own duration (within 10 ms)
        durations = _wait(lambda: browser.execute_script(
            "const a = [...document.querySelectorAll('#sounds audio')];"
            "return a.every(x => x.readyState >= 1) ? a.map(x => x.duration) : null;"),
            "every audio element's metadata")
        roots = {0: kit.long, 1: kit.short}
        for s, seen in zip(sounds, durations):
            info = sf.info(str(roots[s["folder"]] / s["file"]))
            assert abs(seen - info.frames / info.samplerate) <= 0.010, (s["file"], seen)

        # thumbnails in view have loaded
        assert browser.execute_script(
            "const i = document.querySelector('#sounds img'); return i.complete && i.naturalWidth")

        # space plays the current (first) card and stops it
        first_audio = "return document.querySelector('#sounds audio')"
        _press(browser, " ")
        _wait(lambda: browser.execute_script(first_audio + ".currentTime > 0.05"), "playback")
        _press(browser, " ")
        _wait(lambda: browser.execute_script(first_audio + ".paused"), "space to stop it")

        # keyboard: the first card is current; down, k keeps the second; down, x, then u
        _press(browser, Keys.ARROW_DOWN, "k")
        second, third = sounds[1], sounds[2]
        _wait(lambda: load_picks(kit.long).get(second["file"]) == "keep", "k to save a keep")
        _wait(lambda: _card_state(browser, second["id"])["text"] == "Mark: kept", "the card")
        _press(browser, Keys.ARROW_DOWN, "x")
        _wait(lambda: load_picks(kit.long).get(third["file"]) == "reject", "x to save a reject")
        _press(browser, "u")
        _wait(lambda: third["file"] not in load_picks(kit.long), "u to clear the mark")
        _wait(lambda: _card_state(browser, third["id"])["text"] == "Mark: none", "the card")
        picks = json.loads((kit.long / "picks.json").read_text())
        assert set(picks["picks"]) == {second["file"]}

        # loudness matching: a card turned down plays at 10^(gain/20); switched off, at 1
        loud = min(sounds, key=lambda s: s["gain_db"])
        assert loud["gain_db"] < -1.0
        on = _card_state(browser, loud["id"])["volume"]
        assert on == pytest.approx(10 ** (loud["gain_db"] / 20), abs=1e-3)
        browser.find_element("id", "match").click()
        assert _card_state(browser, loud["id"])["volume"] == 1.0
        browser.find_element("id", "match").click()
        assert _card_state(browser, loud["id"])["volume"] == pytest.approx(on)

        # n: the nearest training sound of the current card loads, as the bank's clip
        _press(browser, "n")
        ref = _wait(lambda: browser.execute_script(
            "const r = document.getElementById('reference');"
            "return r.src && r.readyState >= 1 ? [r.src, r.duration] : null;"),
            "the nearest training sound to load")
        near = third["nearest"]["name"]
        assert f"/reference/{near}?token=" in ref[0]
        assert ref[1] == pytest.approx(0.5, abs=0.010)  # the tiny preset's clip length

        # filters and order
        from selenium.webdriver.support.ui import Select

        Select(browser.find_element("id", "f-kind")).select_by_value("vary")
        shown = browser.execute_script(
            "return [...document.querySelectorAll('#sounds > li:not([hidden])')]"
            ".map(li => li.dataset.id)")
        assert shown == [s["id"] for s in sounds if s["kind"] == "vary"]
        Select(browser.find_element("id", "f-kind")).select_by_value("")
        Select(browser.find_element("id", "f-sort")).select_by_value("near")
        first = browser.execute_script("return document.querySelector('#sounds > li').dataset.id")
        assert first == min(sounds, key=lambda s: s["nearest"]["distance_ratio"])["id"]
        Select(browser.find_element("id", "f-mark")).select_by_value("keep")
        assert browser.execute_script(
            "return [...document.querySelectorAll('#sounds > li:not([hidden])')]"
            ".map(li => li.dataset.id)") == [second["id"]]
        Select(browser.find_element("id", "f-mark")).select_by_value("")
        Select(browser.find_element("id", "f-sort")).select_by_value("file")

        # the near-copy is flagged in words, and padded loudness is said in words
        page = browser.find_element("tag name", "main").text
        assert "Near-copy" in page and "padded with silence to 400 ms" in page

        # everything came from this server; the page logged no errors (CSP included)
        origins = browser.execute_script(
            "return performance.getEntriesByType('resource').map(e => new URL(e.name).origin)")
        assert set(origins) == {f"http://127.0.0.1:{srv.port}"}
        severe = [e for e in browser.get_log("browser") if e["level"] == "SEVERE"]
        assert not severe, severe

        shot = tmp_path / "listen-page.png"
        browser.save_screenshot(str(shot))
        print(f"screenshot of the listening page: {shot}")
        _assert_not_blank(shot)
    finally:
        srv.stop()

    # a second session shows the same marks
    again = ListenServer([kit.long, kit.short], bank=kit.bank)
    again.start()
    try:
        _open(browser, again)
        assert _card_state(browser, second["id"])["mark"] == "keep"
        assert _card_state(browser, third["id"])["mark"] == ""
    finally:
        again.stop()


def _assert_not_blank(png: Path) -> None:
    from matplotlib.image import imread

    img = imread(str(png))[..., :3]
    assert img.shape[0] > 400 and img.shape[1] > 600
    colours = np.unique((img * 255).astype(np.uint8).reshape(-1, 3), axis=0)
    assert len(colours) > 200, f"{png}: only {len(colours)} colours"
    assert float(img.std()) > 0.05, f"{png}: nearly uniform"


def test_page_without_token_is_refused(kit, browser):
    srv = ListenServer([kit.long])
    srv.start()
    try:
        browser.get(srv.url.split("?")[0])
        assert "forbidden" in browser.find_element("tag name", "body").text
        assert not browser.find_elements("id", "sounds")
    finally:
        srv.stop()
