"""`gate diff` on crafted verdict pairs: what is new, resolved, worsened, and when NEW is worse."""

from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

import pytest

from gate.judge.diff import diff_verdicts


def _finding(rule: str, features: list[str], level: str = "fail", waived: bool = False,
             value: float | None = None) -> dict[str, Any]:
    return {"rule": rule, "level": level, "features": features, "value": value, "limit": 5.0,
            "waived": waived, "waiver": 0 if waived else None,
            "message": f"{rule} on {', '.join(features)}"}


def _verdict(status: str, findings: list[dict[str, Any]], vif: dict[str, float | None],
             pairs: tuple[tuple[str, str, float], ...] = ()) -> dict[str, Any]:
    return {
        "status": status, "features": list(vif),
        "diagnostics": {"vif": vif, "gvif": {}, "pairs": [{"a": a, "b": b, "r": r}
                                                           for a, b, r in pairs]},
        "findings": findings,
    }


BASE = _verdict("warn", [_finding("pairwise_correlation", ["air", "felt"], "warn")],
                {"air": 4.0, "felt": 4.0, "wind": 1.1}, (("air", "felt", 0.86),))


def test_identical_verdicts_are_not_worse() -> None:
    diff = diff_verdicts(BASE, copy.deepcopy(BASE))
    assert not diff.worse and diff.exit_code == 0
    assert diff.new_findings == diff.resolved_findings == []
    assert diff.vif_worsened == diff.correlation_worsened == []


def test_status_rank_increase_is_worse() -> None:
    new = copy.deepcopy(BASE)
    new["status"] = "fail"
    new["findings"].append(_finding("vif", ["air"], value=6.0))
    diff = diff_verdicts(BASE, new)
    assert diff.worse and diff.exit_code == 1
    assert [(f.rule, f.features) for f in diff.new_findings] == [("vif", ["air"])]


def test_improvement_lists_resolved_findings_and_is_not_worse() -> None:
    new = _verdict("pass", [], {"air": 1.5, "wind": 1.1})
    diff = diff_verdicts(BASE, new)
    assert not diff.worse
    assert [f.rule for f in diff.resolved_findings] == ["pairwise_correlation"]
    assert diff.features_removed == ["felt"] and diff.features_added == []


def test_new_unwaived_warning_at_same_status_is_worse() -> None:
    new = copy.deepcopy(BASE)
    new["findings"].append(_finding("condition_number", ["air", "felt"], "warn", value=35.0))
    diff = diff_verdicts(BASE, new)
    assert diff.old_status == diff.new_status == "warn"
    assert diff.worse


def test_new_waived_finding_is_not_worse() -> None:
    new = copy.deepcopy(BASE)
    new["findings"].append(_finding("vif", ["wind"], "fail", waived=True, value=7.0))
    diff = diff_verdicts(BASE, new)
    assert len(diff.new_findings) == 1 and not diff.worse


def test_finding_that_loses_its_waiver_is_worse() -> None:
    old = copy.deepcopy(BASE)
    old["findings"][0]["waived"] = True
    old["status"] = "pass"
    new = copy.deepcopy(BASE)  # same finding, now unwaived (e.g. the waiver expired)
    diff = diff_verdicts(old, new)
    assert [f.features for f in diff.no_longer_waived] == [["air", "felt"]]
    assert diff.worse


def test_feature_order_inside_a_finding_does_not_matter() -> None:
    new = copy.deepcopy(BASE)
    new["findings"][0]["features"] = ["felt", "air"]
    assert diff_verdicts(BASE, new).new_findings == []


def test_worsened_vif_and_correlation() -> None:
    new = copy.deepcopy(BASE)
    new["diagnostics"]["vif"] = {"air": 4.6, "felt": None, "wind": 1.1001}
    new["diagnostics"]["pairs"] = [{"a": "felt", "b": "air", "r": -0.93},
                                   {"a": "wind", "b": "air", "r": 0.81}]
    diff = diff_verdicts(BASE, new)
    # felt became infinite (listed first), air rose 15 %, wind's 0.01 % rise is noise
    assert [(w.subject, w.old, w.new) for w in diff.vif_worsened] == [
        ("felt", 4.0, None), ("air", 4.0, 4.6)]
    pairs = {w.subject: (w.old, w.new) for w in diff.correlation_worsened}
    assert pairs == {"air ~ felt": (0.86, 0.93), "air ~ wind": (None, 0.81)}


def test_infinite_vif_that_stays_infinite_is_not_worsened() -> None:
    old = _verdict("fail", [], {"a": None})
    assert diff_verdicts(old, copy.deepcopy(old)).vif_worsened == []


def _write(tmp_path: Path, name: str, document: dict[str, Any]) -> Path:
    path = tmp_path / name
    path.write_text(json.dumps(document), encoding="utf-8")
    return path


def test_cli_text_and_json(tmp_path: Path, run_cli: Any) -> None:
    worse = copy.deepcopy(BASE)
    worse["status"] = "fail"
    worse["findings"].append(_finding("vif", ["air"], value=6.0))
    old = _write(tmp_path, "old.json", BASE)
    new = _write(tmp_path, "new.json", worse)
    text = run_cli(["diff", old, new])
    assert text.code == 1 and "warn -> fail" in text.out and "WORSE" in text.out
    machine = run_cli(["diff", old, new, "--format", "json"])
    assert machine.code == 1
    document = json.loads(machine.out)
    assert document["worse"] is True and document["new_status"] == "fail"
    assert document["new_findings"][0]["rule"] == "vif"
    back = run_cli(["diff", new, old, "--format", "json"])
    assert back.code == 0 and json.loads(back.out)["worse"] is False


@pytest.mark.parametrize("content", ["not json", "[1, 2]", '{"status": "maybe", "findings": []}'])
def test_cli_rejects_files_that_are_not_verdicts(tmp_path: Path, run_cli: Any,
                                                 content: str) -> None:
    good = _write(tmp_path, "old.json", BASE)
    bad = tmp_path / "bad.json"
    bad.write_text(content, encoding="utf-8")
    result = run_cli(["diff", good, bad])
    assert result.code == 2 and len(result.err_lines) == 1 and "bad.json" in result.err


def test_diff_of_real_verdicts(tmp_path: Path, run_cli: Any, write_table: Any) -> None:
    from conftest import make_clean_frame, make_docks_frame

    clean = write_table(make_clean_frame(), "clean.parquet")
    docks = write_table(make_docks_frame(), "docks.parquet")
    run_cli(["check", clean, "--out", tmp_path / "a", "--quiet"])
    run_cli(["check", docks, "--out", tmp_path / "b", "--quiet"])
    result = run_cli(["diff", tmp_path / "a" / "verdict.json", tmp_path / "b" / "verdict.json"])
    assert result.code == 1 and "pass -> fail" in result.out


def _mixed_frame(seed: int) -> Any:
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(seed)
    mix = np.eye(6) + rng.normal(size=(6, 6)) * (rng.random((6, 6)) < 0.4) * 1.5
    return pd.DataFrame(rng.normal(size=(250, 6)) @ mix, columns=[f"x{i}" for i in range(6)])


def _tables(tmp_path: Path) -> dict[str, tuple[Path, str]]:
    """Every multi-feature table family of the suite that fails, with a policy text."""
    from conftest import make_docks_frame, write_frame

    from gate.examples.bike_share_demand import write_tables

    raw, _ = write_tables(tmp_path / "demo", rows=1_500)
    demo_policy = (Path(__file__).resolve().parents[1] / "examples" /
                   "bike_share_policy.yaml").read_text(encoding="utf-8")
    strict = ("name: strict\nlimits:\n  vif: {max: 5, level: fail}\n"
              "  condition_number: {max: 30, level: fail}\n"
              "  pairwise_correlation: {max: 0.8, level: warn}\n")
    return {
        "docks": (write_frame(make_docks_frame(), tmp_path / "docks.parquet"),
                  strict + "columns: {categorical: [weather_kind]}\n"),
        "demo": (raw, demo_policy),
        "mixed-22": (write_frame(_mixed_frame(22), tmp_path / "mixed22.parquet"), strict),
        "mixed-5": (write_frame(_mixed_frame(5), tmp_path / "mixed5.parquet"), strict),
    }


@pytest.mark.slow
@pytest.mark.parametrize("name", ["docks", "demo", "mixed-22", "mixed-5"])
def test_check_suggest_check_diff_reads_as_improved(name: str, tmp_path: Path,
                                                    run_cli: Any) -> None:
    # The invariant: applying the remedy gate suggests never reads as "worse" in gate diff.
    table, policy_text = _tables(tmp_path)[name]
    policy = tmp_path / "policy.yaml"
    policy.write_text(policy_text, encoding="utf-8")
    before = run_cli(["check", table, "--policy", policy, "--out", tmp_path / "before"])
    assert before.code == 1, before.out + before.err
    fixed = tmp_path / "fixed.yaml"
    proposed = run_cli(["suggest", table, "--policy", policy, "--write-policy", fixed])
    assert proposed.code == 0, proposed.out + proposed.err
    after = run_cli(["check", table, "--policy", fixed, "--out", tmp_path / "after"])
    assert after.code == 0, after.out
    diff = run_cli(["diff", tmp_path / "before" / "verdict.json",
                    tmp_path / "after" / "verdict.json", "--format", "json"])
    assert diff.code == 0, diff.out
    document = json.loads(diff.out)
    assert document["better"] and not document["worse"], document
    assert document["resolved_findings"]


def test_a_verdict_with_a_string_vif_is_refused_in_one_line(tmp_path: Path,
                                                            run_cli: Any) -> None:
    bad = copy.deepcopy(BASE)
    bad["diagnostics"]["vif"]["air"] = "lots"
    old, new = tmp_path / "old.json", tmp_path / "new.json"
    old.write_text(json.dumps(BASE))
    new.write_text(json.dumps(bad))
    result = run_cli(["diff", old, new])
    assert result.code == 2 and "Traceback" not in result.err
    assert result.err.count("\n") == 1 and "not a number" in result.err
