"""The report page in a real headless browser: Debian's Chromium driven by Playwright.

The page is opened from disk (file://) with every request other than the page itself
refused: it must load, show every figure (each image decoded, naturalWidth > 0) and
raise no console error. Skipped, with the reason, where Chromium or Playwright is
missing (the launch flags and skip logic are those of test_review_browser.py).
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

from callsieve.classifier.report import build_report
from test_report import survey_store
from test_review_browser import CHROMIUM, CHROMIUM_ARGS, _browser_or_skip


def test_report_page_loads_offline_and_every_figure_renders(tmp_path):
    sync_playwright = _browser_or_skip()
    db = survey_store(tmp_path, days=4)
    out = tmp_path / "report"
    report = build_report(db, out, utc_offset_h=10)
    page_path = out / "report.html"
    text = page_path.read_text()
    # Self-contained: no http(s) address and no file reference in any src or href.
    assert not re.search(r"""(src|href)=["'](?!data:)""", text)
    pngs = sorted(p.name for p in out.glob("*.png"))
    assert text.count('<img src="data:image/png;base64,') == len(pngs) >= 7
    assert "local regulations and qualified practice decide" in text

    errors: list[str] = []
    requested: list[str] = []
    with sync_playwright() as p:
        executable = CHROMIUM if Path(CHROMIUM).exists() else shutil.which("chromium")
        browser = p.chromium.launch(executable_path=executable, args=CHROMIUM_ARGS)
        try:
            page = browser.new_page(viewport={"width": 1280, "height": 900})
            page.set_default_timeout(10000)
            page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
            page.on("pageerror", lambda e: errors.append(str(e)))
            page.on("request", lambda r: requested.append(r.url))
            # Anything but the page itself (and its own data URIs) would be a network fetch.
            page.route(
                "**/*",
                lambda route: route.continue_() if route.request.url.startswith("file://") else route.abort(),
            )
            page.goto(page_path.as_uri(), wait_until="load")
            widths = page.eval_on_selector_all(
                "img", "imgs => imgs.map(i => [i.complete, i.naturalWidth, i.naturalHeight])"
            )
            heading = page.inner_text("h1")
        finally:
            browser.close()
    assert len(widths) == len(pngs)
    assert all(done and w > 0 and h > 0 for done, w, h in widths), widths
    assert errors == []
    assert [u for u in requested if not u.startswith(("file://", "data:"))] == []
    assert heading == f"Monitoring report: shoal-bank-test, run {report['run_id']}"
