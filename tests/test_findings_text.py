"""Findings that lead with the cause (issue 11): auxiliary regressions as equations, one finding
per near dependency, offset advice, text that puts the exact dependency and the next step first,
and one word per concept. Invented data: energy use of buildings, fleet maintenance."""

from __future__ import annotations

import json
import math
import re
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import gate
from gate.artefacts.junit import junit_xml
from gate.artefacts.terminal import first_cause, summary_lines
from gate.diagnose.auxiliary import SHOWN_TERM, auxiliary_for
from gate.judge.findings import LEVELS, level_counts
from gate.judge.rules import removed_text
from gate.judge.verdict import Verdict
from gate.policy.models import Policy

Writer = Callable[..., Path]
CliRunner = Callable[[list[Any]], Any]


def policy(**extra: Any) -> Policy:
    return Policy.model_validate({"name": "findings-test", **extra})


def meters_frame(rows: int = 400, seed: int = 11) -> pd.DataFrame:
    """Invented building-energy table: total_kwh is the sum of three sub-meters plus noise."""
    rng = np.random.default_rng(seed)
    lighting = rng.gamma(4.0, 10.0, rows)
    hvac = rng.normal(200.0, 40.0, rows)
    plug = rng.normal(60.0, 12.0, rows)
    outdoor = rng.normal(12.0, 7.0, rows)
    return pd.DataFrame({
        "lighting_kwh": lighting,
        "hvac_kwh": hvac,
        "plug_kwh": plug,
        "outdoor_c": outdoor,
        "total_kwh": 1.0 * lighting + 1.0 * hvac + 0.98 * plug + 0.31
        + rng.normal(0.0, 0.5, rows),
    })


def aux_of(verdict: Verdict, name: str) -> Any:
    aux = auxiliary_for(verdict.diagnostics, verdict.features.index(name))
    assert aux is not None
    return aux


# --- auxiliary regression against statsmodels OLS / WLS --------------------------------------

def test_auxiliary_regression_matches_statsmodels_ols() -> None:
    frame = meters_frame()
    verdict = gate.check(frame, policy())
    names = verdict.features
    aux = aux_of(verdict, "total_kwh")
    others = [n for n in names if n != "total_kwh"]
    # Reference: statsmodels OLS of the feature on the others with a constant.
    fit = sm.OLS(frame["total_kwh"], sm.add_constant(frame[others])).fit()
    assert aux.intercept == pytest.approx(fit.params["const"], rel=1e-9)
    slopes = dict(zip((names[c] for c in aux.regressors), aux.slopes))
    for name in others:
        assert slopes[name] == pytest.approx(fit.params[name], rel=1e-9, abs=1e-12)
    assert aux.r2 == pytest.approx(fit.rsquared, rel=1e-12)
    assert aux.residual_sd == pytest.approx(math.sqrt(fit.scale), rel=1e-9)


def test_auxiliary_regression_matches_statsmodels_wls_with_weights() -> None:
    frame = meters_frame(seed=5)
    rng = np.random.default_rng(8)
    frame["hours_metered"] = rng.uniform(0.5, 3.0, len(frame))
    verdict = gate.check(frame, policy(columns={"weight": "hours_metered"}))
    names = verdict.features
    others = [n for n in names if n != "hvac_kwh"]
    aux = aux_of(verdict, "hvac_kwh")
    # Reference: statsmodels WLS (weights = the policy's weight column).
    fit = sm.WLS(frame["hvac_kwh"], sm.add_constant(frame[others]),
                 weights=frame["hours_metered"]).fit()
    assert aux.intercept == pytest.approx(fit.params["const"], rel=1e-9)
    slopes = dict(zip((names[c] for c in aux.regressors), aux.slopes))
    for name in others:
        assert slopes[name] == pytest.approx(fit.params[name], rel=1e-8, abs=1e-12)
    assert aux.r2 == pytest.approx(fit.rsquared, rel=1e-10)
    assert aux.residual_sd == pytest.approx(math.sqrt(fit.scale), rel=1e-9)


def test_auxiliary_regression_beside_an_exact_dependency_uses_the_kept_columns() -> None:
    frame = meters_frame(seed=2)
    frame["hvac_mwh"] = frame["hvac_kwh"] / 1000.0  # a duplicate in other units
    verdict = gate.check(frame, policy())
    names = verdict.features
    assert auxiliary_for(verdict.diagnostics, names.index("hvac_mwh")) is None
    aux = aux_of(verdict, "outdoor_c")
    regressors = [names[c] for c in aux.regressors]
    assert "hvac_mwh" not in regressors  # one column per dependency removed
    # Reference: statsmodels OLS on the kept columns (the same span as all the others).
    fit = sm.OLS(frame["outdoor_c"], sm.add_constant(frame[regressors])).fit()
    assert aux.r2 == pytest.approx(fit.rsquared, rel=1e-8, abs=1e-12)
    assert aux.residual_sd == pytest.approx(math.sqrt(fit.scale), rel=1e-9)
    assert aux.intercept == pytest.approx(fit.params["const"], rel=1e-8)


def test_equation_shows_terms_by_the_stated_rule_in_own_units() -> None:
    verdict = gate.check(meters_frame(), policy())
    aux = aux_of(verdict, "total_kwh")
    text = aux.equation(verdict.features)
    assert text.startswith("total_kwh ≈ ")
    # own units, three significant digits: the invented relation is 1, 1 and 0.98
    assert re.search(r"≈ (1\.00|0\.99\d)·hvac_kwh \+ (1\.00|0\.99\d)·lighting_kwh \+ "
                     r"0\.9[78]\d·plug_kwh \+ 0\.\d+ \(R² 0\.999", text), text
    # outdoor_c is unrelated: its standardised coefficient is far below 0.05, so it is left out
    shown = {verdict.features[c] for c, _, _ in aux.shown_terms()}
    assert "outdoor_c" not in shown and "outdoor_c" not in text
    assert all(abs(b) >= SHOWN_TERM for _, _, b in aux.shown_terms())
    assert "1 term with |standardised coefficient| < 0.05 left out" in text
    assert "(-0.00)" not in text and "R² 0.99" in text


def test_vif_finding_leads_with_the_equation_and_never_prints_zero_terms() -> None:
    verdict = gate.check(meters_frame(), policy())
    vif = {f.features[0]: f for f in verdict.findings if f.rule == "vif"}
    message = vif["total_kwh"].message
    assert message.startswith("total_kwh ≈ ")
    assert message.index("≈") < message.index("VIF")
    assert "0.00" not in message.replace("0.005", "")  # no "(−0.00)" helpers
    assert "explained mostly by" not in message


def test_verdict_json_auxiliary_for_breaching_features_and_all_with_full_matrices(
        write_table: Writer, run_cli: CliRunner, tmp_path: Path) -> None:
    table = write_table(meters_frame())
    out = tmp_path / "plain"
    run_cli(["check", table, "--out", out])
    document = json.loads((out / "verdict.json").read_text(encoding="utf-8"))
    auxiliary = document["diagnostics"]["auxiliary"]
    breaching = {f["features"][0] for f in document["findings"] if f["rule"] == "vif"}
    assert set(auxiliary) == breaching and "outdoor_c" not in auxiliary
    record = auxiliary["total_kwh"]
    assert set(record) >= {"r2", "intercept", "coefficients", "residual_sd"}
    # the stated rule: terms with |standardised coefficient| >= 0.05 (outdoor_c is unrelated)
    assert set(record["coefficients"]) == {"lighting_kwh", "hvac_kwh", "plug_kwh"}
    assert record["terms_left_out"] == 1
    full = tmp_path / "full"
    run_cli(["check", table, "--out", full, "--full-matrices"])
    document = json.loads((full / "verdict.json").read_text(encoding="utf-8"))
    assert set(document["diagnostics"]["auxiliary"]) == set(document["features"])


# --- condition indices -----------------------------------------------------------------------

def fleet_frame(rows: int = 300, seed: int = 4) -> pd.DataFrame:
    """Invented fleet-maintenance table with two separate near dependencies."""
    rng = np.random.default_rng(seed)
    km = rng.normal(80_000, 20_000, rows)
    hours = rng.normal(3_000, 700, rows)
    return pd.DataFrame({
        "odometer_km": km,
        "engine_hours": hours,
        "trip_km": km * 0.5 + rng.normal(0, 40, rows),
        "idle_hours": hours * 0.2 + rng.normal(0, 1.0, rows),
        "tyre_age_days": rng.normal(400, 90, rows),
    })


def test_one_finding_per_near_dependency_in_design_order() -> None:
    verdict = gate.check(fleet_frame(), policy(limits={"condition_number": {
        "scaling": "standardized"}}))
    near = [f for f in verdict.findings if f.rule == "condition_number" and f.level != "info"]
    assert {f.features for f in near} == {("odometer_km", "trip_km"),
                                          ("engine_hours", "idle_hours")}
    assert all(f.message.startswith("near dependency among ") for f in near)
    assert all("intercept" not in f.message for f in near)  # standardized: no intercept column


def test_diffuse_indices_merge_into_one_information_finding() -> None:
    rng = np.random.default_rng(9)
    rows, k = 400, 8
    base = rng.normal(size=(rows, k))
    common = rng.normal(size=rows)
    frame = pd.DataFrame(base * 0.12 + common[:, None], columns=[f"zone_{i}_kwh"
                                                                for i in range(k)])
    verdict = gate.check(frame, policy(limits={"condition_number": {
        "scaling": "standardized", "max": 5}, "vif": {"level": "off"}}))
    cond = [f for f in verdict.findings if f.rule == "condition_number"]
    info = [f for f in cond if f.level == "info"]
    breaching = int(np.sum(verdict.diagnostics.condition.indices > 5))
    near = [f for f in cond if f.level != "info"]
    assert breaching >= 2 and len(info) == 1
    assert len(near) + int(info[0].message.split()[0]) == breaching  # every index counted once
    assert info[0].features == () and "diffuse" in info[0].message


def test_offset_driven_index_suggests_centring_or_standardized_scaling() -> None:
    rng = np.random.default_rng(1)
    rows = 500
    epoch = 1.7e9 + rng.uniform(0, 86_400, rows)  # epoch seconds over one day
    frame = pd.DataFrame({"logged_at_s": epoch, "load_kw": rng.normal(50, 5, rows),
                          "fuel_l": rng.normal(30, 4, rows)})
    verdict = gate.check(frame, policy())
    near = [f for f in verdict.findings if f.rule == "condition_number" and f.level != "info"]
    assert len(near) == 1
    message = near[0].message
    assert near[0].features == ("logged_at_s",)
    assert "and the intercept" in message and "logged_at_s sits far from zero" in message
    assert "centre it" in message and "`scaling: standardized`" in message
    standardized = gate.check(frame, policy(limits={"condition_number": {
        "scaling": "standardized"}}))
    assert not [f for f in standardized.findings if f.rule == "condition_number"]


# --- text: cause first, next step, counts ----------------------------------------------------

def test_text_puts_the_dependency_first_then_the_suggest_command(
        write_table: Writer, write_policy: Writer, run_cli: CliRunner, tmp_path: Path) -> None:
    frame = meters_frame()
    frame["site_kwh"] = frame["lighting_kwh"] + frame["hvac_kwh"]  # exact
    table = write_table(frame)
    policy_file = write_policy("policy_version: 1\nname: meters\n")
    result = run_cli(["check", table, "--policy", policy_file, "--chunk-rows", "128",
                      "--out", tmp_path / "out"])
    lines = result.out.splitlines()
    assert result.code == 1
    assert "rank 6 of 7: 1 exact dependency" in lines[1]
    assert "condition number ∞ (" in lines[1] and removed_text(1) in lines[1]
    first = lines[3]
    assert "exact dependency: site_kwh = " in first and "so VIF ∞ for" in first
    assert lines[4].startswith("  next: gate suggest ")
    assert f"{table} --policy {policy_file} --chunk-rows 128" in lines[4]
    counts = level_counts(gate.check(frame, policy()).findings)
    assert f"{counts['fail']} fail, {counts['warn']} warn, {counts['info']} info" in lines[2]


def test_negative_r_reads_move_in_opposite_directions() -> None:
    rng = np.random.default_rng(6)
    heat = rng.normal(100, 20, 300)
    frame = pd.DataFrame({"heating_kwh": heat, "outdoor_c": 30 - heat / 5
                          + rng.normal(0, 1.5, 300), "occupants": rng.normal(4, 1, 300)})
    verdict = gate.check(frame, policy(limits={"vif": {"max": 50}}))
    pair = [f for f in verdict.findings if f.rule == "pairwise_correlation"]
    assert len(pair) == 1 and pair[0].value is not None and pair[0].value < 0
    assert "heating_kwh and outdoor_c move in opposite directions: r = -0." in pair[0].message


def test_information_findings_are_never_cut_and_counts_add_up() -> None:
    rng = np.random.default_rng(12)
    rows = 300
    cols = {f"meter_{i}": rng.normal(size=rows) for i in range(12)}
    frame = pd.DataFrame(cols)
    for i in range(12):  # 12 near-duplicate pairs: more fail/warn findings than are shown
        frame[f"meter_{i}_copy"] = frame[f"meter_{i}"] + rng.normal(0, 0.05, rows)
    waivers = [{"rule": "vif", "features": [f"unused_{i}"], "reason": "old",
                "owner": "fleet", "expires": "2099-01-01"} for i in range(3)]
    verdict = gate.check(frame, policy(waivers=waivers))
    lines = summary_lines(verdict)
    info = [f for f in verdict.findings if f.level == "info" and not f.waived]
    assert len(info) >= 3
    for f in info:
        assert any(f.message in line for line in lines)
    more = [line for line in lines if line.startswith("  ... and ")]
    assert len(more) == 1
    listed = sum(1 for line in lines if line.startswith("  [")) + int(more[0].split()[2])
    counts = level_counts(verdict.findings)
    assert listed == sum(counts[level] for level in LEVELS)


def test_check_files_shows_each_tables_first_cause(write_table: Writer,
                                                   run_cli: CliRunner, tmp_path: Path) -> None:
    frame = meters_frame()
    frame["site_kwh"] = frame["lighting_kwh"] + frame["hvac_kwh"]
    bad = write_table(frame, "bad.parquet")
    good = write_table(meters_frame().drop(columns=["total_kwh"]), "good.parquet")
    result = run_cli(["check-files", bad, good, "--out", tmp_path / "out"])
    lines = result.out.splitlines()
    assert result.code == 1
    assert lines[0].startswith("FAIL") and "fail, " in lines[0] and " info, " in lines[0]
    assert "exact dependency: site_kwh = " in lines[1]  # the cause, not "VIF is infinite"
    assert lines[2].startswith("PASS") and "0 fail, 0 warn" in lines[2]
    assert first_cause(gate.check(frame, policy())) == lines[1].strip()


# --- one word per concept --------------------------------------------------------------------

def test_condition_number_after_removing_dependencies_reads_the_same_everywhere() -> None:
    frame = meters_frame()
    frame["site_kwh"] = frame["lighting_kwh"] + frame["hvac_kwh"]
    verdict = gate.check(frame, policy(limits={"condition_number": {"max": 2}}))
    document = verdict.to_dict()["diagnostics"]
    assert document["condition_number"] is None  # interface: null = rank deficient (infinite)
    value = document["condition_number_after_removing_dependencies"]
    assert value == pytest.approx(float(verdict.diagnostics.condition.indices[-1]))
    phrase = removed_text(1)
    cond = [f for f in verdict.findings if f.rule == "condition_number"]
    assert cond and all(phrase in f.message for f in cond)
    assert phrase in summary_lines(verdict)[1]
    assert phrase in junit_xml(verdict)


def test_gvif_fields_name_what_is_judged_and_the_se_factor() -> None:
    rng = np.random.default_rng(3)
    rows = 300
    kind = rng.choice(["diesel", "electric", "hybrid"], rows)
    frame = pd.DataFrame({"fuel_kind": kind, "range_km": np.where(kind == "electric", 300, 700)
                          + rng.normal(0, 30, rows), "payload_kg": rng.normal(900, 100, rows)})
    verdict = gate.check(frame, policy(columns={"categorical": ["fuel_kind"]}))
    record = verdict.to_dict()["diagnostics"]["gvif"]["fuel_kind"]
    # Fox & Monette (1992): GVIF^(1/df) is judged, GVIF^(1/(2 df)) scales standard errors.
    assert record["vif_equivalent"] == pytest.approx(record["gvif"] ** (1 / record["df"]))
    assert record["se_inflation"] == pytest.approx(record["gvif"] ** (1 / (2 * record["df"])))
    assert record["gvif_adjusted"] == record["se_inflation"]  # interface v1 name


def test_infinity_is_never_a_huge_number_in_text() -> None:
    frame = meters_frame()
    frame["site_kwh"] = frame["lighting_kwh"] + frame["hvac_kwh"]
    verdict = gate.check(frame, policy())
    text = "\n".join(summary_lines(verdict))
    assert "inf" not in text.replace("infinite", "").replace("info", "")
    assert "e+1" not in text
    assert "VIF ∞" in text


# --- identifier-like features ------------------------------------------------------------------

def test_row_numbers_and_dense_distinct_integers_look_like_identifiers() -> None:
    rng = np.random.default_rng(0)
    rows = 500
    frame = pd.DataFrame({
        "row_no": np.arange(1, rows + 1),
        "row_no_float": rng.permutation(np.arange(rows)).astype(float) + 7.0,  # shuffled
        "vehicle_id": rng.permutation(np.arange(10_000, 10_000 + 2 * rows))[:rows],
        "odometer_km": rng.integers(0, 200_000, rows),  # wide integer measurement: not an id
        "service_count": rng.integers(0, 12, rows),  # repeats: not an id
        "load_t": rng.normal(10, 2, rows),
    })
    verdict = gate.check(frame, policy(limits={"condition_number": {"level": "off"}}))
    found = {f.features[0]: f for f in verdict.findings if f.rule == "identifier"}
    assert set(found) == {"row_no", "row_no_float", "vehicle_id"}
    assert all(f.level == "info" and not f.counts for f in found.values())
    assert "a row number" in found["row_no"].message
    assert "a row number" in found["row_no_float"].message
    assert "distinct integers" in found["vehicle_id"].message
    assert all("looks like an identifier" in f.message and "columns.exclude" in f.message
               for f in found.values())
    assert verdict.status == "pass"  # information never changes the status


def test_row_number_moment_rule_is_exact() -> None:
    from gate.diagnose.identifiers import is_row_number

    values = np.arange(3, 103, dtype=float)
    norm = float(np.linalg.norm(values - values.mean()))
    assert is_row_number(100, float(values.mean()), norm)
    assert not is_row_number(100, float(values.mean()) + 0.5, norm)  # offset not an integer
    gapped = np.delete(np.arange(3, 104, dtype=float), 50)  # one gap: variance too large
    assert not is_row_number(100, float(gapped.mean()),
                             float(np.linalg.norm(gapped - gapped.mean())))


def test_without_policy_stderr_names_the_packaged_policy(write_table: Writer,
                                                         run_cli: CliRunner,
                                                         tmp_path: Path) -> None:
    table = write_table(meters_frame())
    result = run_cli(["check", table, "--out", tmp_path / "out", "--format", "json"])
    assert "no --policy given: the packaged policy 'default' applies" in result.err
    assert "every numeric column is a feature" in result.err
    assert json.loads(result.out)["status"] == "fail"  # stdout stays the document alone
    with_policy = run_cli(["check", table, "--out", tmp_path / "out2", "--policy",
                           str(Path(gate.__file__).parent / "policies" / "default.yaml")])
    assert "no --policy given" not in with_policy.err
    quiet = run_cli(["check", table, "--out", tmp_path / "out3", "--quiet"])
    assert (quiet.out, quiet.err) == ("", "")  # --quiet: nothing at all


def test_json_on_stdout_matches_the_file_with_full_matrices(write_table: Writer,
                                                            run_cli: CliRunner,
                                                            tmp_path: Path) -> None:
    table = write_table(meters_frame())
    out = tmp_path / "out"
    result = run_cli(["check", table, "--out", out, "--full-matrices", "--format", "json"])
    printed = json.loads(result.out)["diagnostics"]["auxiliary"]
    written = json.loads((out / "verdict.json").read_text(encoding="utf-8"))
    assert printed == written["diagnostics"]["auxiliary"]
    assert set(printed) == set(written["features"])


def test_offset_index_matches_the_svd_of_the_intercept_and_the_column() -> None:
    from gate.judge.rules import offset_index

    rng = np.random.default_rng(21)
    year = rng.integers(2001, 2025, 400).astype(float)
    frame = pd.DataFrame({"model_year": year, "load_t": rng.normal(10, 2, 400)})
    verdict = gate.check(frame, policy())
    # Reference: numpy SVD of [1, x] with unit-length columns (Belsley, Kuh & Welsch scaling).
    design = np.column_stack([np.ones_like(year), year])
    design /= np.linalg.norm(design, axis=0)
    mu = np.linalg.svd(design, compute_uv=False)
    assert offset_index(verdict.diagnostics, 0) == pytest.approx(mu[0] / mu[-1], rel=1e-9)


def test_left_out_terms_are_held_at_their_means() -> None:
    rng = np.random.default_rng(30)
    rows = 400
    frame = meters_frame(rows)
    frame["logged_at_s"] = 1.7e9 + rng.uniform(0, 86_400, rows)  # unrelated, huge mean
    verdict = gate.check(frame, policy(limits={"condition_number": {"level": "off"}}))
    aux = aux_of(verdict, "total_kwh")
    names = verdict.features
    shown = aux.shown_terms()
    assert "logged_at_s" not in {names[c] for c, _, _ in shown}
    # the shown equation passes through the means, as the least-squares fit does
    at_means = aux.shown_intercept() + sum(s * frame[names[c]].mean() for c, s, _ in shown)
    assert at_means == pytest.approx(frame["total_kwh"].mean(), rel=1e-9)
    record = verdict.to_dict()["diagnostics"]["auxiliary"]["total_kwh"]
    assert record["intercept"] == pytest.approx(aux.shown_intercept())
    assert abs(record["intercept"]) < 10  # not the -O(1e3) a dropped epoch term leaves
