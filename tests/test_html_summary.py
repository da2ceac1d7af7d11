"""summary.html: a self-contained page, every section present, every user string escaped, the
numbers matching outside references, and large designs capped."""

from __future__ import annotations

import datetime as dt
import html
import math
import re
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import make_clean_frame, make_docks_frame, policy_from

import gate.artefacts.html_summary as summary
from gate.api import check
from gate.artefacts.html_summary import CSP, summary_html
from gate.judge.verdict import Verdict

TODAY = dt.date(2026, 12, 1)
HOSTILE = "<script>alert(1)</script>"
#: In page order: findings first, provenance last before the caution.
SECTIONS = ("findings", "features", "pairs", "condition", "dependencies", "matrix", "missing",
            "provenance", "caution")

HOSTILE_POLICY = """
policy_version: 1
name: "night <b>shift</b>"
waivers:
  - rule: pairwise_correlation
    features: [air_temp_c, felt_temp_c]
    reason: "<img src=x onerror=alert(2)> kept on purpose"
    owner: "ops & <i>planning</i>"
    expires: 2027-06-30
  - rule: vif
    features: [wind_kmh]
    reason: lapsed
    owner: ops
    expires: 2025-06-30
"""


class _Elements(HTMLParser):
    """Collects tag names and element ids as a browser's parser would see them."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.ids: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)
        self.ids += [v for k, v in attrs if k == "id" and v]
        # no attribute injection: event handlers never appear on any element
        assert not any(k.startswith("on") for k, _ in attrs), (tag, attrs)

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def _parse(page: str) -> _Elements:
    parser = _Elements()
    parser.feed(page)
    return parser


def _section(page: str, name: str) -> str:
    start = page.index(f'id="sec-{name}"')
    return page[start:page.index("</section>", start)]


def _text(fragment: str) -> str:
    return html.unescape(re.sub(r"<[^>]+>", " ", fragment))


@pytest.fixture(scope="module")
def docks_verdict() -> Verdict:
    frame = make_docks_frame()
    frame[HOSTILE] = np.random.default_rng(9).normal(size=len(frame))
    frame.loc[[4, 8], "wind_kmh"] = np.nan
    return check(frame, policy_from(HOSTILE_POLICY), label="nightly <run> & co", today=TODAY)


@pytest.fixture(scope="module")
def docks_page(docks_verdict: Verdict) -> str:
    return summary_html(docks_verdict)


def test_page_is_self_contained(docks_page: str) -> None:
    assert docks_page.startswith("<!DOCTYPE html>")
    assert f'<meta http-equiv="Content-Security-Policy" content="{CSP}">' in docks_page
    assert re.search(r"<title>[^<]+</title>", docks_page)
    assert not re.search(r"https?://", docks_page)
    assert not re.search(r"@import|url\(|<link|<script|<iframe|<img", docks_page, re.IGNORECASE)
    parsed = _parse(docks_page)
    assert "script" not in parsed.tags and "img" not in parsed.tags
    assert len(parsed.ids) == len(set(parsed.ids)), "element ids must be unique"


def test_every_section_is_present_findings_first(docks_page: str) -> None:
    positions = [docks_page.index(f'id="sec-{name}"') for name in SECTIONS]
    assert positions == sorted(positions)
    assert docks_page.count("<section") == len(SECTIONS)


def test_user_strings_are_escaped(docks_page: str) -> None:
    for raw in (HOSTILE, "<img src=x", "<b>shift</b>", "<i>planning</i>", "<run>"):
        assert raw not in docks_page
    text = "".join(_parse(docks_page).text)
    for shown in (HOSTILE, "<img src=x onerror=alert(2)> kept on purpose", "night <b>shift</b>",
                  "ops & <i>planning</i>", "nightly <run> & co"):
        assert shown in text  # visible as text, exactly as written


def test_header_carries_status_in_words_and_provenance(docks_verdict: Verdict,
                                                       docks_page: str) -> None:
    header = _text(_section(docks_page, "provenance"))
    assert docks_verdict.status == "fail"
    top = _text(docks_page[:docks_page.index("<main>")])
    assert "FAIL" in top
    # 11 features (9 numeric, 2 dummies) plus the intercept; a constant, a duplicate and a
    # three-term relation: rank 9 of 12
    d = docks_verdict.diagnostics
    assert (d.rank, d.features + 1, len(d.dependencies)) == (9, 12, 3)
    assert "rank 9 of 12: 3 exact dependencies" in top
    assert 'id="verdict"' in _section(docks_page, "provenance")  # the table keeps its id
    for item in ("FAIL", docks_verdict.policy.sha256, docks_verdict.created_at,
                 docks_verdict.tool_version, f"{docks_verdict.table.rows_used:,} used",
                 "2 dropped"):
        assert item in header


def test_findings_show_waivers_expired_and_stale(docks_page: str) -> None:
    findings = _text(_section(docks_page, "findings"))
    assert "waived" in findings and "until 2027-06-30" in findings
    assert "expired" in findings and "2025-06-30" in findings
    assert "capacity_copy" in findings


def _body_rows(page: str, name: str) -> list[str]:
    """Body rows of the section's first table, as text."""
    section = _section(page, name)
    body = section[section.index("<tbody"):section.index("</tbody>")]
    return [_text(row) for row in re.findall(r"<tr>(.*?)</tr>", body, re.DOTALL)]


def test_findings_lead_with_causes_then_consequences(docks_verdict: Verdict,
                                                     docks_page: str) -> None:
    rows = _body_rows(docks_page, "findings")
    rules = [row.split()[2] for row in rows]  # mark, level word, rule
    fails = [rule for row, rule in zip(rows, rules) if "fail" in row.split()[1]]
    # the exact dependencies (rank_deficiency) come before the VIFs they make infinite
    assert fails[0] == "rank_deficiency"
    assert fails.index("vif") > max(i for i, r in enumerate(fails) if r == "rank_deficiency")
    infinite = [f for f in docks_verdict.findings if f.rule == "vif" and
                f.value_kind == "infinite" and not f.waived and f.level == "fail"]
    assert len(infinite) >= 3
    merged = [row for row in rows if "VIF is infinite for each of these" in row]
    assert len(merged) == 1 and all(name in merged[0] for f in infinite for name in f.features)
    assert f"{len(docks_verdict.findings)} findings in {len(rows)} rows" in _text(
        _section(docks_page, "findings"))
    # waived findings come last
    waived = [i for i, row in enumerate(rows) if "waived" in row.split()[:2]]
    assert waived and waived == list(range(len(rows) - len(waived), len(rows)))


def test_next_step_names_the_cause_and_the_command(docks_page: str, tmp_path: Path,
                                                   run_cli: Any, write_table: Any) -> None:
    start = docks_page.index('id="next-step"')
    steps = " ".join(_text(docks_page[start:docks_page.index("</div>", start)]).split())
    assert "Resolve the" in steps and "exact dependencies first" in steps
    assert "gate suggest on the table file" in steps  # an in-memory table has no path
    table = write_table(make_docks_frame(), "docks <yard> & co.parquet")
    run_cli(["check", table, "--out", tmp_path / "out"])
    page = (tmp_path / "out" / "summary.html").read_text(encoding="utf-8")
    assert "<yard>" not in page  # the path is escaped wherever it appears
    code = re.search(r'id="next-step".*?<code>(.*?)</code>', page, re.DOTALL)
    assert code is not None
    # quoted for a shell; no --policy for the packaged default
    assert html.unescape(code.group(1)) == f"gate suggest '{table}'"


def test_capped_findings_keep_information_findings(monkeypatch: pytest.MonkeyPatch) -> None:
    stale = policy_from("""
policy_version: 1
name: stale waiver
waivers:
  - rule: vif
    features: [wind_kmh]
    reason: kept from last season
    owner: ops
    expires: 2099-01-31
""")
    verdict = check(make_docks_frame(), stale, today=TODAY)
    info = [f for f in verdict.findings if f.level == "info" and not f.waived]
    assert len(info) == 1 and info[0].subject == "waiver"
    monkeypatch.setattr(summary, "MAX_FINDING_ROWS", 2)
    rows = _body_rows(summary_html(verdict), "findings")
    assert len(rows) == 3 and "info" in rows[-1] and "stale" in rows[-1]
    assert all("fail" in row for row in rows[:2])


def test_waiver_column_only_when_a_waiver_applies(docks_page: str) -> None:
    head = _section(docks_page, "findings")
    assert "Waiver (owner: reason, expiry)" in head  # the active pair waiver applies
    rng = np.random.default_rng(4)
    x = rng.normal(size=300)
    frame = pd.DataFrame({"depot_km": x, "depot_miles": x / 1.609 + rng.normal(0, 0.05, 300)})
    page = summary_html(check(frame, today=TODAY))
    assert _body_rows(page, "findings")
    assert "Waiver (owner" not in _section(page, "findings")


def test_explained_by_only_for_breaching_features(docks_page: str) -> None:
    for row in _body_rows(docks_page, "features"):
        if "\u2714 ok" in row:  # under the limit: no auxiliary terms listed
            assert "(+" not in row and "(\u2212" not in row, row
        # never a negligible term (|b| < 0.05) such as "(+0.00)"
        assert not re.search(r"\([+\u2212]0\.0[0-4]\)", row), row


def test_per_feature_numbers_match_closed_form() -> None:
    # Two features: VIF = 1/(1 - r^2), tolerance = 1 - r^2, auxiliary R^2 = r^2, SE inflation
    # sqrt(VIF), and the standardised auxiliary coefficient on the other feature is r
    # (common practice, no source); r from numpy.corrcoef as the outside reference.
    rng = np.random.default_rng(21)
    x = rng.normal(size=500)
    frame = pd.DataFrame({"grid_load": x, "grid_load_lag": 0.8 * x + rng.normal(0, 0.1, 500)})
    r = float(np.corrcoef(frame["grid_load"], frame["grid_load_lag"])[0, 1])
    page = summary_html(check(frame, today=TODAY))
    features = _text(_section(page, "features"))
    vif = 1.0 / (1.0 - r * r)
    assert vif > 5  # breaches the packaged default's VIF limit, so "explained by" is shown
    for expected in (f"{vif:,.2f}", f"{r * r:.4f}",
                     f"\u00d7{math.sqrt(vif):.2f}", f"grid_load ({r:+.2f})"):
        assert expected in features, expected


def test_groups_get_gvif_rows_and_dependencies_read_as_equations(docks_page: str) -> None:
    features = _text(_section(docks_page, "features"))
    assert "weather_kind" in features and "group of 2 dummies" in features
    deps = _text(_section(docks_page, "dependencies"))
    assert "region_code is constant (7 in every used row)" in deps
    assert re.search(r"capacity_copy = docks_total|docks_total = capacity_copy", deps)
    three = re.search(r"(docks_\w+) = (docks_\w+) [+-] (docks_\w+)", deps)
    assert three and {three.group(1), three.group(2), three.group(3)} == {
        "docks_total", "docks_free", "docks_in_use"}


def test_condition_table_marks_involved_proportions() -> None:
    rng = np.random.default_rng(2)
    x = rng.normal(size=400)
    frame = pd.DataFrame({"meter_a": x, "meter_b": x + rng.normal(0, 0.02, 400),
                          "tariff": rng.normal(size=400)})
    verdict = check(frame, today=TODAY)
    cond = verdict.diagnostics.condition
    assert cond.indices[-1] > 30  # Belsley, Kuh & Welsch (1980) limit in the default policy
    assert cond.indices[-2] <= 30
    page = summary_html(verdict)
    section = _section(page, "condition")
    rows = re.findall(r"<tr>(.*?)</tr>", section[section.index("<tbody"):], re.DOTALL)
    assert len(rows) == cond.indices.size  # one row per design column (intercept + 3)
    marked = [_text(row).split()[0] for row in rows if "\u25c6" in _text(row)]
    assert marked == ["meter_a", "meter_b"]  # the involved columns, listed first; not tariff
    assert all(_text(row).count("\u25c6") == 1 for row in rows[:2])  # only the one index
    heading = _text(section[section.index("<thead"):section.index("</thead>")])
    assert f"{cond.indices[-1]:,.1f} \u25b2" in heading  # the breaching index is marked
    assert f"{cond.indices[-2]:,.1f} \u25b2" not in heading


def test_condition_table_width_does_not_grow_with_features() -> None:
    rng = np.random.default_rng(5)
    base = rng.normal(size=(300, 1))
    values = rng.normal(size=(300, 60))
    values[:, 1] = values[:, 0] + rng.normal(0, 0.01, 300)
    values[:, 2:4] = base + rng.normal(0, 0.01, (300, 2))
    frame = pd.DataFrame(values, columns=[f"load_{k:02d}" for k in range(60)])
    verdict = check(frame, today=TODAY)
    section = _section(summary_html(verdict), "condition")
    head = section[section.index("<thead"):section.index("</thead>")]
    labels = re.findall(r'<th class="gt_col_heading[^"]*"[^>]*>(.*?)</th>', head, re.DOTALL)
    assert len(labels) <= 1 + summary.MAX_CONDITION_INDICES  # stub + indices, not 61
    rows = re.findall(r"<tr>(.*?)</tr>", section[section.index("<tbody"):], re.DOTALL)
    assert len(rows) == summary.MAX_CONDITION_ROWS
    first = {_text(row).split()[0] for row in rows[:4]}
    assert first == {"load_00", "load_01", "load_02", "load_03"}  # the involved ones first
    assert "Showing 20 of 61 design columns" in _text(section)


def test_missing_counts_and_caution(docks_page: str) -> None:
    missing = _text(_section(docks_page, "missing"))
    assert re.search(r"wind_kmh\s+2\s", missing)
    section = _section(docks_page, "missing")
    rows = re.findall(r"<tr>(.*?)</tr>", section[section.index("<tbody"):], re.DOTALL)
    assert len(rows) == 1  # only the column that has missing values
    assert "air_temp_c" not in missing
    caution = _text(_section(docks_page, "caution"))
    assert "credit, insurance, hiring" in caution and "model-risk policy" in caution


def test_matrix_full_for_small_designs_else_features_named_by_findings(
        docks_page: str, monkeypatch: pytest.MonkeyPatch, docks_verdict: Verdict) -> None:
    assert 'id="matrix"' in docks_page
    full = _body_rows(docks_page, "matrix")
    assert len(full) == len(docks_verdict.features)
    monkeypatch.setattr(summary, "MAX_MATRIX_FEATURES", 3)
    page = summary_html(docks_verdict)
    rows = _body_rows(page, "matrix")
    # the first three design columns named by a finding: docks_free, docks_in_use, docks_total
    assert [row.split()[1] for row in rows] == ["docks_free", "docks_in_use", "docks_total"]
    assert "more than the 3 drawn in full" in _text(_section(page, "matrix"))
    clean = check(make_clean_frame(), today=TODAY)
    assert len(clean.features) > 3 and not clean.findings
    assert "no finding names two of them" in _text(_section(summary_html(clean), "matrix"))


def test_long_tables_are_capped_breaches_first(docks_verdict: Verdict,
                                               monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(summary, "MAX_FEATURE_ROWS", 3)
    page = summary_html(docks_verdict)
    section = _section(page, "features")
    body = section[section.index("<tbody"):]
    rows = re.findall(r"<tr>(.*?)</tr>", body, re.DOTALL)
    assert len(rows) == 3 and all("fail" in _text(row) for row in rows)
    assert "more are hidden here. verdict.json lists all of them" in _text(section)


def test_output_is_deterministic(docks_verdict: Verdict, docks_page: str) -> None:
    assert summary_html(docks_verdict) == docks_page


def test_pass_page(tmp_path: Path) -> None:
    page = summary_html(check(make_clean_frame(), today=TODAY))
    assert "PASS" in page[:page.index("<main>")]
    assert "No findings" in _text(_section(page, "findings"))
    assert 'id="next-step"' not in page
    assert "None: the design has full rank" in _text(_section(page, "dependencies"))
    assert "No missing values" in _text(_section(page, "missing"))
    assert "full rank (6 of 6" in _text(page[:page.index("<main>")])


def test_check_writes_summary_next_to_verdict(tmp_path: Path, run_cli: Any,
                                              write_table: Any) -> None:
    table = write_table(make_docks_frame(), "docks.parquet")
    result = run_cli(["check", table, "--out", tmp_path / "out"])
    assert result.code == 1
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == ["manifest.json",
                                                                     "summary.html",
                                                                     "verdict.json"]
    page = (tmp_path / "out" / "summary.html").read_text(encoding="utf-8")
    assert "docks.parquet" in page and "FAIL" in page


def test_great_tables_is_imported_only_to_write_html() -> None:
    code = ("import sys, gate, gate.cli.main, gate.artefacts.outputs, gate.api; "
            "print('great_tables' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout
    assert out.strip() == "False"


@pytest.mark.slow
def test_wide_design_stays_small() -> None:
    rng = np.random.default_rng(30)
    rows, width = 700, 400
    values = rng.normal(size=(rows, width))
    for k in range(0, 20, 2):  # planted near-duplicates
        values[:, k + 1] = values[:, k] + rng.normal(0, 0.05, rows)
    frame = pd.DataFrame(values, columns=[f"sensor_{k:03d}" for k in range(width)])
    verdict = check(frame, today=TODAY)
    page = summary_html(verdict)
    assert len(page.encode()) < 1_500_000
    breaches = sum(1 for f in verdict.findings if f.rule == "vif")
    assert breaches >= 20  # the ten planted pairs
    shown = breaches + summary.MAX_QUIET_FEATURE_ROWS
    assert f"Showing {shown} of 400 features and groups" in _text(_section(page, "features"))
    matrix = _body_rows(page, "matrix")  # only the 20 planted features, named by findings
    assert [row.split()[1] for row in matrix] == [f"sensor_{k:03d}" for k in range(20)]


#: Run in a fresh interpreter: polars' thread pool must never start in the test process, whose
#: later tests fork writers (tests/test_faults.py); that hazard is why polars is opt-in.
SAME_BYTES_SCRIPT = r"""
import sys
import numpy as np
import pandas as pd
from gate.api import check
from gate.artefacts import frames
from gate.artefacts.html_summary import summary_html

sys.modules.setdefault("IPython", None)
rng = np.random.default_rng(20_260_516)  # invented fleet-maintenance readings
x = rng.standard_normal((300, 5))
frame = pd.DataFrame(x, columns=["oil <temp>", "rpm & load", "idle", "km", "hours"])
frame["hours_again"] = frame["hours"] * 3.0 + 2.0   # an exact dependency
frame["flat"] = 7.0                                   # a constant column (NaN correlations)
frame["near_km"] = frame["km"] + 1e-3 * rng.standard_normal(300)
frame["depot"] = np.where(rng.random(300) > 0.5, "north\u00a0<b>", "south & co")
verdicts = [check(frame), check(frame[["oil <temp>", "rpm & load"]]),
            check(pd.DataFrame(rng.standard_normal((60, 25)),
                               columns=[f"sensor_{j}" for j in range(25)]))]
pandas_pages = [summary_html(v) for v in verdicts]
frames.use_polars_frames()
polars_pages = [summary_html(v) for v in verdicts]
assert "polars" in sys.modules
for k, (a, b) in enumerate(zip(pandas_pages, polars_pages)):
    assert a == b, (k, next(i for i, (p, q) in enumerate(zip(a, b)) if p != q))
print(len(verdicts), sum(len(p) for p in polars_pages))
"""


def test_polars_and_pandas_frames_give_the_same_page() -> None:
    """Invariant: the frame library great-tables reads (pandas by default, polars in the `gate`
    command) never changes a byte of the page: escaping-laden names, a constant column (NaN
    correlations, drawn as missing), an exact dependency, a categorical, a 25-feature matrix
    (capped at 20) and a two-feature design."""
    result = subprocess.run([sys.executable, "-c", SAME_BYTES_SCRIPT], capture_output=True,
                            text=True, timeout=300, check=False)
    assert result.returncode == 0, result.stderr[-3000:]
    assert result.stdout.split()[0] == "3"


def _contrast(a: str, b: str) -> float:
    """WCAG 2 contrast ratio of two #rrggbb colours (https://www.w3.org/TR/WCAG21/)."""
    def luminance(colour: str) -> float:
        rgb = [int(colour[i:i + 2], 16) / 255.0 for i in (1, 3, 5)]
        lin = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in rgb]
        return 0.2126 * lin[0] + 0.7152 * lin[1] + 0.0722 * lin[2]
    high, low = sorted((luminance(a), luminance(b)), reverse=True)
    return (high + 0.05) / (low + 0.05)


def test_matrix_colours_follow_the_palette_and_keep_the_ink_readable() -> None:
    palette = summary._MATRIX_PALETTE
    stops = np.linspace(-1.0, 1.0, len(palette))
    for r, colour in zip(stops, palette):
        assert summary._matrix_colours(float(r))[0] == colour.lower()
    assert summary._matrix_colours(1.7)[0] == palette[-1].lower()  # clipped to [-1, 1]
    assert summary._matrix_colours(float("nan")) == (summary._MATRIX_MISSING, "#000000")
    # Halfway between two stops: each channel halfway (rounded), e.g. -0.75.
    mid = summary._matrix_colours(-0.75)[0]
    a, b = palette[0], palette[1]
    assert all(abs(int(mid[i:i + 2], 16) - (int(a[i:i + 2], 16) + int(b[i:i + 2], 16)) / 2)
               <= 0.5 for i in (1, 3, 5))
    for r in np.linspace(-1.0, 1.0, 81):
        fill, ink = summary._matrix_colours(float(r))
        other = "#ffffff" if ink == "#000000" else "#000000"
        assert _contrast(fill, ink) >= _contrast(fill, other)
        assert _contrast(fill, ink) >= 4.5  # WCAG AA for normal text


def test_matrix_numbers_print_two_decimals_with_a_typographic_minus() -> None:
    assert summary._matrix_number(-0.2849) == "\u22120.28"
    assert summary._matrix_number(-0.004) == "0.00"
    assert summary._matrix_number(1.0) == "1.00"
    assert summary._matrix_number(float("nan")) == "\u2014"


def test_matrix_cells_carry_their_colours(docks_page: str) -> None:
    cells = re.findall(r'<td style="color: (#[0-9a-fA-F]{6}); background-color: '
                       r'(#[0-9a-fA-F]{6});"[^>]*headers="matrix-[^>]*>([^<]*)</td>', docks_page)
    assert cells
    for ink, fill, text in cells:
        if text == "\u2014":
            assert fill.lower() == summary._MATRIX_MISSING
            continue
        value = float(text.replace("\u2212", "-"))
        # the printed value is rounded; its colour comes from the unrounded r
        expected = {summary._matrix_colours(value + d)[0] for d in np.linspace(-0.005, 0.005, 11)}
        assert fill.lower() in expected
        assert _contrast(fill.lower(), ink.lower()) >= 4.5
