"""The review page in a real headless browser: Debian's Chromium driven by Playwright.

The test signs in, gives verdicts with the buttons and with the keys, types a note,
names another call type, goes back and changes a verdict, and checks the store after
each step. Skipped, with the reason, where Chromium or Playwright is missing; CI
installs both (.ci/run).
"""

from __future__ import annotations

import shutil
import time
from pathlib import Path

import pytest
from callsieve.classifier.store import open_store
from test_review_server import Running, make_review_store

CHROMIUM = "/usr/bin/chromium"
# No network beyond loopback, no background services, no GPU, no sandbox (containers).
CHROMIUM_ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]


def _browser_or_skip():
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        pytest.skip("Playwright's Python package is not installed (pip install -e '.[test]')")
    if not Path(CHROMIUM).exists() and shutil.which("chromium") is None:
        pytest.skip(f"Chromium is not installed at {CHROMIUM} (apt-get install chromium)")
    return sync_playwright


def _verdicts(db: Path) -> dict[tuple[int, str], tuple[str, str | None]]:
    con = open_store(db, create=False)
    try:
        return {
            (r[0], r[1]): (r[2], r[3])
            for r in con.execute("SELECT detection_id, reviewer, verdict, note FROM verdicts")
        }
    finally:
        con.close()


def _wait_for(predicate, timeout_s: float = 5.0):
    """Poll the store until ``predicate()`` is truthy (the page saves asynchronously)."""
    deadline = time.monotonic() + timeout_s
    while True:
        value = predicate()
        if value or time.monotonic() > deadline:
            return value
        time.sleep(0.05)


def _title_is(page, text: str) -> None:
    # A function, not an expression: the page's Content-Security-Policy forbids eval.
    page.wait_for_function("t => document.getElementById('item-title').textContent === t", arg=text)


def test_reviewer_gives_verdicts_with_buttons_and_keys_and_the_store_has_them(tmp_path):
    sync_playwright = _browser_or_skip()
    store = make_review_store(tmp_path, n_items=6, double=(2,))
    ids, db = store["ids"], store["db"]
    running = Running(db)
    errors: list[str] = []
    try:
        with sync_playwright() as p:
            executable = CHROMIUM if Path(CHROMIUM).exists() else shutil.which("chromium")
            browser = p.chromium.launch(executable_path=executable, args=CHROMIUM_ARGS)
            try:
                page = browser.new_page(viewport={"width": 1280, "height": 860})
                page.set_default_timeout(8000)
                page.on("pageerror", lambda e: errors.append(str(e)))
                # Only the server itself is ever asked for anything.
                requested: list[str] = []
                page.on("request", lambda r: requested.append(r.url))
                page.goto(f"http://127.0.0.1:{running.port}/")

                # Sign in: a bad name is refused by the server, a good one starts the session.
                page.wait_for_selector("#signin:not([hidden])")
                page.fill("#signin-name", "bad name!")
                page.click("#signin-form button[type=submit]")
                page.wait_for_function("() => document.getElementById('signin-error').textContent.length > 0")
                page.fill("#signin-name", "reviewer-a")
                page.press("#signin-name", "Enter")
                page.wait_for_selector("#layout:not([hidden])")
                _title_is(page, "Item 1 of 6")
                assert page.inner_text("#reviewer-name") == "reviewer-a"
                assert "rec_20310504T060000Z.wav" in page.inner_text("#facts")

                # 1. A click on Yes: saved at once, then the page moves on to the next item.
                page.click("button[data-verdict=yes]")
                assert _wait_for(lambda: _verdicts(db).get((ids[0], "reviewer-a"))) == ("yes", None)
                _title_is(page, "Item 2 of 6")

                # 2. The key N, with a note typed first (Escape leaves the field).
                page.click("#note")
                page.keyboard.type("boat noise at the start")
                page.keyboard.press("Escape")
                page.keyboard.press("n")
                assert _wait_for(lambda: _verdicts(db).get((ids[1], "reviewer-a"))) == (
                    "no",
                    "boat noise at the start",
                )
                _title_is(page, "Item 3 of 6")

                # 3. Another call type from the run's classes, then the key U.
                page.select_option("#call-type", "pulse-train")
                page.keyboard.press("u")
                assert _wait_for(lambda: _verdicts(db).get((ids[2], "reviewer-a"))) == ("unsure", "[type: pulse-train]")
                _title_is(page, "Item 4 of 6")

                # 4. Back with the arrow key: the earlier verdict and note are shown, and a new
                #    verdict replaces the old one (one row per reviewer and detection).
                page.keyboard.press("ArrowLeft")
                page.keyboard.press("ArrowLeft")
                _title_is(page, "Item 2 of 6")
                assert page.get_attribute("button[data-verdict=no]", "aria-pressed") == "true"
                assert page.input_value("#note") == "boat noise at the start"
                page.keyboard.press("a")  # auto-advance off: stay on the item
                assert not page.is_checked("#auto")
                page.keyboard.press("y")
                assert _wait_for(lambda: _verdicts(db).get((ids[1], "reviewer-a"), ("",))[0] == "yes")
                assert _verdicts(db)[(ids[1], "reviewer-a")] == ("yes", "boat noise at the start")
                page.wait_for_function(
                    "() => document.querySelector('button[data-verdict=yes]').ariaPressed === 'true'"
                )
                assert page.inner_text("#item-title") == "Item 2 of 6"

                # 5. A note edited after the verdict is saved with it when the field is left.
                page.fill("#note", "boat noise, then a faint call")
                page.press("#note", "Enter")
                assert _wait_for(
                    lambda: _verdicts(db)[(ids[1], "reviewer-a")] == ("yes", "boat noise, then a faint call")
                )

                # 6. Navigation by the Next button; progress shows this reviewer's work.
                page.click("#next")
                _title_is(page, "Item 3 of 6")
                page.wait_for_function("() => document.getElementById('txt-mine').textContent === '3 judged'")
                assert "1 yes" not in page.inner_text("#mine-line")  # 2 yes, 0 no, 1 unsure now
                assert "2 yes, 0 no, 1 unsure" in page.inner_text("#mine-line")

                # 7. Playback controls respond (no sound device is needed to set them).
                page.keyboard.press("s")
                page.keyboard.press("l")
                assert page.get_attribute("#loop", "aria-pressed") == "true"
                assert page.evaluate("() => document.getElementById('audio').playbackRate") == 2
                assert page.evaluate("() => document.getElementById('audio').loop") is True

                page.close()
            finally:
                browser.close()
    finally:
        running.stop()
    assert errors == []
    assert all(u.startswith(f"http://127.0.0.1:{running.port}/") for u in requested)
    assert set(_verdicts(db)) == {(ids[0], "reviewer-a"), (ids[1], "reviewer-a"), (ids[2], "reviewer-a")}
    # The server answered every request of the page without a failure line.
    assert [line for line in running.log if "bad name" not in line and "400" not in line] == []
