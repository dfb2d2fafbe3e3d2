"""``flairwatch review`` in a real browser: Debian's headless Chromium driven by Selenium.

The application runs on a free port of 127.0.0.1 in a thread (werkzeug's threaded server, as
``flairwatch review`` runs it); Chromium is driven through Debian's ``chromedriver`` (package
``chromium-driver``, installed by .ci/run), so nothing is downloaded at test time. The test
clicks through the queue, decides by key and by button, and checks the rows in the ledger.
A screenshot of each page is saved in the folder the test prints (run pytest with ``-s`` or
``-rA`` to see it); each is checked for the research-only banner's red.
"""

from __future__ import annotations

import shutil
import threading
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from tests.model_fixtures import make_tiny_model
from tests.review_fixtures import Archive, make_archive

pytest.importorskip("flask", reason="the review extra is not installed: pip install flask")
pytest.importorskip("selenium", reason="selenium is not installed: pip install selenium")

from selenium import webdriver
from selenium.webdriver.chrome.service import Service
from selenium.webdriver.common.by import By
from selenium.webdriver.support.ui import WebDriverWait

from flairwatch.config import ReviewSettings
from flairwatch.review.access import new_token
from flairwatch.review.app import Site, address_of, create_app, make_server_for
from flairwatch.review.viewer import LAYER_COLOURS

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
DRIVER = shutil.which("chromedriver")
pytestmark = pytest.mark.skipif(
    CHROMIUM is None or DRIVER is None,
    reason="Chromium and its driver are not installed; install them with: "
    "apt-get update && apt-get install -y chromium chromium-driver",
)
BANNER_RGB = (0xB0, 0x00, 0x20)  # the banner's background in assets.STYLE
NAME = "Browser Reviewer"
WAIT_S = 20
RED = LAYER_COLOURS["wmh"]


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Archive, str]]:
    """Three unreviewed series, and the application serving them; yields (archive, address)."""
    manifest = make_tiny_model(tmp_path_factory.mktemp("tiny_model"))
    arc = make_archive(tmp_path_factory.mktemp("browser") / "site", manifest)
    a = arc.add("a")
    arc.add("b", study_uid=a.study_uid)
    arc.add("c")
    assert arc.cfg.state is not None
    site = Site(state=arc.cfg.state, token=new_token(), settings=ReviewSettings(port=0))
    server = make_server_for(site, create_app(site))
    thread = threading.Thread(target=server.serve_forever, name="review-server", daemon=True)
    thread.start()
    try:
        yield arc, address_of(site, server)
    finally:
        server.shutdown()
        server.server_close()
        thread.join(timeout=10)


@pytest.fixture
def browser(tmp_path: Path) -> Iterator[webdriver.Chrome]:
    assert CHROMIUM is not None and DRIVER is not None
    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for arg in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                "--window-size=1300,1000", "--no-first-run", "--disable-background-networking",
                "--disable-component-update", "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}"):  # fmt: skip
        options.add_argument(arg)
    driver = webdriver.Chrome(service=Service(executable_path=DRIVER), options=options)
    try:
        yield driver
    finally:
        driver.quit()


def _shot(driver: webdriver.Chrome, folder: Path, name: str) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{name}.png"
    driver.execute_script("window.scrollTo(0, 0)")
    assert driver.save_screenshot(str(path))
    return path


def _pixels(path: Path) -> np.ndarray:
    with Image.open(path) as im:
        return np.asarray(im.convert("RGB"))


def _has_banner(path: Path) -> bool:
    return bool(np.all(_pixels(path) == BANNER_RGB, axis=2).sum() > 2000)


def _marks(arc: Archive) -> list[tuple[str, str, str, str]]:
    with arc.ledger() as ledger:
        rows = ledger.query(
            "SELECT s.series_key, q.mark, q.note, q.marked_by FROM qc_marks q"
            " JOIN results r ON r.id = q.result_id JOIN series s ON s.id = r.series_id"
            " ORDER BY q.id"
        )
    return [(str(r[0]), str(r[1]), str(r[2]), str(r[3])) for r in rows]


def _wait(driver: webdriver.Chrome, what: str, check: object) -> None:
    WebDriverWait(driver, WAIT_S).until(check, message=what)  # type: ignore[arg-type]


def _body(driver: webdriver.Chrome, name: str) -> str | None:
    value = driver.find_element(By.TAG_NAME, "body").get_attribute(f"data-{name}")
    return None if value is None else str(value)


def _on_series(driver: webdriver.Chrome, key: str) -> None:
    _wait(driver, f"series {key} shown", lambda d: f"/series/{key}" in d.current_url)
    _wait(driver, f"a slice of {key} drawn", lambda d: _body(d, "shown") is not None)


def _press(driver: webdriver.Chrome, keys: str) -> None:
    driver.find_element(By.TAG_NAME, "body").send_keys(keys)


def test_review_by_key_and_button(
    served: tuple[Archive, str], browser: webdriver.Chrome, tmp_path: Path
) -> None:
    arc, address = served
    shots = tmp_path / "screenshots"
    print(f"review screenshots in {shots}")
    base = address.split("/?token=")[0]

    browser.get(f"{base}/?token=wrong")
    assert "wrong access token" in browser.find_element(By.ID, "error").text
    assert _has_banner(_shot(browser, shots, "refused"))

    browser.get(address)
    rows = browser.find_elements(By.CSS_SELECTOR, "tr[data-key]")
    order = [str(r.get_attribute("data-key")) for r in rows]
    assert sorted(order) == sorted(e.series_key for e in arc.entries)
    assert "token" not in browser.current_url, "the token leaves the address bar"
    assert _has_banner(_shot(browser, shots, "queue"))

    name = browser.find_element(By.ID, "name")
    name.send_keys(NAME)
    name.submit()
    _wait(
        browser,
        "name saved",
        lambda d: d.find_element(By.ID, "name").get_attribute("value") == NAME,
    )
    browser.find_element(By.ID, "start").click()
    first, second, third = order
    _on_series(browser, str(first))
    start = int(_body(browser, "shown") or -1)
    depth = int(browser.find_element(By.ID, "viewer").get_attribute("data-depth") or 0)
    assert 0 <= start < depth
    step = 1 if start + 1 < depth else -1
    _press(browser, "j" if step == 1 else "k")
    _wait(browser, "next slice drawn", lambda d: _body(d, "shown") == str(start + step))
    page = _shot(browser, shots, "series")
    assert _has_banner(page)
    # the slice as drawn on screen: grey tissue under the default window, a red WMH outline
    box = browser.find_element(By.ID, "slice").rect
    scale = _pixels(page).shape[1] / browser.execute_script("return window.innerWidth")
    x0, y0 = round(box["x"] * scale), round(box["y"] * scale)
    x1, y1 = round((box["x"] + box["width"]) * scale), round((box["y"] + box["height"]) * scale)
    shown = _pixels(page)[y0:y1, x0:x1].astype(int)
    # tests/series_fixtures.py: an ellipse of tissue (value 300) filling about half the grid, on 0
    tissue = (np.ptp(shown, axis=2) == 0) & (shown[:, :, 0] > 200)
    assert 0.3 < tissue.mean() < 0.8, "the window shows tissue bright and background dark"
    assert np.all(shown == RED, axis=2).sum() > 20, "the WMH outline is drawn"

    _press(browser, "a")  # accept by key; the page goes on to the next series
    _on_series(browser, str(second))
    browser.find_element(By.ID, "reject").click()  # reject by button
    _on_series(browser, str(third))
    _press(browser, "r")  # reject by key: the last series, so the page stays
    _wait(browser, "decision saved", lambda d: _body(d, "decided") == "1")
    _press(browser, "n")
    browser.switch_to.active_element.send_keys("outline checked again")
    browser.find_element(By.ID, "accept").click()  # accept by button, with the note
    _wait(browser, "second decision saved", lambda d: _body(d, "decided") == "2")
    history = browser.find_element(By.ID, "history").text
    assert "outline checked again" in history and NAME in history
    assert _has_banner(_shot(browser, shots, "series-decided"))

    assert _marks(arc) == [
        (first, "accepted", "", NAME),
        (second, "rejected", "", NAME),
        (third, "rejected", "", NAME),
        (third, "accepted", "outline checked again", NAME),
    ]

    browser.get(f"{base}/?status=rejected")
    rejected = [
        str(r.get_attribute("data-key"))
        for r in browser.find_elements(By.CSS_SELECTOR, "tr[data-key]")
    ]
    assert rejected == [second]
    assert _has_banner(_shot(browser, shots, "queue-rejected"))
