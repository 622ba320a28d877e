"""The review page driven with the keyboard in a real headless Chromium (Debian's chromium with
chromium-driver, through selenium): decide, undo, re-run, and check the decisions file and the
re-run manifest; screenshots at phone and desktop width."""

from __future__ import annotations

import shutil
import threading
import time

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from conftest import encode, textured
from labelprep import decisions, manifest
from labelprep.pipeline import prepare
from labelprep.reviews import make_server
from test_report_browser import BROWSER, FLAGS
from test_review_server import make_tree

pytestmark = pytest.mark.browser

DRIVER = shutil.which("chromedriver") or shutil.which("chromium-driver")
try:
    from selenium import webdriver
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys
except ImportError:  # the test extra installs it
    webdriver = None
needs_driver = pytest.mark.skipif(
    BROWSER is None or DRIVER is None or webdriver is None,
    reason="needs Chromium, chromedriver (Debian: apt-get install -y chromium chromium-driver) and "
           "selenium (pip install -e '.[test]'); the page was not driven")


def _open(tmp_path):
    """A review server over ``tmp_path/out`` and a headless Chromium showing its page."""
    server = make_server(tmp_path / "out")
    threading.Thread(target=server.serve_forever, daemon=True).start()
    options = webdriver.ChromeOptions()
    options.binary_location = BROWSER
    for flag in FLAGS:
        if not flag.startswith(("--enable-logging", "--v=")):
            options.add_argument(flag)
    options.add_argument(f"--user-data-dir={tmp_path / 'profile'}")
    options.add_argument("--window-size=1200,900")
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(options=options, service=webdriver.ChromeService(executable_path=DRIVER))
    driver.get(server.url)
    wait_for(driver, lambda d: "ready" in d.find_element(By.ID, "status").text)
    return driver, server


@pytest.fixture
def page(tmp_path):
    prepare(make_tree(tmp_path / "photos"), tmp_path / "out", jobs=1, seed=1)
    driver, server = _open(tmp_path)
    try:
        yield driver, server
    finally:
        driver.quit()
        server.shutdown()
        server.server_close()


def wait_for(driver, condition, timeout=30.0):
    """Poll ``condition(driver)`` until true; generous, as the machine may be loaded."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        try:
            if condition(driver):
                return
        except Exception:  # noqa: BLE001 - the page may be re-rendering between two reads
            pass
        time.sleep(0.1)
    raise AssertionError(f"page never reached the state; status: {driver.find_element(By.ID, 'status').text}")


def press(driver, *keys):
    body = driver.find_element(By.TAG_NAME, "body")
    for key in keys:
        body.send_keys(key)


def current_path(driver):
    return driver.find_element(By.CSS_SELECTOR, "figure.current .path").text


def saved(driver, count):
    """Wait until the page says the decision is saved (it redraws before it says so)."""
    wait_for(driver, lambda d: f"({count} decisions in the file)" in d.find_element(By.ID, "status").text)


@needs_driver
def test_decide_with_the_keyboard_then_rerun(page, tmp_path):
    """Arrows move, one key decides, u undoes; the file holds each decision at once; Shift+R
    re-runs the stages and the manifest shows each decision's effect, byte for byte what
    prepare gives with the same decisions written by hand."""
    driver, server = page
    assert driver.find_element(By.CSS_SELECTOR, '[data-count="clusters"]').text == "2"
    press(driver, "/")
    driver.find_element(By.ID, "note").send_keys("same pool", Keys.ESCAPE)
    # the first cluster is the label conflict cat/c.jpg + dog/c.jpg, kept file first
    press(driver, Keys.ARROW_RIGHT)
    other = current_path(driver)
    assert other in ("cat/c.jpg", "dog/c.jpg")
    new_label = "cat" if other.startswith("dog") else "dog"
    press(driver, "r")
    field = driver.find_element(By.ID, "relabel-input")
    wait_for(driver, lambda d: field.is_displayed())
    field.send_keys(Keys.CONTROL, "a")
    field.send_keys(new_label, Keys.ENTER)
    saved(driver, 1)
    assert decisions.load(server.decisions_path)[["path", "action", "value", "note"]].values.tolist() == [
        [other, "relabel", new_label, "same pool"]]
    press(driver, "m")  # mark it, to join a file of the next cluster with it

    press(driver, Keys.ARROW_DOWN, Keys.ARROW_RIGHT)  # the byte-copy cluster, its second file
    copy = current_path(driver)
    press(driver, "s")
    saved(driver, 2)
    press(driver, "d")
    saved(driver, 3)
    press(driver, "u")  # undo the drop
    wait_for(driver, lambda d: d.find_element(By.ID, "status").text == "undone: drop")
    assert sorted(decisions.load(server.decisions_path)["action"]) == ["relabel", "separate"]
    press(driver, "j")  # join the copy with the marked file
    saved(driver, 3)
    press(driver, Keys.ARROW_LEFT)
    kept = current_path(driver)
    press(driver, "k")
    saved(driver, 4)

    press(driver, "3")  # flagged files: the tiny one
    wait_for(driver, lambda d: current_path(d) == "dog/tiny.jpg")
    press(driver, "d")
    saved(driver, 5)
    assert driver.find_element(By.CSS_SELECTOR, "figure.current [data-decision='drop']").text == "drop"
    press(driver, "f")  # the full-size preview, at the file's own 16x16 pixels
    wait_for(driver, lambda d: d.execute_script(
        "const i = document.getElementById('full-img'); return i.complete && i.naturalWidth") == 16)
    press(driver, Keys.ESCAPE)
    assert not driver.find_element(By.ID, "full").is_displayed()

    press(driver, Keys.SHIFT + "R")
    wait_for(driver, lambda d: "re-ran group, split and report" in d.find_element(By.ID, "status").text, 120)
    m = manifest.read(server.folder / "manifest.csv").set_index("path")
    assert m.loc["dog/tiny.jpg", "decided"] == "drop" and m.loc["dog/tiny.jpg", "split"] == ""
    assert (m.loc[other, "label"], m.loc[other, "label_original"]) == (new_label, other.split("/")[0])
    assert m.loc[copy, "decided"] == "separate;join" and m.loc[kept, "decided"] == "separate;keep"
    assert m.loc[kept, "muted"] == "exact-copy" and pd.isna(m.loc[kept, "dup_group"])
    assert m.loc[copy, "dup_group"] == m.loc[other, "dup_group"]
    # the conflict is resolved and the copies parted: the page refreshed to one cluster, no conflict
    wait_for(driver, lambda d: d.find_element(By.CSS_SELECTOR, '[data-count="conflicts"]').text == "0")
    assert driver.find_element(By.CSS_SELECTOR, '[data-count="clusters"]').text == "1"
    assert [e for e in driver.get_log("browser") if e["level"] == "SEVERE"] == []

    hand = tmp_path / "by-hand.csv"
    hand.write_text("path,action,value,note\n"
                    f"dog/tiny.jpg,drop,,same pool\n{kept},keep,,same pool\n"
                    f"{other},relabel,{new_label},same pool\n{kept},separate,{copy},same pool\n"
                    f"{other},join,{copy},same pool\n")
    prepare(server.roots, tmp_path / "by-hand", jobs=1, seed=1, decisions=hand)
    assert (tmp_path / "by-hand" / "manifest.csv").read_bytes() == (server.folder / "manifest.csv").read_bytes()


@needs_driver
@pytest.mark.parametrize("width", [390, 1200])
def test_screenshots(page, width, tmp_path):
    """Phone and desktop widths: the page draws thumbnails and text, nothing runs off the side,
    and the buttons decide as the keys do."""
    driver, server = page
    driver.set_window_size(width, 900)
    wait_for(driver, lambda d: d.execute_script(
        "return [...document.images].filter(i => i.complete && i.naturalWidth > 0).length") >= 2)
    overflow = driver.execute_script("return document.documentElement.scrollWidth - window.innerWidth")
    assert overflow <= 0
    # without a keyboard (a phone), the buttons decide: drop the current file, then undo it
    driver.find_element(By.CSS_SELECTOR, "#actions [data-key='d']").click()
    saved(driver, 1)
    assert decisions.load(server.decisions_path)["action"].tolist() == ["drop"]
    driver.find_element(By.CSS_SELECTOR, "#actions [data-key='u']").click()
    wait_for(driver, lambda d: d.find_element(By.ID, "status").text == "undone: drop")
    assert decisions.load(server.decisions_path).empty
    shot = tmp_path / f"review-{width}.png"
    driver.save_screenshot(str(shot))
    with Image.open(shot) as im:
        pixels = np.asarray(im.convert("RGB"), dtype=float)
    assert pixels.std() > 10  # a blank or failed render is one flat colour
    colourful = (pixels.max(axis=2) - pixels.min(axis=2)) > 60
    assert colourful.mean() > 0.01  # the thumbnails are coloured textures


@needs_driver
def test_pages_with_the_keyboard(tmp_path):
    """52 clusters, 50 to a page: PgDn shows the last two, ↑ from a page's first item goes to the
    previous page's last, ↓ from a page's last item to the next page's first."""
    root = tmp_path / "photos"
    for k in range(52):
        (root / "cat").mkdir(parents=True, exist_ok=True)
        data = encode(textured((64, 48), 100 + k))
        (root / "cat" / f"{k:02d}a.jpg").write_bytes(data)
        (root / "cat" / f"{k:02d}b.jpg").write_bytes(data)
    prepare(root, tmp_path / "out", jobs=1)
    driver, server = _open(tmp_path)
    try:
        pager = lambda d: d.find_element(By.ID, "pager").text  # noqa: E731
        assert pager(driver).startswith("1–50 of 52")
        press(driver, Keys.PAGE_DOWN)
        wait_for(driver, lambda d: pager(d).startswith("51–52 of 52"))
        press(driver, Keys.ARROW_UP)
        wait_for(driver, lambda d: pager(d).startswith("1–50 of 52"))
        assert driver.find_element(By.CSS_SELECTOR, "article.current").get_attribute("data-item") == "49"
        press(driver, Keys.ARROW_DOWN)
        wait_for(driver, lambda d: pager(d).startswith("51–52 of 52"))
        assert driver.find_element(By.CSS_SELECTOR, "article.current").get_attribute("data-item") == "0"
    finally:
        driver.quit()
        server.shutdown()
        server.server_close()
