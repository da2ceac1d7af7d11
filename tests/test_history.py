"""`gate history`: grouping, appeared/resolved findings, waivers, filters, a broken chain and a
missing stored verdict (exit 1), bad input (exit 2)."""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from conftest import make_clean_frame, make_docks_frame

from gate.api import check
from gate.artefacts.audit import append_entry, store_path, summary_path
from gate.artefacts.history import build_history, finding_identity
from gate.artefacts.verdict_json import verdict_json

TODAY = dt.date(2026, 12, 1)


def _record(folder: Path) -> Path:
    """Six nightly runs: clean, docks (fails), docks, clean, docks minus the total, clean."""
    log = folder / "audit.jsonl"
    frames = [make_clean_frame(), make_docks_frame(), make_docks_frame(seed=3),
              make_clean_frame(seed=4), make_docks_frame().drop(columns=["docks_total"]),
              make_clean_frame(seed=5)]
    for k, frame in enumerate(frames):
        verdict = check(frame, label=f"nightly {k}", today=TODAY)
        verdict = dataclasses.replace(verdict, created_at=f"2026-11-{k + 1:02d}T03:00:00+00:00")
        append_entry(log, verdict_json(verdict).encode())
    return log


@pytest.fixture(scope="module")
def record(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return _record(tmp_path_factory.mktemp("history"))


def test_history_of_an_intact_log(record: Path, tmp_path: Path, run_cli: Any) -> None:
    result = run_cli(["history", record, "--out", tmp_path / "out"])
    assert result.code == 0, result.err
    document = json.loads((tmp_path / "out" / "history.json").read_text())
    assert document["chain"]["intact"] and document["record_problems"] == []
    (group,) = document["groups"]
    assert [r["status"] for r in group["runs"]] == ["pass", "fail", "fail", "pass", "fail",
                                                    "pass"]
    appeared = {c["run"]: c["appeared"] for c in group["changes"]}
    resolved = {c["run"]: c["resolved"] for c in group["changes"]}
    assert "vif: docks_total" in appeared[1] and "vif: docks_total" in resolved[3]
    assert 2 not in appeared and 2 not in resolved  # same findings, same identity
    assert "docks_total" in group["vif_over_time"]["series"]
    assert group["vif_over_time"]["series"]["docks_total"][1] == "inf"
    html = (tmp_path / "out" / "history.html").read_text()
    assert "Content-Security-Policy" in html and "<script" not in html
    assert html.count("<svg") == 2 and "AUDIT CHAIN BROKEN" not in html


def test_broken_chain_still_renders_marked_and_exits_1(record: Path, tmp_path: Path,
                                                       run_cli: Any) -> None:
    log = tmp_path / "audit.jsonl"
    lines = record.read_bytes().split(b"\n")[:-1]
    lines[2] = lines[2].replace(b'"fail"', b'"pass"')
    log.write_bytes(b"".join(line + b"\n" for line in lines))
    (tmp_path / "verdicts").symlink_to(record.parent / "verdicts")
    result = run_cli(["history", log, "--out", tmp_path / "out"])
    assert result.code == 1 and "chain broken" in result.err
    html = (tmp_path / "out" / "history.html").read_text()
    assert 'id="chain-broken"' in html and "line 3" in html
    document = json.loads((tmp_path / "out" / "history.json").read_text())
    assert document["chain"]["bad_line"] == 3 and document["exit_code"] == 1
    assert [r["after_chain_break"] for r in document["groups"][0]["runs"]][2:4] == [True, True]


def test_missing_stored_verdict_is_marked_and_exits_1(tmp_path: Path, run_cli: Any) -> None:
    log = _record(tmp_path)
    entry = json.loads(log.read_bytes().split(b"\n")[1])
    store_path(log, entry["verdict"]["sha256"]).unlink()
    result = run_cli(["history", log, "--out", tmp_path / "out"])
    assert result.code == 1 and "line 2: stored verdict missing" in result.err
    html = (tmp_path / "out" / "history.html").read_text()
    assert 'id="record-incomplete"' in html and "stored verdict missing" in html


def test_folder_of_verdicts_is_grouped_by_table_and_policy(tmp_path: Path,
                                                           run_cli: Any, write_table: Any,
                                                           write_policy: Any) -> None:
    strict = write_policy("name: strict-fleet\nlimits:\n  vif: {max: 2.5, level: fail}\n")
    table = write_table(make_docks_frame(), "docks.parquet")
    other = write_table(make_clean_frame(), "clean.parquet")
    for k, (tab, pol) in enumerate([(table, None), (table, strict), (other, None),
                                    (table, None)]):
        args = ["check", tab, "--out", tmp_path / "runs" / f"r{k}", "--quiet"]
        run_cli([*args, "--policy", pol] if pol else args)
    result = run_cli(["history", tmp_path / "runs", "--out", tmp_path / "out"])
    assert result.code == 0, result.err
    groups = json.loads((tmp_path / "out" / "history.json").read_text())["groups"]
    keys = sorted((Path(g["table"]).name, g["policy_name"], g["runs_count"]) for g in groups)
    assert keys == [("clean.parquet", "default", 1), ("docks.parquet", "default", 2),
                    ("docks.parquet", "strict-fleet", 1)]


def test_filters_and_waivers_expiring_first(tmp_path: Path, write_policy: Any) -> None:
    policy = write_policy("""
        name: waived
        waivers:
          - {rule: pairwise_correlation, features: [air_temp_c, felt_temp_c], owner: ops,
             reason: kept on purpose, expires: 2026-12-20}
          - {rule: vif, features: [air_temp_c], owner: ops, reason: ridge, expires: 2027-06-01}
          - {rule: vif, features: [felt_temp_c], owner: ops, reason: ridge, expires: 2026-11-20}
        """)
    log = tmp_path / "audit.jsonl"
    for k in range(3):
        verdict = check(make_docks_frame(seed=k), policy, label=f"{'pr' if k else 'main'}-{k}",
                        today=dt.date(2026, 11, 10))
        verdict = dataclasses.replace(verdict, created_at=f"2026-11-{k + 1:02d}T03:00:00+00:00")
        append_entry(log, verdict_json(verdict).encode())
    history = build_history(log, horizon=30, today=TODAY, label="pr-*", since="2026-11-02")
    (group,) = history.groups
    assert [r.label for r in group.runs] == ["pr-1", "pr-2"]
    from gate.artefacts.history import waiver_rows

    kinds = [(kind, w.expires) for kind, w in waiver_rows(group, TODAY, 30)]
    assert kinds == [("expiring", "2026-12-20"), ("expired", "2026-11-20"),
                     ("active", "2027-06-01")]
    assert build_history(log, until="2026-11-01", today=TODAY).groups[0].runs[0].label == \
        "main-0"


@pytest.mark.parametrize("argv", [["--since", "yesterday"], ["--horizon", "-1"],
                                  ["--since", "2026-12-01", "--until", "2026-11-01"]])
def test_bad_options_are_exit_2(record: Path, tmp_path: Path, run_cli: Any,
                                argv: list[str]) -> None:
    result = run_cli(["history", record, "--out", tmp_path, *argv])
    assert result.code == 2 and len(result.err_lines) == 1


def test_missing_source_is_exit_2(tmp_path: Path, run_cli: Any) -> None:
    result = run_cli(["history", tmp_path / "nope.jsonl", "--out", tmp_path])
    assert result.code == 2 and "not found" in result.err


def test_finding_identity_ignores_feature_order_and_keeps_segment() -> None:
    a = finding_identity({"rule": "vif", "features": ["b", "a"]})
    assert a == finding_identity({"rule": "vif", "features": ["a", "b"]}) == (
        "vif", "feature", ("a", "b"), None)
    assert finding_identity({"rule": "vif", "features": ["a"], "segment": "north"})[3] == "north"


def _document_without_time(folder: Path) -> dict[str, Any]:
    document = json.loads((folder / "history.json").read_text())
    document.pop("generated_at")
    document.pop("notes")
    return document


def test_run_summaries_give_the_same_history_as_the_verdicts(tmp_path: Path,
                                                               run_cli: Any) -> None:
    log = _record(tmp_path)
    summaries = sorted((tmp_path / "verdicts").glob("*.summary"))
    assert len(summaries) == 6
    result = run_cli(["history", log, "--out", tmp_path / "with"])
    assert result.code == 0, result.err
    for path in summaries:  # a log written before summaries: every verdict is read whole
        path.unlink()
    result = run_cli(["history", log, "--out", tmp_path / "without"])
    assert result.code == 0, result.err  # derived data: missing summaries are no record gap
    assert _document_without_time(tmp_path / "with") == \
        _document_without_time(tmp_path / "without")
    notes = json.loads((tmp_path / "without" / "history.json").read_text())["notes"]
    assert any("6 stored run summaries could not be used" in n and "summary missing" in n
               for n in notes)


def test_tampered_summary_is_ignored_and_noted(tmp_path: Path, run_cli: Any) -> None:
    log = _record(tmp_path)
    entry = json.loads(log.read_bytes().split(b"\n")[1])  # run 2 failed
    summary = summary_path(log, entry["verdict"]["sha256"])
    summary.write_bytes(summary.read_bytes().replace(b'"status":"fail"', b'"status":"pass"'))
    result = run_cli(["history", log, "--out", tmp_path / "out"])
    assert result.code == 0, result.err
    document = json.loads((tmp_path / "out" / "history.json").read_text())
    assert document["groups"][0]["runs"][1]["status"] == "fail"  # read from the verdict
    assert any("line 2 (summary altered" in n for n in document["notes"])
    html = (tmp_path / "out" / "history.html").read_text()
    assert "summary altered" in html


def test_pixel_column_decimation_keeps_every_peak_and_trough() -> None:
    """Min/max decimation (checked against a direct per-column loop): every run's value lies
    within its column's drawn range, and the extremes of the whole series are drawn."""
    from gate.artefacts.history_html import _pixel_columns

    rng = np.random.default_rng(5)
    x = np.sort(rng.uniform(0.0, 100.0, 10_000))
    values = rng.lognormal(0.0, 0.3, (10_000, 3))
    values[4_321, 1] = 250.0  # one spike in one run
    values[77, 2] = np.inf  # an exact dependency
    values[500:540, 0] = np.nan  # runs without a value
    line_x, points, infinite, at = _pixel_columns(x, values, 300)
    assert line_x.size == points.shape[0] <= 600 and at.size <= 300
    assert np.nanmax(points[:, 1]) == 250.0
    finite = np.where(np.isfinite(values), values, np.nan)
    assert np.nanmin(points, axis=0).tolist() == np.nanmin(finite, axis=0).tolist()
    assert infinite[:, 2].sum() == 1 and at[infinite[:, 2]][0] <= x[77]
    bins = np.minimum((x / (x.max() - x.min()) * 300).astype(int), 299)
    low, high = points[0::2], points[1::2]
    for column, b in enumerate(np.unique(bins)):
        inside = finite[bins == b]
        np.testing.assert_array_equal(low[column], np.nanmin(inside, axis=0)
                                      if not np.isnan(inside).all() else low[column])
        assert np.all((inside >= low[column]) | np.isnan(inside))
        assert np.all((inside <= high[column]) | np.isnan(inside))
