"""history.html in a real browser (Playwright + /usr/bin/chromium, as tests/test_browser.py):
no request but the file, no console message, no script, charts present; a screenshot is saved."""

from __future__ import annotations

import dataclasses
import datetime as dt
from pathlib import Path

import pytest
from conftest import make_clean_frame, make_docks_frame
from test_browser import CHROMIUM, LAUNCH_ARGS, _require_browser

from gate.api import check
from gate.artefacts.audit import append_entry
from gate.artefacts.history import build_history
from gate.artefacts.history_html import write_history
from gate.artefacts.verdict_json import verdict_json

pytestmark = pytest.mark.browser


def test_history_renders_offline_without_errors(tmp_path: Path) -> None:
    sync_playwright = _require_browser()
    log = tmp_path / "audit.jsonl"
    for k in range(6):
        frame = make_docks_frame(seed=k) if k % 2 else make_clean_frame(seed=k)
        verdict = check(frame, label=f"<b>nightly {k}</b>", today=dt.date(2026, 12, 1))
        verdict = dataclasses.replace(verdict, created_at=f"2026-11-{k + 1:02d}T03:00:00+00:00")
        append_entry(log, verdict_json(verdict).encode())
    lines = log.read_bytes().split(b"\n")[:-1]
    lines[3] = lines[3].replace(b'"fail"', b'"pass"')  # break the chain: the page marks it
    log.write_bytes(b"".join(line + b"\n" for line in lines))
    write_history(build_history(log, today=dt.date(2026, 12, 1)), tmp_path / "out")
    page_path = tmp_path / "out" / "history.html"
    requests: list[str] = []
    console: list[tuple[str, str]] = []
    errors: list[str] = []
    shot = tmp_path / "history.png"
    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=str(CHROMIUM), headless=True,
                                             args=LAUNCH_ARGS)
        try:
            page = browser.new_page(viewport={"width": 1280, "height": 1400})
            page.on("request", lambda r: requests.append(r.url))
            page.on("console", lambda m: console.append((m.type, m.text)))
            page.on("pageerror", lambda e: errors.append(str(e)))
            page.goto(page_path.as_uri(), wait_until="load")
            page.wait_for_timeout(200)
            alarm = page.locator("#chain-broken").inner_text()
            svgs = page.locator("svg").count()
            scripts = page.locator("script").count()
            bold_labels = page.locator("td b", has_text="nightly").count()
            width = page.evaluate("document.documentElement.scrollWidth")
            page.screenshot(path=str(shot), full_page=True)
        finally:
            browser.close()
    assert requests == [page_path.as_uri()]
    assert console == [] and errors == []
    assert "AUDIT CHAIN BROKEN at line 4" in alarm
    assert svgs == 2 and scripts == 0 and bold_labels == 0  # labels shown as text
    assert width <= 1280  # readable at 1280 px without horizontal scrolling
    assert shot.stat().st_size > 10_000
    Path("/tmp/gate-history-browser.png").write_bytes(shot.read_bytes())
