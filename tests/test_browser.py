"""summary.html in a real browser: Playwright drives Debian's chromium (/usr/bin/chromium).

The page must load from disk without any request other than the file itself, without console
messages or page errors, show the status in words, and show a column named
``<script>alert(1)</script>`` as text without any dialog firing. A screenshot is saved.

In CI (environment variable CI set) a missing chromium or Playwright is a failure, never a skip:
.ci/install-browser installs Debian's chromium with apt-get.
"""

from __future__ import annotations

import datetime as dt
import os
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from conftest import make_docks_frame

from gate.api import check
from gate.artefacts.outputs import write_check_outputs

pytestmark = pytest.mark.browser

CHROMIUM = Path("/usr/bin/chromium")
LAUNCH_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic",
               "--disable-background-networking", "--disable-component-update"]
HOSTILE = "<script>alert(1)</script>"


def _require_browser() -> Any:
    """Return playwright's sync_playwright, or fail (CI) / skip (elsewhere) when unavailable."""
    problem = None
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        problem = "the playwright package is not installed (pip install -e '.[test]')"
    if problem is None and not CHROMIUM.exists():
        problem = f"{CHROMIUM} is missing (run .ci/install-browser)"
    if problem is not None:
        if os.environ.get("CI"):
            pytest.fail(f"browser test cannot run in CI: {problem}")
        pytest.skip(problem)
    return sync_playwright


@pytest.fixture(scope="module")
def summary_path(tmp_path_factory: pytest.TempPathFactory) -> Path:
    frame = make_docks_frame()
    frame[HOSTILE] = np.random.default_rng(12).normal(size=len(frame))
    verdict = check(frame, label="browser <check>", today=dt.date(2026, 12, 1))
    out = tmp_path_factory.mktemp("browser")
    write_check_outputs(verdict, out)
    return out / "summary.html"


def test_summary_renders_offline_without_errors(summary_path: Path, tmp_path: Path) -> None:
    sync_playwright = _require_browser()
    requests: list[str] = []
    console: list[tuple[str, str]] = []
    errors: list[str] = []
    dialogs: list[str] = []
    shot = tmp_path / "summary.png"
    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=str(CHROMIUM), headless=True,
                                             args=LAUNCH_ARGS)
        try:
            page = browser.new_page(viewport={"width": 1280, "height": 1600})
            page.on("request", lambda r: requests.append(r.url))
            page.on("console", lambda m: console.append((m.type, m.text)))
            page.on("pageerror", lambda e: errors.append(str(e)))

            def _dialog(dialog: Any) -> None:
                dialogs.append(dialog.message)
                dialog.dismiss()

            page.on("dialog", _dialog)
            page.goto(summary_path.as_uri(), wait_until="load")
            page.wait_for_timeout(200)  # let any late script or request show itself
            status = page.locator("#status").inner_text()
            tables = page.locator("table.gt_table").count()
            hostile_cells = page.get_by_text(HOSTILE, exact=True).count()
            script_tags = page.locator("script").count()
            title = page.title()
            page.screenshot(path=str(shot), full_page=True)
        finally:
            browser.close()
    assert [u for u in requests if not u.startswith(("file:", "data:"))] == []
    assert requests == [summary_path.as_uri()]
    assert console == [] and errors == [] and dialogs == []
    assert "FAIL" in status and "FAIL" in title
    assert tables >= 8
    assert hostile_cells >= 3  # per-feature table, matrix label, condition/missing tables
    assert script_tags == 0
    assert shot.stat().st_size > 10_000
