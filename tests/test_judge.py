"""Judging: limits -> findings, waivers (active, expired, stale), status rules, levels off."""

from __future__ import annotations

import datetime as dt
import math
from typing import Any

import numpy as np
import pandas as pd
import pytest

import gate
from gate.judge.findings import Finding, status_of
from gate.judge.verdict import Verdict
from gate.policy.models import Policy

TODAY = dt.date(2026, 12, 2)


def related_frame(rows: int = 200, seed: int = 3) -> pd.DataFrame:
    """Invented energy-use table: heating tracks outdoor temperature closely (VIF ~ 17)."""
    rng = np.random.default_rng(seed)
    outdoor = rng.normal(8, 6, rows)
    return pd.DataFrame({
        "outdoor_c": outdoor,
        "heating_kwh": 40 - 2.0 * outdoor + rng.normal(0, 3, rows),
        "occupants": rng.integers(1, 6, rows).astype(float),
    })


def run(frame: pd.DataFrame, today: dt.date = TODAY, **policy: Any) -> Verdict:
    return gate.check(frame, Policy.model_validate({"name": "judge-test", **policy}),
                      today=today)


def of_rule(verdict: Verdict, rule: str) -> list[Finding]:
    return [f for f in verdict.findings if f.rule == rule]


def waiver(rule: str, features: list[str], expires: dt.date, **extra: Any) -> dict[str, Any]:
    return {"rule": rule, "features": features, "reason": "kept on purpose",
            "owner": "energy-modelling", "expires": expires.isoformat(), **extra}


# --- limits --------------------------------------------------------------------------------

def test_vif_finding_names_feature_value_and_helpers() -> None:
    verdict = run(related_frame())
    findings = of_rule(verdict, "vif")
    assert {f.features for f in findings} == {("outdoor_c",), ("heating_kwh",)}
    for f in findings:
        assert f.level == "fail" and f.limit == 5.0 and not f.waived
        assert f.value == pytest.approx(verdict.vif()[f.features[0]])
        assert f.features[0] in f.message
    assert verdict.status == "fail"


def test_vif_limit_is_strict_and_pair_limit_inclusive() -> None:
    # interface.md: VIF > max breaches; |r| >= max breaches.
    frame = related_frame()
    base = run(frame)
    vif = base.vif()["outdoor_c"]
    r = abs(float(base.diagnostics.correlation[0, 1]))
    assert vif is not None
    at_limit = run(frame, limits={"vif": {"max": vif}, "pairwise_correlation": {"max": r}})
    assert ("outdoor_c",) not in {f.features for f in of_rule(at_limit, "vif")}
    assert ("outdoor_c", "heating_kwh") in {f.features
                                            for f in of_rule(at_limit, "pairwise_correlation")}
    above = run(frame, limits={"pairwise_correlation": {"max": min(1.0, r * (1 + 1e-12))}})
    assert not of_rule(above, "pairwise_correlation")


def test_levels_off_produce_no_findings_and_warn_levels_warn() -> None:
    frame = related_frame()
    off = {"level": "off"}
    verdict = run(frame, limits={"vif": off, "pairwise_correlation": off,
                                 "condition_number": off, "rank_deficiency": off})
    assert verdict.findings == ()
    assert verdict.status == "pass" and verdict.exit_code == 0
    warned = run(frame, limits={"vif": {"level": "warn"}})
    assert {f.level for f in of_rule(warned, "vif")} == {"warn"}
    assert warned.status == "warn" and warned.exit_code == 0


def test_rank_deficiency_findings_read_as_relations(docks_frame: pd.DataFrame) -> None:
    verdict = run(docks_frame, columns={"categorical": ["weather_kind"]})
    messages = [f.message for f in of_rule(verdict, "rank_deficiency")]
    assert any("docks_total = docks_free + docks_in_use" in m for m in messages), messages
    assert any("capacity_copy = docks_total" in m and "duplicate" in m for m in messages)
    assert any("region_code" in m and "constant" in m for m in messages)
    infinite = [f for f in of_rule(verdict, "vif") if f.value is None]
    assert {f.features[0] for f in infinite} == {
        "docks_free", "docks_in_use", "docks_total", "capacity_copy", "region_code"}


def test_more_features_than_rows_is_explained() -> None:
    rng = np.random.default_rng(5)
    frame = pd.DataFrame(rng.normal(size=(4, 6)), columns=[f"meter_{k}" for k in range(6)])
    verdict = run(frame)
    plain = [f for f in of_rule(verdict, "rank_deficiency") if not f.features]
    assert len(plain) == 1
    assert "only 4 rows for 7 design columns" in plain[0].message
    assert verdict.diagnostics.rank == 4
    assert verdict.status == "fail"


def test_dummies_are_judged_as_a_group() -> None:
    rng = np.random.default_rng(8)
    rows = 400
    kind = rng.choice(["mild", "cold", "hot"], rows)
    temp = pd.Series(kind).map({"mild": 12.0, "cold": 0.0, "hot": 25.0}).to_numpy()
    frame = pd.DataFrame({"outdoor_c": temp + rng.normal(0, 0.8, rows), "season_kind": kind,
                          "occupants": rng.integers(1, 6, rows).astype(float)})
    verdict = run(frame)
    vif_features = {f.features for f in of_rule(verdict, "vif")}
    assert ("season_kind",) in vif_features
    assert not any("=" in name for names in vif_features for name in names)
    (group,) = verdict.diagnostics.groups
    finding = next(f for f in of_rule(verdict, "vif") if f.features == ("season_kind",))
    assert finding.value == pytest.approx(group.gvif ** (1 / group.df))


def test_condition_findings_list_involved_features() -> None:
    rng = np.random.default_rng(9)
    rows = 300
    a = rng.normal(100, 1, rows)
    frame = pd.DataFrame({"meter_a": a, "meter_b": a + rng.normal(0, 0.01, rows),
                          "occupants": rng.integers(1, 6, rows).astype(float)})
    verdict = run(frame)
    findings = of_rule(verdict, "condition_number")
    assert findings and findings[0].value is not None and findings[0].value > 30
    assert {"meter_a", "meter_b"} <= set(findings[0].features)
    assert findings[0].level == "warn"


def test_near_dependency_identity_is_stable_and_its_waiver_covers_it() -> None:
    rng = np.random.default_rng(9)
    rows = 300
    a = rng.normal(0, 1, rows)
    frame = pd.DataFrame({"meter_a": a, "occupants": rng.normal(3, 1, rows),
                          "meter_b": a + rng.normal(0, 0.01, rows)})
    policy = {"limits": {"condition_number": {"scaling": "standardized"}}}
    first = of_rule(run(frame, **policy), "condition_number")
    shuffled = of_rule(run(frame.sample(frac=1.0, random_state=4), **policy),
                       "condition_number")
    assert [f.identity for f in first] == [f.identity for f in shuffled]
    assert [f.features for f in first] == [("meter_a", "meter_b")]  # design order
    later = TODAY + dt.timedelta(days=30)
    waived = run(frame, waivers=[waiver("condition_number", ["meter_a", "meter_b"], later)],
                 **policy)
    assert all(f.waived for f in of_rule(waived, "condition_number"))


# --- waivers --------------------------------------------------------------------------------

def test_active_waiver_covers_its_findings_and_status_follows() -> None:
    frame = related_frame()
    verdict = run(frame, waivers=[
        waiver("vif", ["outdoor_c", "heating_kwh"], TODAY + dt.timedelta(days=30)),
        waiver("pairwise_correlation", ["outdoor_c", "heating_kwh"],
               TODAY + dt.timedelta(days=30)),
    ])
    for f in of_rule(verdict, "vif") + of_rule(verdict, "pairwise_correlation"):
        assert f.waived and f.waiver is not None
    (state_vif, state_pair) = verdict.waivers
    assert state_vif.state == "active" and state_vif.covered == 2
    assert state_pair.state == "active" and state_pair.covered == 1
    # Condition-number findings (if any) are warnings: at worst warn, never fail.
    assert verdict.status in ("pass", "warn")
    assert verdict.exit_code == 0


def test_waiver_expiring_today_still_covers() -> None:
    verdict = run(related_frame(), waivers=[waiver("vif", ["outdoor_c", "heating_kwh"], TODAY)])
    assert all(f.waived for f in of_rule(verdict, "vif"))
    assert verdict.waivers[0].state == "active"


def test_expired_waiver_stops_covering_and_warns() -> None:
    expired = TODAY - dt.timedelta(days=1)
    verdict = run(related_frame(), waivers=[waiver("vif", ["outdoor_c", "heating_kwh"], expired)])
    assert not any(f.waived for f in of_rule(verdict, "vif"))
    (notice,) = of_rule(verdict, "waiver")
    assert notice.level == "warn"
    assert expired.isoformat() in notice.message and "expired" in notice.message
    assert verdict.waivers[0].state == "expired"
    assert verdict.status == "fail"


def test_expired_waiver_alone_makes_a_warning() -> None:
    # An expired waiver over a finding of level warn: warn from both.
    expired = TODAY - dt.timedelta(days=400)
    verdict = run(related_frame(), limits={"vif": {"level": "off"}},
                  waivers=[waiver("pairwise_correlation", ["outdoor_c", "heating_kwh"],
                                  expired)])
    assert verdict.status == "warn"
    assert [f.level for f in of_rule(verdict, "waiver")] == ["warn"]


def test_stale_waiver_is_information_only() -> None:
    verdict = run(related_frame(), limits={"vif": {"level": "off"}},
                  waivers=[waiver("rank_deficiency", ["occupants"],
                                  TODAY + dt.timedelta(days=9))])
    (notice,) = of_rule(verdict, "waiver")
    assert notice.level == "info" and "stale" in notice.message
    assert verdict.waivers[0].state == "stale" and verdict.waivers[0].covered == 0


def test_waiver_must_match_rule_and_cover_every_feature() -> None:
    later = TODAY + dt.timedelta(days=30)
    verdict = run(related_frame(), waivers=[
        waiver("vif", ["outdoor_c"], later),  # covers outdoor_c's VIF only
        waiver("pairwise_correlation", ["outdoor_c"], later),  # the pair needs both names
    ])
    by_feature = {f.features: f for f in of_rule(verdict, "vif")}
    assert by_feature[("outdoor_c",)].waived and by_feature[("outdoor_c",)].waiver == 0
    assert not by_feature[("heating_kwh",)].waived
    assert not any(f.waived for f in of_rule(verdict, "pairwise_correlation"))
    assert verdict.waivers[1].state == "stale"
    assert verdict.status == "fail"


def test_waived_findings_are_kept_in_the_verdict() -> None:
    later = TODAY + dt.timedelta(days=30)
    verdict = run(related_frame(), waivers=[waiver("vif", ["outdoor_c", "heating_kwh"], later)])
    document = verdict.to_dict()
    waived = [f for f in document["findings"] if f["waived"]]
    assert {tuple(f["features"]) for f in waived} == {("outdoor_c",), ("heating_kwh",)}
    assert document["waivers"][0]["state"] == "active"


# --- status ---------------------------------------------------------------------------------

def _finding(level: str, waived: bool = False) -> Finding:
    return Finding("vif", level, ("x",), 1.0, 1.0, "m", waived=waived)  # type: ignore[arg-type]


@pytest.mark.parametrize(("levels", "expected"), [
    ([], "pass"),
    ([("info", False)], "pass"),
    ([("warn", False)], "warn"),
    ([("warn", True)], "pass"),
    ([("fail", True), ("warn", False)], "warn"),
    ([("fail", False), ("warn", False), ("info", False)], "fail"),
    ([("fail", True)], "pass"),
])
def test_status_rules(levels: list[tuple[str, bool]], expected: str) -> None:
    assert status_of(tuple(_finding(level, waived) for level, waived in levels)) == expected


def test_exit_codes_and_raise_for_status() -> None:
    failing = run(related_frame())
    assert failing.exit_code == 1 and not failing.passed
    with pytest.raises(gate.GateFailed) as caught:
        failing.raise_for_status()
    assert caught.value.verdict is failing
    passing = run(related_frame(), limits={"vif": {"max": 1000}, "pairwise_correlation":
                                           {"level": "off"}, "condition_number":
                                           {"level": "off"}})
    assert passing.status == "pass" and passing.raise_for_status() is passing
    assert math.isfinite(passing.vif()["outdoor_c"] or math.nan)


def test_a_featureless_finding_is_not_waived_by_a_feature_waiver() -> None:
    # The n <= p finding (and a diffuse condition index) names no feature; a waiver that lists
    # features must not silently cover it (the empty set is a subset of every list).
    rng = np.random.default_rng(5)
    frame = pd.DataFrame(rng.normal(size=(4, 6)), columns=[f"meter_{k}" for k in range(6)])
    later = TODAY + dt.timedelta(days=30)
    verdict = run(frame, waivers=[waiver("rank_deficiency", ["meter_4", "meter_5"], later)])
    plain = [f for f in of_rule(verdict, "rank_deficiency") if not f.features]
    assert len(plain) == 1 and not plain[0].waived
    assert verdict.status == "fail"


def test_effective_rows_never_round_to_zero() -> None:
    # n / VIF (variance of a coefficient grows by VIF): 3,000 / 32,877 = 0.091 rows.
    from gate.judge.rules import effective_rows_label

    assert effective_rows_label(3_000, 32_877.0) == "0.091"
    assert effective_rows_label(3_965, 515.0) == "7.7"
    assert effective_rows_label(3_965, 1.06) == "3,741"


def test_a_waiver_in_use_that_expires_soon_adds_an_information_finding() -> None:
    # Issue 14.4: the owner hears of the expiry before the gate starts failing.
    import datetime as dt_

    from conftest import make_docks_frame

    from gate.api import check
    from gate.judge.rules import WAIVER_EXPIRY_HORIZON_DAYS

    today = dt_.date(2027, 1, 10)
    soon = today + dt_.timedelta(days=12)
    later = today + dt_.timedelta(days=WAIVER_EXPIRY_HORIZON_DAYS + 1)
    for expires, expected in ((soon, 1), (later, 0)):
        policy = Policy.model_validate({"name": "w", "waivers": [{
            "rule": "pairwise_correlation", "features": ["air_temp_c", "felt_temp_c"],
            "reason": "kept on purpose", "owner": "fleet-team", "expires": expires}]})
        verdict = check(make_docks_frame(), policy, today=today)
        notes = [f for f in verdict.findings if f.rule == "waiver" and f.level == "info"
                 and "expires on" in f.message]
        assert len(notes) == expected, [f.message for f in verdict.findings]
        if expected:
            assert notes[0].value == 12.0 and "in 12 days" in notes[0].message
            assert not notes[0].counts  # information: it never changes the status
