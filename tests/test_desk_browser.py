"""The desk end to end in a real browser: Debian's Chromium driven by Selenium and chromium-driver, headless.

A teacher adds a piece and a student, brings in three weekly takes of the demo waltz (each
with its own planted mistakes; see ``desk_takes/build_desk_takes.py``), watches them finish,
opens a take, clicks a finding, opens the full report and the page over the weeks, and
removes the student. A screenshot of each page is written to the test's folder (or to
``$TAKESCRIBE_DESK_SCREENSHOTS``). Skips with the reason where Chromium, its driver or
Selenium is missing.
"""

from __future__ import annotations

import os
import shutil
import time
from pathlib import Path

import pytest

from desk_takes.client import DEMO, WEEKS

webdriver = pytest.importorskip("selenium.webdriver", reason="selenium is not installed (pip install '.[test]')")
from selenium.webdriver.common.by import By  # noqa: E402
from selenium.webdriver.support import expected_conditions  # noqa: E402
from selenium.webdriver.support.ui import Select, WebDriverWait  # noqa: E402

CHROMIUM = shutil.which("chromium")
DRIVER = shutil.which("chromedriver")
pytestmark = [pytest.mark.slow, pytest.mark.skipif(
    CHROMIUM is None or DRIVER is None,
    reason="chromium and chromium-driver are not on PATH (Debian: apt-get install chromium chromium-driver)")]


@pytest.fixture
def browser():
    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for flag in ("--headless=new", "--no-sandbox", "--disable-dev-shm-usage", "--window-size=1200,1000",
                 "--autoplay-policy=no-user-gesture-required", "--mute-audio"):
        options.add_argument(flag)
    try:
        driver = webdriver.Chrome(service=webdriver.ChromeService(executable_path=DRIVER), options=options)
    except Exception as exc:   # a driver that does not match the browser, no display libraries...
        pytest.skip(f"Chromium could not be started by Selenium: {str(exc).splitlines()[0]}")
    yield driver
    driver.quit()


def _no_job_workers_left() -> None:
    """No job worker of the stopped desk is left (a leftover process can hang a CI run)."""
    psutil = pytest.importorskip("psutil")
    workers = []
    for process in psutil.Process().children(recursive=True):
        try:
            if "spawn_main" in " ".join(process.cmdline()) and process.status() != psutil.STATUS_ZOMBIE:
                workers.append(process.cmdline())
        except psutil.Error:   # ended meanwhile
            pass
    assert workers == [], workers


def _wait(driver, test, timeout=30.0):
    """Until ``test(driver)`` holds; a page being replaced (a stale or missing element) is looked at again."""
    from selenium.common.exceptions import NoSuchElementException, StaleElementReferenceException

    return WebDriverWait(driver, timeout, poll_frequency=0.3,
                         ignored_exceptions=(NoSuchElementException, StaleElementReferenceException)).until(
        lambda d: test(d))


def test_a_teacher_uses_the_desk_from_piece_to_removal(tmp_path, browser):
    from takescribe.desk import start_desk

    shots = Path(os.environ.get("TAKESCRIBE_DESK_SCREENSHOTS") or tmp_path / "screenshots")
    shots.mkdir(parents=True, exist_ok=True)

    def shot(name):
        browser.save_screenshot(str(shots / f"{len(list(shots.glob('*.png'))) + 1:02d}-{name}.png"))

    desk = start_desk(tmp_path / "lib", port=0, seed=False, workers=2)
    base = f"http://127.0.0.1:{desk.port}"
    try:
        browser.get(desk.url)   # the link the desk prints: sets the session key
        browser.get(base + "/pieces")
        browser.find_element(By.ID, "piece-title").send_keys("Lantern Waltz")
        browser.find_element(By.ID, "piece-part").send_keys(str(DEMO / "piano" / "part.musicxml"))
        browser.find_element(By.ID, "add-piece").click()
        _wait(browser, lambda d: "Lantern Waltz" in d.find_element(By.TAG_NAME, "table").text)
        shot("pieces")
        browser.get(base + "/students")
        browser.find_element(By.ID, "student-name").send_keys("Maren")
        browser.find_element(By.ID, "add-student").click()
        _wait(browser, lambda d: d.find_element(By.TAG_NAME, "h1").text == "Maren")
        shot("student-new")

        browser.get(base + "/bring-in")
        browser.find_element(By.ID, "files").send_keys("\n".join(str(p) for p in WEEKS))
        _wait(browser, lambda d: len(d.find_elements(By.CSS_SELECTOR, "#list tbody tr")) == 3)
        rows = browser.find_elements(By.CSS_SELECTOR, "#list tbody tr")
        # the guess from "maren lantern waltz 2026-11-02.ogg": student, piece and date filled in
        assert all(Select(r.find_element(By.CLASS_NAME, "student")).first_selected_option.text == "Maren" for r in rows)
        assert all(Select(r.find_element(By.CLASS_NAME, "piece")).first_selected_option.text == "Lantern Waltz"
                   for r in rows)
        assert [r.find_element(By.CLASS_NAME, "date").get_attribute("value") for r in rows] == \
            ["2026-11-02", "2026-11-09", "2026-11-16"]
        shot("bring-in-chosen")
        browser.find_element(By.ID, "send-all").click()
        _wait(browser, lambda d: len(d.find_elements(By.CSS_SELECTOR, "[data-job]")) == 3)
        # states, not times: a job taken by a worker, then all three done (the bounds only stop a
        # broken desk; worker start-up and three analyses take about 30 s on a quiet 2-core machine)
        _wait(browser, lambda d: any(e.get_attribute("data-state") != "queued"
                                     for e in d.find_elements(By.CSS_SELECTOR, "[data-job]")), timeout=120)
        shot("bring-in-running")
        _wait(browser, lambda d: all(e.get_attribute("data-state") in ("done", "failed", "refused")
                                     for e in d.find_elements(By.CSS_SELECTOR, "[data-job]")), timeout=240)
        states = [e.get_attribute("data-state") for e in browser.find_elements(By.CSS_SELECTOR, "[data-job]")]
        assert states == ["done"] * 3, [e.text for e in browser.find_elements(By.CSS_SELECTOR, "[data-job]")]
        shot("bring-in-finished")

        browser.find_elements(By.CSS_SELECTOR, "[data-job] a.open")[0].click()
        _wait(browser, lambda d: d.find_elements(By.CLASS_NAME, "finding"))
        finding = browser.find_elements(By.CLASS_NAME, "finding")[0]
        clicked = time.monotonic()
        finding.click()
        assert "playing" in finding.get_attribute("class")
        start = max(float(finding.get_attribute("data-time")) - 1.0, 0.0)
        _wait(browser, lambda d: d.execute_script("return document.getElementById('player').readyState") >= 1)
        at = browser.execute_script("return document.getElementById('player').currentTime")
        # the passage, from a second before: playing at speed 1 cannot have gone further than the
        # seconds since the click, however slowly this machine answered
        assert start - 0.05 <= at <= start + (time.monotonic() - clicked) + 0.05, (start, at)
        shot("take")
        browser.find_element(By.ID, "open-report").click()
        # the practice report as the CLI writes it (report/page.py: "<piece>: listening notes")
        _wait(browser, lambda d: d.current_url.endswith("/report") and d.title.endswith("listening notes")
              and d.execute_script("return document.readyState") == "complete")
        shot("report")

        browser.back()
        _wait(browser, lambda d: d.find_elements(By.PARTIAL_LINK_TEXT, "over the weeks"))
        browser.find_element(By.PARTIAL_LINK_TEXT, "over the weeks").click()
        _wait(browser, lambda d: d.find_elements(By.CSS_SELECTOR, "svg.grid"))
        marks = browser.find_elements(By.CSS_SELECTOR, "svg.grid circle")
        recurring = browser.find_element(By.CLASS_NAME, "recurring").text
        # the pause before bar 12 was planted in all three weeks (build_desk_takes.WEEKS)
        assert len(marks) >= 3 and "bar 12: findings in 3 of 3 takes" in recurring
        shot("over-the-weeks")

        browser.get(base + "/students")
        browser.find_element(By.LINK_TEXT, "Maren").click()
        _wait(browser, lambda d: d.find_elements(By.ID, "remove-student"))
        shot("student-with-takes")
        browser.find_element(By.ID, "remove-student").click()
        WebDriverWait(browser, 30).until(expected_conditions.alert_is_present()).accept()
        _wait(browser, lambda d: d.find_elements(By.ID, "message"))
        message = browser.find_element(By.ID, "message").text
        assert message.startswith("Removed Maren: 3 takes") and "every database row" in message
        shot("removed")
        assert not list((desk.library.root / "audio").iterdir())
        assert not list((desk.library.root / "outputs").iterdir())
    finally:
        desk.stop()   # the server, the job feeder and its worker processes
    _no_job_workers_left()
    assert len(list(shots.glob("*.png"))) == 10
    print(f"screenshots: {shots}")
