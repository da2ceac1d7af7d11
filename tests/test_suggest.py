"""gate suggest: smallest drop sets, exact vs greedy, keep/prefer, dependencies, policy rewrite.

References: brute force over every subset with numpy's inverse of the sample correlation matrix
(VIF_j = [C^-1]_jj, numerics.md), and the gate itself re-run on the rewritten policy.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from gate.api import check
from gate.errors import DesignError
from gate.policy.models import Policy, escape_glob, load_policy, parse_policy
from gate.remedies.policy_edit import policy_with_exclusions
from gate.remedies.search import suggest

SEED = 20261202
VIF_ONLY = Policy.model_validate({"name": "vif-only", "limits": {
    "vif": {"max": 5.0, "level": "fail"}, "pairwise_correlation": {"level": "off"},
    "condition_number": {"level": "off"}}})


def frame_with_covariance(cov: np.ndarray, names: Sequence[str], rows: int = 400,
                          seed: int = SEED) -> pd.DataFrame:
    """Invented rows whose sample covariance is exactly ``cov`` (whitened, then coloured)."""
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(rows, len(names)))
    z -= z.mean(axis=0)
    q, _ = np.linalg.qr(z)  # orthonormal columns, each with zero mean
    return pd.DataFrame(q * np.sqrt(rows - 1) @ np.linalg.cholesky(cov).T, columns=list(names))


def vifs(corr: np.ndarray) -> np.ndarray:
    return np.diag(np.linalg.inv(corr))


def feasible(corr: np.ndarray, keep: list[int], limit: float = 5.0) -> bool:
    return not keep or bool(vifs(corr[np.ix_(keep, keep)]).max() <= limit)


def brute_force_minimum(corr: np.ndarray, limit: float = 5.0) -> list[tuple[int, ...]]:
    """Every minimum-size drop set (reference: numpy inverse on each subset)."""
    p = corr.shape[0]
    for size in range(p + 1):
        hits = [drop for drop in itertools.combinations(range(p), size)
                if feasible(corr, [j for j in range(p) if j not in drop], limit)]
        if hits:
            return hits
    return []


def plain_greedy(corr: np.ndarray, limit: float = 5.0) -> list[int]:
    """The textbook rule: drop the highest VIF until every VIF is at most the limit."""
    kept = list(range(corr.shape[0]))
    dropped: list[int] = []
    while True:
        v = vifs(corr[np.ix_(kept, kept)])
        if v.max() <= limit:
            return dropped
        dropped.append(kept.pop(int(np.argmax(v))))


# Crafted structure (invented bike-share features over two latent drivers, air temperature T and
# station activity A, unit variance each):
#   feels_like_c  = T + e (var 0.30)        temp_c        = T + e (var 0.05)
#   docks_in_use  = A + e (var 0.10)        comfort_score = T + 0.25 A + e (var 0.50)
#   demand_index  = 0.5 T + A + e (var 0.10)
# demand_index has the highest VIF, but dropping it leaves temp_c above 5; dropping docks_in_use
# alone brings every VIF under 5. Greedy needs two drops, the optimum one.
CRAFTED_NAMES = ("feels_like_c", "docks_in_use", "temp_c", "comfort_score", "demand_index")
LOADINGS = np.array([[1, 0], [0, 1], [1, 0], [1, 0.25], [0.5, 1]])
NOISE = np.array([0.30, 0.10, 0.05, 0.50, 0.10])


@pytest.fixture
def crafted() -> pd.DataFrame:
    return frame_with_covariance(LOADINGS @ LOADINGS.T + np.diag(NOISE), CRAFTED_NAMES)


def test_exact_search_beats_greedy_on_crafted_structure(crafted: pd.DataFrame) -> None:
    corr = np.corrcoef(crafted.to_numpy(), rowvar=False)
    # the construction does what it claims (numpy reference)
    minimum = brute_force_minimum(corr)
    assert [tuple(CRAFTED_NAMES[j] for j in d) for d in minimum] == [("docks_in_use",)]
    assert [CRAFTED_NAMES[j] for j in plain_greedy(corr)] == ["demand_index", "temp_c"]

    verdict = check(crafted, VIF_ONLY)
    assert verdict.status == "fail"
    exact = suggest(verdict, method="exact")
    greedy = suggest(verdict, method="greedy")
    assert exact.drops == ("docks_in_use",) and exact.exhaustive and exact.solved
    assert set(greedy.drops) == {"demand_index", "temp_c"} and greedy.solved
    assert len(exact.drops) < len(greedy.drops)
    assert greedy.lower_bound <= len(exact.drops)
    assert suggest(verdict).method == "exact"  # 5 candidates <= 20: auto is exact
    # the step report shows the VIF falling under the limit
    step = exact.steps[0]
    assert step.max_vif_before > 5.0 >= step.max_vif_after
    assert step.condition_before is not None and step.condition_after is not None
    assert check(crafted.drop(columns=list(exact.drops)), VIF_ONLY).status == "pass"


def test_keep_is_never_dropped(crafted: pd.DataFrame) -> None:
    verdict = check(crafted, VIF_ONLY)
    result = suggest(verdict, keep=["docks_in_use"])
    assert "docks_in_use" not in result.drops and result.solved
    corr = np.corrcoef(crafted.to_numpy(), rowvar=False)
    # reference: the smallest sets that keep docks_in_use have two members
    p = len(CRAFTED_NAMES)
    keeping = [d for size in range(p + 1) for d in itertools.combinations(range(p), size)
               if 1 not in d and feasible(corr, [j for j in range(p) if j not in d])]
    assert len(result.drops) == min(len(d) for d in keeping) == 2
    assert check(crafted.drop(columns=list(result.drops)), VIF_ONLY).status == "pass"


def near_pair_frame(rows: int = 500) -> pd.DataFrame:
    """Invented: station_load and dock_pressure are near-duplicates; humidity is unrelated."""
    rng = np.random.default_rng(SEED)
    load = rng.normal(size=rows)
    return pd.DataFrame({"station_load": load,
                         "dock_pressure": load + rng.normal(0, 0.05, rows),
                         "humidity_pct": rng.normal(60, 10, rows)})


def test_preference_order_decides_ties() -> None:
    frame = near_pair_frame()
    verdict = check(frame, VIF_ONLY)
    first = suggest(verdict, prefer=["station_load", "dock_pressure"])
    second = suggest(verdict, prefer=["dock_pressure", "station_load"])
    assert first.drops == ("dock_pressure",)
    assert second.drops == ("station_load",)
    # a listed feature outranks an unlisted one: unlisted count as least important
    only = suggest(verdict, prefer=["dock_pressure"])
    assert only.drops == ("station_load",)


def schur_trace(corr: np.ndarray, drop: tuple[int, ...]) -> float:
    """trace(C_DD - C_DK C_KK^-1 C_KD) by numpy's solve (the documented loss)."""
    kept = [j for j in range(corr.shape[0]) if j not in drop]
    d = list(drop)
    c_kd = corr[np.ix_(kept, d)]
    return float(np.trace(corr[np.ix_(d, d)] - c_kd.T @ np.linalg.solve(
        corr[np.ix_(kept, kept)], c_kd)))


def test_without_preference_lowest_loss_of_explained_variance_wins() -> None:
    # four related temperature readings: several minimum drop sets, their losses differ.
    rng = np.random.default_rng(SEED + 1)
    base = rng.normal(size=800)
    frame = pd.DataFrame({"temp_c": base + rng.normal(0, 0.10, 800),
                          "feels_like_c": base + rng.normal(0, 0.15, 800),
                          "ground_temp_c": base + rng.normal(0, 0.40, 800),
                          "humidity_pct": rng.normal(60, 10, 800)})
    corr = np.corrcoef(frame.to_numpy(), rowvar=False)
    valid = brute_force_minimum(corr)
    assert len(valid) > 1  # a real tie on size
    losses = {d: schur_trace(corr, d) for d in valid}
    expected = min(losses, key=losses.__getitem__)
    result = suggest(check(frame, VIF_ONLY))
    assert set(result.drops) == {frame.columns[j] for j in expected}
    assert result.loss == pytest.approx(losses[expected], rel=1e-9)
    if len(expected) == 1:  # a single drop's loss is 1 / VIF_j in the full design
        assert result.loss == pytest.approx(1.0 / vifs(corr)[expected[0]], rel=1e-9)


def test_exact_dependencies_first_one_column_each(docks_frame: pd.DataFrame) -> None:
    policy = parse_policy("policy_version: 1\nname: t\ncolumns:\n  categorical: [weather_kind]\n")
    verdict = check(docks_frame, policy)
    dependencies = len(verdict.diagnostics.dependencies)
    result = suggest(verdict)
    by_dependency = [s for s in result.steps if s.reason.startswith("exact dependency")]
    assert len(by_dependency) == dependencies
    assert "region_code" in result.drops  # the constant has only itself to drop
    assert result.solved
    after = check(docks_frame.drop(columns=list(result.drops)), policy)
    assert after.diagnostics.dependencies == () and after.status != "fail"


def test_categorical_group_drops_as_a_whole() -> None:
    rng = np.random.default_rng(SEED + 2)
    kinds = rng.choice(["clear", "rain", "snow"], 600)
    frame = pd.DataFrame({"weather_kind": kinds,
                          "is_rain": (kinds == "rain").astype(float),
                          "temp_c": rng.normal(12, 5, 600)})
    verdict = check(frame, VIF_ONLY)
    result = suggest(verdict, keep=["is_rain"])
    assert result.drops == ("weather_kind",)
    assert not any(name.startswith("weather_kind=") for name in result.kept)
    with pytest.raises(DesignError, match="categorical column 'weather_kind'"):
        suggest(verdict, keep=["weather_kind=rain"])
    with pytest.raises(DesignError, match="not a feature"):
        suggest(verdict, keep=["no_such_feature"])


def many_pairs_frame(pairs: int = 11, rows: int = 600) -> pd.DataFrame:
    rng = np.random.default_rng(SEED + 3)
    columns: dict[str, np.ndarray] = {}
    for k in range(pairs):
        base = rng.normal(size=rows)
        columns[f"dock_{k}_free"] = base
        columns[f"dock_{k}_free_lagged"] = base + rng.normal(0, 0.05, rows)
    return pd.DataFrame(columns)


def test_greedy_above_the_exact_limit_states_a_bound() -> None:
    frame = many_pairs_frame()
    policy = Policy.model_validate({"name": "pairs", "limits": {
        "vif": {"max": 5.0, "level": "fail"},
        "pairwise_correlation": {"max": 0.9, "level": "fail"},
        "condition_number": {"level": "off"}}})
    verdict = check(frame, policy)
    result = suggest(verdict)
    assert len(result.candidates) == 22 and result.method == "greedy"
    # 11 disjoint breached pairs: at least 11 drops; greedy reaches the bound, so it is optimal
    assert result.lower_bound == 11 and len(result.drops) == 11 and result.exhaustive
    assert check(frame.drop(columns=list(result.drops)), policy).status == "pass"


def test_node_budget_falls_back_to_greedy(crafted: pd.DataFrame) -> None:
    result = suggest(check(crafted, VIF_ONLY), method="exact", max_nodes=1)
    assert result.solved and not result.exhaustive
    assert any("stopped after 1 nodes" in note for note in result.notes)


def test_nothing_to_drop_on_a_passing_table(clean_frame: pd.DataFrame) -> None:
    result = suggest(check(clean_frame))
    assert result.drops == () and result.solved and result.method == "none"


# --- policy rewrite ---------------------------------------------------------------------------

POLICY_BLOCK = """\
# station demand policy
policy_version: 1
name: block-style
columns:
  include: ["*"]
  exclude:
    - station_id   # an identifier
  categorical: []
limits:
  vif: {max: 5, level: fail}
"""
POLICY_NO_EXCLUDE = """\
policy_version: 1
name: no-exclude
columns:
  include: ["*"]
"""
POLICY_NO_COLUMNS = """\
policy_version: 1
name: no-columns  # comment kept
"""


@pytest.mark.parametrize("text", [POLICY_BLOCK, POLICY_NO_EXCLUDE, POLICY_NO_COLUMNS])
def test_policy_rewrite_layouts_keep_comments(text: str) -> None:
    out = policy_with_exclusions(text, ["dock_pressure", "odd[name]*"], "dropped by a test")
    policy = parse_policy(out)
    assert {"dock_pressure", escape_glob("odd[name]*")} <= set(policy.columns.exclude)
    assert "# dropped by a test" in out
    for line in text.splitlines():
        if "#" in line:
            assert line in out  # comments survive the in-place edit
    if text is POLICY_BLOCK:
        assert "station_id" in policy.columns.exclude


def test_escaped_glob_matches_only_the_name() -> None:
    import fnmatch

    pattern = escape_glob("odd[name]*?")
    assert fnmatch.fnmatchcase("odd[name]*?", pattern)
    assert not fnmatch.fnmatchcase("oddn", pattern)


def test_cli_write_policy_round_trip(tmp_path: Path, crafted: pd.DataFrame,
                                     run_cli: Callable[..., object]) -> None:
    table = tmp_path / "station_features.parquet"
    crafted.to_parquet(table)
    policy_path = tmp_path / "policy.yaml"
    policy_path.write_text("# demand features\npolicy_version: 1\nname: crafted\n"
                           "columns:\n  exclude: [rentals]  # the target\n"
                           "limits:\n  vif: {max: 5, level: fail}\n"
                           "  pairwise_correlation: {level: \"off\"}\n"
                           "  condition_number: {level: \"off\"}\n")
    out = tmp_path / "policy.suggested.yaml"
    result = run_cli(["suggest", str(table), "--policy", str(policy_path),
                      "--write-policy", str(out)])
    assert result.code == 0, result.err  # type: ignore[attr-defined]
    assert "drop docks_in_use" in result.out  # type: ignore[attr-defined]
    text = out.read_text()
    assert "# the target" in text and "gate suggest" in text
    rewritten = load_policy(out)
    assert "docks_in_use" in rewritten.columns.exclude
    assert check(table, rewritten).status == "pass"
    assert check(table, policy_path).status == "fail"


def test_cli_prefer_file_and_errors(tmp_path: Path, run_cli: Callable[..., object]) -> None:
    table = tmp_path / "pairs.csv"
    near_pair_frame().to_csv(table, index=False)
    prefer = tmp_path / "importance.txt"
    prefer.write_text("# most important first\ndock_pressure\nstation_load\n")
    result = run_cli(["suggest", str(table), "--prefer", str(prefer)])
    assert result.code == 0 and "drop station_load" in result.out  # type: ignore[attr-defined]
    prefer.write_text("dock_pressure\nno_such_feature\n")
    bad = run_cli(["suggest", str(table), "--prefer", str(prefer)])
    assert bad.code == 2 and "no_such_feature" in bad.err  # type: ignore[attr-defined]
    assert len(bad.err_lines) == 1  # type: ignore[attr-defined]
    twice = tmp_path / "twice.txt"
    twice.write_text("dock_pressure\ndock_pressure\n")
    dup = run_cli(["suggest", str(table), "--prefer", str(twice)])
    assert dup.code == 2 and "line 2" in dup.err  # type: ignore[attr-defined]
    kept = run_cli(["suggest", str(table), "--keep", "dock_pressure,station_load"])
    assert kept.code == 1 and "not solved" in kept.out  # type: ignore[attr-defined]


def test_condition_number_at_fail_level_uses_the_belsley_scaling() -> None:
    # service_year sits far from zero with a small spread: with the intercept, the unit-length
    # scaled design is ill-conditioned (Belsley, Kuh & Welsch 1980) although no VIF is large.
    rng = np.random.default_rng(SEED + 4)
    rows = 1_000
    frame = pd.DataFrame({"service_year": rng.integers(2024, 2027, rows).astype(float),
                          "odometer_kkm": rng.normal(80, 20, rows),
                          "brake_wear_pct": rng.normal(40, 10, rows)})
    policy = Policy.model_validate({"name": "cond", "limits": {
        "condition_number": {"max": 30, "level": "fail"}, "vif": {"max": 5, "level": "fail"}}})
    verdict = check(frame, policy)
    assert verdict.status == "fail" and max(verdict.vif().values()) < 1.1  # type: ignore[type-var]
    result = suggest(verdict)
    assert result.drops == ("service_year",) and result.method == "exact"
    step = result.steps[0]
    assert step.condition_before is not None and step.condition_before > 30
    assert step.condition_after is not None and step.condition_after <= 30
    after = check(frame.drop(columns="service_year"), policy)
    assert after.status == "pass"
    assert after.diagnostics.condition_number == pytest.approx(step.condition_after, rel=1e-9)


def _excluding(policy: Policy, drops: Sequence[str]) -> Policy:
    columns = policy.columns.model_copy(update={
        "exclude": list(policy.columns.exclude) + [escape_glob(d) for d in drops]})
    return policy.model_copy(update={"columns": columns})


def test_keep_of_a_breaching_feature_gives_a_set_that_passes_check() -> None:
    # Regression (issue 9.1): a --keep feature that itself breaches the VIF limit was never
    # evaluated on the reduced route, so suggest printed a set that `gate check` then failed.
    # Invented mixing of seven N(0, 1) columns; seed found by a search for this failure.
    rng = np.random.default_rng(22)
    n, p = 300, 7
    z = rng.normal(size=(n, p))
    mix = np.eye(p) + rng.normal(size=(p, p)) * (rng.random((p, p)) < 0.35) * 1.5
    frame = pd.DataFrame(z @ mix, columns=[f"x{i}" for i in range(p)])
    verdict = check(frame, VIF_ONLY)
    assert verdict.vif()["x0"] > 5.0  # the kept feature breaches
    result = suggest(verdict, keep=["x0"], method="exact")
    assert result.solved and "x0" not in result.drops
    # The reference: brute force over every drop set that keeps x0 (numpy inverse).
    names = list(frame.columns)
    corr = np.corrcoef(frame.to_numpy().T)
    best = min(len(drop) for size in range(len(names))
               for drop in itertools.combinations(range(1, len(names)), size)
               if feasible(corr, [j for j in range(len(names)) if j not in drop]))
    assert len(result.drops) == best
    again = check(frame, _excluding(VIF_ONLY, result.drops))
    assert again.status != "fail", [f.message for f in again.findings]


def test_a_kept_feature_driven_by_an_unflagged_categorical_is_solved() -> None:
    # Regression (issue 9.2): the driver of a kept breaching feature is a categorical whose
    # GVIF^(1/df) is under the limit, so it was never a candidate: "drop 0 ... not solved".
    rng = np.random.default_rng(SEED + 1)
    n = 800
    kind = rng.choice(["dock", "street", "hub", "depot"], size=n)
    load = 2.0 * (kind == "hub") + 0.25 * rng.normal(size=n)
    frame = pd.DataFrame({"load": load, "kind": kind, "temp": rng.normal(size=n)})
    policy = VIF_ONLY.model_copy(update={"columns": VIF_ONLY.columns.model_copy(
        update={"categorical": ["kind"]})})
    verdict = check(frame, policy)
    assert verdict.vif()["load"] > 5.0
    assert verdict.diagnostics.groups[0].vif_scale <= 5.0  # the categorical is not flagged
    result = suggest(verdict, keep=["load"])
    assert result.solved and result.drops == ("kind",), result.lines()
    assert check(frame, _excluding(policy, result.drops)).status != "fail"


def test_no_set_exists_names_the_constraint_and_is_exhaustive() -> None:
    # A kept pair of near-duplicates: nothing droppable can help.
    rng = np.random.default_rng(SEED + 2)
    n = 300
    x = rng.normal(size=n)
    frame = pd.DataFrame({"x": x, "x2": x + 0.01 * rng.normal(size=n),
                          "z": rng.normal(size=n)})
    result = suggest(check(frame, VIF_ONLY), keep=["x", "x2"])
    assert not result.solved and result.exhaustive
    assert any("while keeping x, x2" in note for note in result.notes), result.notes


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1), keep_first=st.booleans())
def test_property_a_printed_set_always_passes_check(seed: int, keep_first: bool) -> None:
    # The contract of suggest: whatever set it prints as solved passes `gate check`.
    rng = np.random.default_rng(seed)
    n, p = 200, 6
    mix = np.eye(p) + rng.normal(size=(p, p)) * (rng.random((p, p)) < 0.4) * 1.5
    frame = pd.DataFrame(rng.normal(size=(n, p)) @ mix, columns=[f"x{i}" for i in range(p)])
    verdict = check(frame, VIF_ONLY)
    keep = ["x0"] if keep_first else []
    result = suggest(verdict, keep=keep)
    if result.solved:
        again = check(frame, _excluding(VIF_ONLY, result.drops))
        assert again.status != "fail", (result.drops, [f.message for f in again.findings])
    else:
        assert keep, "without --keep some set (every feature but one) always passes"


# --- wording (issue 11, item 9) ----------------------------------------------------------------

def test_headline_counts_features_and_categorical_columns() -> None:
    # Invented depot data: a categorical whose dummies a numeric column reproduces, and a pair of
    # near-duplicate odometer readings.
    rng = np.random.default_rng(SEED + 10)
    n = 900
    depot = rng.choice(["north", "south", "east", "west", "hub"], n)
    odometer = rng.normal(80, 20, n)
    frame = pd.DataFrame({"depot": depot,
                          "depot_code": pd.Series(depot).map(
                              {"north": 0.0, "south": 1.0, "east": 2.0, "west": 3.0,
                               "hub": 4.0}).to_numpy() + rng.normal(0, 0.05, n),
                          "odometer_kkm": odometer,
                          "odometer_dash_kkm": odometer + rng.normal(0, 0.5, n),
                          "oil_temp_c": rng.normal(90, 5, n)})
    policy = VIF_ONLY.model_copy(update={"columns": VIF_ONLY.columns.model_copy(
        update={"categorical": ["depot"]})})
    verdict = check(frame, policy)
    both = suggest(verdict, keep=["depot_code"])
    assert "depot" in both.drops and len(both.drops) == 2 and both.solved
    assert both.headline().startswith(
        "drop 1 feature and 1 categorical column (4 dummies): "), both.headline()
    only_group = suggest(check(frame.drop(columns="odometer_dash_kkm"), policy),
                         keep=["depot_code"])
    assert only_group.headline() == "drop 1 categorical column (4 dummies): depot"
    features = suggest(check(frame.drop(columns="depot"), VIF_ONLY))
    assert features.headline() == f"drop 1 feature: {features.drops[0]}"
    two = suggest(check(many_pairs_frame(pairs=2), VIF_ONLY))
    assert two.headline().startswith("drop 2 features: ")
    assert suggest(check(frame, policy), keep=["depot_code"]).to_dict()["categorical"] == {
        "depot": 4}


def test_counts_only_with_verbose_and_exhaustive_only_when_it_was(crafted: pd.DataFrame
                                                                   ) -> None:
    verdict = check(crafted, VIF_ONLY)
    exact = suggest(verdict, method="exact")
    text = "\n".join(exact.lines())
    assert "node" not in text and "evaluation" not in text
    assert "exhaustive search over 5 candidate features: no smaller set passes" in text
    verbose = "\n".join(exact.lines(verbose=True))
    assert f"{exact.nodes} node" in verbose and f"{exact.evaluations} evaluation" in verbose
    greedy = suggest(verdict, method="greedy")  # 2 drops, the proven bound is below 2
    assert greedy.lower_bound < len(greedy.drops) and not greedy.exhaustive
    text = "\n".join(greedy.lines())
    assert "exhaustive" not in text and "not proven smallest" in text
    assert "other sets of this size were not compared" in text


def test_the_tie_break_is_explained_in_words() -> None:
    verdict = check(near_pair_frame(), VIF_ONLY)
    by_file = suggest(verdict, prefer=["station_load", "dock_pressure"])
    assert by_file.tie_break is not None and by_file.tie_break.rule == "preference"
    assert "the preference file decided" in "\n".join(by_file.lines())
    by_loss = suggest(verdict)
    assert by_loss.tie_break is not None and by_loss.tie_break.rule == "explained_variance"
    line = next(x for x in by_loss.lines() if x.startswith("  why this set:"))
    assert "2 sets of 1 drop pass" in line and "loses the least explained variance" in line


def test_infinity_is_a_symbol_in_text_and_null_in_json(docks_frame: pd.DataFrame) -> None:
    import json

    policy = parse_policy("policy_version: 1\nname: t\ncolumns:\n  categorical: [weather_kind]\n")
    result = suggest(check(docks_frame, policy))
    first = result.steps[0]
    assert first.reason.startswith("exact dependency")
    assert first.max_vif_before == float("inf") and first.condition_before is None
    text = "\n".join(result.lines())
    assert "max VIF ∞ -> " in text and "condition number ∞ -> " in text
    assert "e+1" not in text and "inf" not in text.replace("information", "")
    document = json.loads(json.dumps(result.to_dict(), allow_nan=False))
    assert document["steps"][0]["max_vif_before"] is None


# --- --hierarchy ---------------------------------------------------------------------------

def _temperature_frame() -> pd.DataFrame:
    """Invented: temperature deviation, its square (named temp_dev_c^2) and a road sensor that
    nearly duplicates it. The square does not breach (VIF 4.7), so only its name ties it."""
    rng = np.random.default_rng(SEED + 8)
    n = 3_000
    t = rng.uniform(-0.5, 1.5, n)
    return pd.DataFrame({"temp_dev_c": t, "temp_dev_c^2": t**2,
                         "road_temp_dev_c": t + rng.normal(0, 0.1, n),
                         "wind_ms": rng.uniform(0, 10, n)})


def test_hierarchy_by_name_keeps_the_main_effect_of_a_kept_square() -> None:
    frame = _temperature_frame()
    verdict = check(frame, VIF_ONLY)
    assert verdict.vif()["temp_dev_c^2"] <= 5.0  # not breaching: the detector never sees it
    # the unconstrained optimum drops the main effect and keeps its square
    free = suggest(verdict)
    assert free.drops == ("temp_dev_c",) and "temp_dev_c^2" in free.kept
    ordered = suggest(verdict, hierarchy=True)
    assert ordered.drops == ("road_temp_dev_c",) and ordered.solved
    assert dict(ordered.hierarchy) == {"temp_dev_c^2": ("temp_dev_c",)}
    # reference: brute force over every drop set closed under "parent dropped -> term dropped"
    names = list(frame.columns)
    corr = np.corrcoef(frame.to_numpy(), rowvar=False)
    closed = [d for size in range(len(names) + 1)
              for d in itertools.combinations(range(len(names)), size)
              if (0 not in d or 1 in d)
              and feasible(corr, [j for j in range(len(names)) if j not in d])]
    assert len(ordered.drops) == min(len(d) for d in closed)
    assert check(frame, _excluding(VIF_ONLY, ordered.drops)).status == "pass"


def _shift_frame() -> pd.DataFrame:
    """Invented fleet data: load_hours is computed as shift_hours * engine_load (a product the
    structural detector finds; its name matches no pattern)."""
    rng = np.random.default_rng(SEED + 7)
    n = 3_000
    hours = rng.uniform(5, 6, n)
    load = rng.uniform(1, 3, n)
    return pd.DataFrame({"shift_hours": hours, "engine_load": load,
                         "load_hours": hours * load, "ambient_c": rng.normal(15, 8, n)})


def test_hierarchy_from_the_structural_detector() -> None:
    frame = _shift_frame()
    verdict = check(frame, VIF_ONLY)
    [term] = verdict.structural
    assert term.computed and verdict.features[term.feature] == "load_hours"
    # with load_hours ranked most important, the unconstrained optimum drops a main effect
    prefer = ["load_hours"]
    free = suggest(verdict, prefer=prefer)
    assert free.drops == ("engine_load",) and "load_hours" in free.kept
    ordered = suggest(verdict, prefer=prefer, hierarchy=True)
    assert ordered.drops == ("load_hours",) and ordered.solved
    assert dict(ordered.hierarchy) == {"load_hours": ("shift_hours", "engine_load")}
    # a kept product keeps its main effects: no set passes then
    kept = suggest(verdict, keep=["load_hours"], hierarchy=True)
    assert not kept.solved and not set(kept.drops) & {"shift_hours", "engine_load"}
    assert any("--hierarchy keeps engine_load, shift_hours" in n for n in kept.notes)


def test_centring_is_offered_for_a_computed_product_only() -> None:
    frame = _shift_frame()
    result = suggest(check(frame, VIF_ONLY))
    [option] = result.centring
    assert option.term == "load_hours" and option.parents == ("shift_hours", "engine_load")
    # reference: the whole gate on the explicitly centred product
    centred = (frame.shift_hours - frame.shift_hours.mean()) * (
        frame.engine_load - frame.engine_load.mean())
    again = check(frame.assign(load_hours=centred), VIF_ONLY)
    assert option.vif_centred == pytest.approx(again.vif()["load_hours"], rel=1e-8)
    assert option.max_vif_centred == pytest.approx(max(again.vif().values()), rel=1e-8)
    line = next(x for x in result.lines() if "centre" in x)
    assert "centre shift_hours and engine_load before multiplying" in line
    # measured: the same product read from a separate meter (error sd 0.01) is not centrable
    rng = np.random.default_rng(SEED + 9)
    measured = frame.assign(load_hours=frame.load_hours + rng.normal(0, 0.01, len(frame)))
    verdict = check(measured, VIF_ONLY)
    [term] = verdict.structural
    assert not term.computed
    assert suggest(verdict).centring == ()


# --- --write-policy and --prefer files ---------------------------------------------------------

def test_every_added_policy_line_carries_the_dated_mark() -> None:
    tag = "gate suggest 2026-05-04"
    for text in (POLICY_BLOCK, POLICY_NO_EXCLUDE, POLICY_NO_COLUMNS,
                 "policy_version: 1\nname: flow\ncolumns:\n  exclude: [a]  # kept\n"):
        out = policy_with_exclusions(text, ["dock_pressure", "hub_load"], "why", tag=tag)
        added = [line for line in out.splitlines()
                 if ("dock_pressure" in line or "hub_load" in line) and not line.lstrip()
                 .startswith("#")]
        assert added and all(line.endswith(f"# {tag}") for line in added), out
        assert {"dock_pressure", "hub_load"} <= set(parse_policy(out).columns.exclude)
        for line in text.splitlines():
            if "dock" not in line and line.strip() and "exclude" not in line:
                assert line in out


def test_cli_prefer_file_that_is_not_utf8(tmp_path: Path,
                                          run_cli: Callable[..., object]) -> None:
    table = tmp_path / "pairs.csv"
    near_pair_frame().to_csv(table, index=False)
    prefer = tmp_path / "wichtig.txt"
    prefer.write_bytes("# Reihenfolge: größte Wichtigkeit zuerst\ndock_pressure\n"
                       .encode("latin-1"))
    result = run_cli(["suggest", str(table), "--prefer", str(prefer)])
    assert result.code == 2  # type: ignore[attr-defined]
    assert len(result.err_lines) == 1  # type: ignore[attr-defined]
    assert str(prefer) in result.err and "not UTF-8" in result.err  # type: ignore[attr-defined]
    assert "iconv" in result.err  # type: ignore[attr-defined]


def test_cli_verbose_and_hierarchy_flags(tmp_path: Path, run_cli: Callable[..., object]) -> None:
    table = tmp_path / "temperature.parquet"
    _temperature_frame().to_parquet(table)
    plain = run_cli(["suggest", str(table)])
    assert "node" not in plain.out  # type: ignore[attr-defined]
    ordered = run_cli(["suggest", str(table), "--hierarchy", "--verbose", "--policy",
                       str(_vif_policy_file(tmp_path))])
    assert ordered.code == 0, ordered.err  # type: ignore[attr-defined]
    assert "drop 1 feature: road_temp_dev_c" in ordered.out  # type: ignore[attr-defined]
    assert "hierarchy kept: temp_dev_c^2 contains temp_dev_c" in ordered.out  # type: ignore[attr-defined]
    assert "node" in ordered.out  # type: ignore[attr-defined]


def _vif_policy_file(tmp_path: Path) -> Path:
    path = tmp_path / "vif.yaml"
    path.write_text("policy_version: 1\nname: vif-only\nlimits:\n  vif: {max: 5, level: fail}\n"
                    "  pairwise_correlation: {level: \"off\"}\n"
                    "  condition_number: {level: \"off\"}\n")
    return path
