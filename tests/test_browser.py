"""summary.html in a real browser: Playwright drives Debian's chromium (/usr/bin/chromium).

The page must load from disk without any request other than the file itself, without console
messages or page errors, show the status in words, and show a column named
``<script>alert(1)</script>`` as text without any dialog firing. At 1280 px nothing scrolls
sideways (neither the page nor any table container) and the findings start within the first
900 px, for the demo, the docks table and a 60-feature table. Screenshots are saved.

In CI (environment variable CI set) a missing chromium or Playwright is a failure, never a skip:
.ci/install-browser installs Debian's chromium with apt-get.
"""

from __future__ import annotations

import datetime as dt
import os
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import make_docks_frame

from gate.api import check
from gate.artefacts.outputs import write_check_outputs

pytestmark = pytest.mark.browser

CHROMIUM = Path("/usr/bin/chromium")
LAUNCH_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic",
               "--disable-background-networking", "--disable-component-update"]
HOSTILE = "<script>alert(1)</script>"
WIDTH = 1280
FIRST_SCREEN = 900

#: Elements that scroll sideways: the page itself, or any box whose content is wider than it
#: and that may scroll (great-tables wraps every table in an overflow-x:auto container).
SIDEWAYS = """() => {
  const out = [];
  const root = document.documentElement;
  if (root.scrollWidth > root.clientWidth) out.push('page:' + root.scrollWidth);
  for (const e of document.querySelectorAll('*')) {
    const o = getComputedStyle(e).overflowX;
    if ((o === 'auto' || o === 'scroll') && e.scrollWidth > e.clientWidth + 1)
      out.push((e.id || e.tagName) + ':' + e.scrollWidth + '>' + e.clientWidth);
  }
  return out;
}"""
#: Top of the findings section, of the next-step box and of the first finding row (or the
#: "No findings" line), relative to the top of the page.
FINDINGS_TOP = """() => {
  const top = (e) => e ? e.getBoundingClientRect().top + window.scrollY : null;
  const section = document.getElementById('sec-findings');
  const first = section.querySelector('#findings tbody tr') || section.querySelector('p');
  return {section: top(section), next: top(document.getElementById('next-step')),
          first: top(first), firstBottom: first ? top(first) + first.offsetHeight : null};
}"""


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


def _render(path: Path, shot: Path) -> dict[str, Any]:
    """Open ``path`` at 1280 x 900 and collect what a reader (and an attacker) would see."""
    sync_playwright = _require_browser()
    seen: dict[str, Any] = {"requests": [], "console": [], "errors": [], "dialogs": []}
    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=str(CHROMIUM), headless=True,
                                             args=LAUNCH_ARGS)
        try:
            page = browser.new_page(viewport={"width": WIDTH, "height": FIRST_SCREEN})
            page.on("request", lambda r: seen["requests"].append(r.url))
            page.on("console", lambda m: seen["console"].append((m.type, m.text)))
            page.on("pageerror", lambda e: seen["errors"].append(str(e)))

            def _dialog(dialog: Any) -> None:
                seen["dialogs"].append(dialog.message)
                dialog.dismiss()

            page.on("dialog", _dialog)
            page.goto(path.as_uri(), wait_until="load")
            page.wait_for_timeout(200)  # let any late script or request show itself
            seen["status"] = page.locator("#status").inner_text()
            seen["title"] = page.title()
            seen["tables"] = page.locator("table.gt_table").count()
            seen["hostile"] = page.get_by_text(HOSTILE, exact=True).count()
            seen["scripts"] = page.locator("script").count()
            seen["sideways"] = page.evaluate(SIDEWAYS)
            seen["findings"] = page.evaluate(FINDINGS_TOP)
            page.screenshot(path=str(shot.with_suffix(".first-screen.png")))
            page.screenshot(path=str(shot), full_page=True)
        finally:
            browser.close()
    return seen


def _assert_clean_and_findings_first(seen: dict[str, Any], path: Path) -> None:
    assert [u for u in seen["requests"] if not u.startswith(("file:", "data:"))] == []
    assert seen["requests"] == [path.as_uri()]
    assert seen["console"] == [] and seen["errors"] == [] and seen["dialogs"] == []
    assert seen["scripts"] == 0
    assert seen["sideways"] == [], "something scrolls sideways at 1280 px"
    tops = seen["findings"]
    assert tops["section"] < FIRST_SCREEN / 2
    assert tops["firstBottom"] <= FIRST_SCREEN, tops  # the first finding is fully visible
    if tops["next"] is not None:
        assert tops["next"] < tops["first"]  # what to do comes before the list


def test_summary_renders_offline_without_errors(summary_path: Path, tmp_path: Path) -> None:
    shot = tmp_path / "summary.png"
    seen = _render(summary_path, shot)
    _assert_clean_and_findings_first(seen, summary_path)
    assert "FAIL" in seen["status"] and "FAIL" in seen["title"]
    # findings, per feature, pairs, condition, dependencies, matrix, provenance (no table for
    # missing values: this table has none)
    assert seen["tables"] == 7
    # as a whole cell: per-feature and condition tables (the matrix label has its number first)
    assert seen["hostile"] >= 2
    assert shot.stat().st_size > 10_000


def test_demo_pages_fit_1280_with_findings_first(tmp_path: Path,
                                                 capsys: pytest.CaptureFixture[str]) -> None:
    _require_browser()
    from gate.cli.demo import run_demo

    assert run_demo(tmp_path / "demo") == 0
    capsys.readouterr()
    for sub, status in (("raw", "FAIL"), ("fixed", "PASS")):
        path = tmp_path / "demo" / sub / "summary.html"
        seen = _render(path, tmp_path / f"demo-{sub}.png")
        _assert_clean_and_findings_first(seen, path)
        assert status in seen["status"]


def fleet_frame(features: int = 60, rows: int = 400, seed: int = 60) -> pd.DataFrame:
    """Invented fleet-maintenance table: long feature names, a near-duplicate pair, a
    three-term near dependency and a strong pair among otherwise independent columns."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(rows, features))
    x[:, 1] = x[:, 0] + rng.normal(0, 0.05, rows)
    x[:, 4] = x[:, 2] + x[:, 3] + rng.normal(0, 0.02, rows)
    x[:, 5] = 2 * x[:, 6] + rng.normal(0, 0.3, rows)
    names = [f"van_{k:02d}_brake_pad_wear_mm" if k % 3 == 0
             else f"odometer_km_since_service_{k:02d}" for k in range(features)]
    return pd.DataFrame(x, columns=names)


def test_sixty_features_fit_1280_with_findings_first(tmp_path: Path) -> None:
    _require_browser()
    out = tmp_path / "fleet"
    verdict = check(fleet_frame(), today=dt.date(2026, 12, 1))
    assert len(verdict.features) == 60 and verdict.status == "fail"
    write_check_outputs(verdict, out)
    path = out / "summary.html"
    seen = _render(path, tmp_path / "fleet60.png")
    _assert_clean_and_findings_first(seen, path)
    assert seen["tables"] >= 6
