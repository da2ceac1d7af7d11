"""From table columns to the design: selection, encoding, missing values, reference levels."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

import gate
from gate.design.plan import MAX_LEVELS, encode_block, finish_design, plan_design
from gate.errors import DesignError, TableError
from gate.judge.verdict import Verdict
from gate.policy.models import Policy
from gate.read.sources import ArrowTableSource, from_dataframe
from gate.stats.accumulators import CentredGram
from gate.stats.local import main_pass


def policy(**overrides: Any) -> Policy:
    return Policy.model_validate({"name": "design-test", **overrides})


def run(frame: pd.DataFrame | pa.Table, **overrides: Any) -> Verdict:
    return gate.check(frame, policy(**overrides))


def fleet(rows: int = 60, seed: int = 4) -> pd.DataFrame:
    # Invented fleet-maintenance table.
    rng = np.random.default_rng(seed)
    return pd.DataFrame({
        "vehicle_id": np.arange(rows),
        "odometer_km": rng.uniform(1e4, 2e5, rows),
        "engine_hours": rng.uniform(100, 9000, rows),
        "tyre_wear": rng.uniform(0, 1, rows),
        "depot": rng.choice(["west", "east", "north"], rows),
        "electric": rng.random(rows) < 0.4,
        "trip_weight": rng.uniform(0.5, 2.0, rows),
    })


def test_globs_select_and_exclude_applies_last() -> None:
    verdict = run(fleet(), columns={"include": ["*_km", "engine_*", "tyre_wear", "vehicle_id"],
                                    "exclude": ["vehicle_*", "tyre_*"]})
    assert verdict.features == ("odometer_km", "engine_hours")


def test_weight_column_is_never_a_feature() -> None:
    verdict = run(fleet(), columns={"weight": "trip_weight", "exclude": ["vehicle_id"]})
    assert "trip_weight" not in verdict.features
    assert verdict.design.weight == "trip_weight"


def test_string_columns_become_dummies_with_most_frequent_level_as_reference() -> None:
    frame = fleet()
    counts = frame["depot"].value_counts()  # pandas counts the levels independently
    top = counts.idxmax()
    assert (counts == counts.max()).sum() == 1  # the seed gives one clear winner
    verdict = run(frame, columns={"exclude": ["vehicle_id"]})
    others = sorted(level for level in counts.index if level != top)
    (group,) = verdict.design.groups
    assert group.column == "depot" and group.reference == top
    assert f"depot={top}" not in verdict.features
    assert group.levels == tuple(others)
    assert [verdict.features[k] for k in group.indices] == [f"depot={v}" for v in others]
    assert group.reference_reason == f"most frequent level ({counts.max()} of 60 used rows)"
    document = verdict.to_dict()
    assert document["groups"][0]["reference"] == top
    assert document["groups"][0]["reference_reason"].startswith("most frequent level")


def test_boolean_columns_are_numeric_zero_one() -> None:
    frame = fleet()
    verdict = run(frame, columns={"exclude": ["vehicle_id"]})
    position = verdict.features.index("electric")
    assert verdict.diagnostics.means[position] == pytest.approx(frame["electric"].mean())


def test_listed_numeric_column_is_one_hot_encoded() -> None:
    frame = fleet().assign(axle_count=np.tile([2, 3, 4], 20))
    verdict = run(frame, columns={"exclude": ["vehicle_id"], "categorical": ["axle_count"]})
    assert {"axle_count=3", "axle_count=4"} <= set(verdict.features)
    assert "axle_count" not in verdict.features


def test_pandas_category_dtype_is_categorical() -> None:
    frame = fleet().astype({"depot": "category"})
    verdict = run(frame, columns={"exclude": ["vehicle_id"]})
    assert "depot=west" in verdict.features


def test_dates_listed_as_categorical_are_allowed() -> None:
    frame = fleet().assign(service_day=pd.to_datetime(
        np.tile(["2026-01-05", "2026-02-05", "2026-03-05"], 20)))
    verdict = run(frame, columns={"exclude": ["vehicle_id"], "categorical": ["service_day"]})
    assert sum(name.startswith("service_day=") for name in verdict.features) == 2


def test_too_many_levels_is_refused() -> None:
    frame = pd.DataFrame({"odometer_km": np.arange(MAX_LEVELS + 10, dtype=float),
                          "plate": [f"P{k:05d}" for k in range(MAX_LEVELS + 10)]})
    with pytest.raises(TableError) as caught:
        run(frame)
    assert "plate" in str(caught.value) and str(MAX_LEVELS) in str(caught.value)


def _plates(rows: int, levels: int, seed: int = 5) -> pd.DataFrame:
    # Invented: a fleet table with a licence-plate-like text column of `levels` values.
    rng = np.random.default_rng(seed)
    return pd.DataFrame({"odometer_km": rng.uniform(1e4, 2e5, rows),
                         "engine_hours": rng.uniform(100, 9000, rows),
                         "plate": [f"P{k % levels:05d}" for k in range(rows)]})


def test_default_level_limit_is_50() -> None:
    # columns.max_levels defaults to 50: common practice, no source.
    assert MAX_LEVELS == 50
    assert run(_plates(600, 50)).design.groups[0].column == "plate"  # 50 levels: accepted
    with pytest.raises(TableError) as caught:
        run(_plates(600, 51))  # 51: refused
    message = str(caught.value)
    assert "'plate' looks like an identifier (51 distinct values" in message
    assert "exclude it, or declare it categorical with a higher level limit" in message
    assert "\n" not in message


def test_text_column_with_many_levels_is_never_hundreds_of_dummies() -> None:
    # issue 11: 50 to 10,000 levels must not silently become dummies.
    for levels in (60, 600, 10_000):
        with pytest.raises(TableError, match="looks like an identifier"):
            run(_plates(10_000, levels))


def test_declared_categorical_may_raise_the_level_limit() -> None:
    frame = _plates(1_200, 120)
    with pytest.raises(TableError) as caught:
        run(frame, columns={"categorical": ["plate"]})
    message = str(caught.value)
    assert "categorical column 'plate' has 120 levels, more than columns.max_levels = 50" \
        in message and "raise columns.max_levels" in message
    verdict = run(frame, columns={"categorical": ["plate"], "max_levels": 200})
    assert len(verdict.design.groups[0].levels) == 119


def test_almost_all_distinct_text_is_an_identifier() -> None:
    # Rule (common practice, no source): from 20 used rows on, a text column with a distinct
    # value in at least 90% of them is an identifier, whatever max_levels allows.
    frame = _plates(40, 36)  # 36 of 40 rows distinct = 90%
    with pytest.raises(DesignError) as caught:
        run(frame, columns={"max_levels": 100})
    assert "'plate' looks like an identifier (36 distinct values in 40 used rows)" \
        in str(caught.value)
    assert run(_plates(40, 35), columns={"max_levels": 100}).design.groups  # 87.5%: kept
    # Listed in columns.categorical: the user said it is a category.
    assert run(frame, columns={"max_levels": 100, "categorical": ["plate"]}).design.groups
    # Fewer than 20 used rows prove nothing.
    assert run(_plates(19, 19), columns={"max_levels": 100}).design.groups


def test_missing_values_dropped_and_counted_per_column() -> None:
    frame = fleet()
    frame.loc[[0, 1, 2], "tyre_wear"] = np.nan
    frame.loc[[2, 3], "depot"] = None
    verdict = run(frame, columns={"exclude": ["vehicle_id"]})
    assert verdict.table.rows == 60
    assert verdict.table.rows_used == 56  # rows 0, 1, 2, 3
    assert verdict.table.missing == {"tyre_wear": 3, "depot": 2}
    clean = run(frame.drop(index=[0, 1, 2, 3]), columns={"exclude": ["vehicle_id"]})
    np.testing.assert_allclose(verdict.diagnostics.vif, clean.diagnostics.vif, rtol=1e-12)


def test_level_seen_only_in_dropped_rows_gets_no_dummy() -> None:
    frame = fleet()
    frame.loc[5, "depot"] = "harbour"
    frame.loc[5, "tyre_wear"] = np.nan
    verdict = run(frame, columns={"exclude": ["vehicle_id"]})
    assert not any(name == "depot=harbour" for name in verdict.features)
    assert any("harbour" in note for note in verdict.design.notes)
    assert verdict.diagnostics.dependencies == ()  # no spurious constant dummy


def _depots(counts: dict[str, int], seed: int = 6) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    depot = np.repeat(list(counts), list(counts.values()))
    rows = depot.size
    return pd.DataFrame({"odometer_km": rng.uniform(1e4, 2e5, rows),
                         "tyre_wear": rng.uniform(0, 1, rows),
                         "depot": rng.permutation(depot)})


def test_reference_is_the_most_frequent_level_among_used_rows() -> None:
    frame = _depots({"east": 30, "north": 12, "west": 18})
    verdict = run(frame)
    assert verdict.design.groups[0].reference == "east"
    frame.loc[frame["depot"] == "east", "tyre_wear"] = np.nan  # every 'east' row is dropped
    (group,) = run(frame).design.groups
    assert group.reference == "west" and group.levels == ("north",)
    assert group.reference_reason == "most frequent level (18 of 30 used rows)"


def test_reference_ties_go_to_the_first_in_sort_order() -> None:
    (group,) = run(_depots({"west": 20, "north": 20, "east": 15})).design.groups
    assert group.reference == "north"
    assert group.reference_reason == ("most frequent level (20 of 55 used rows); tied with "
                                      "'west': first in sort order")


def test_weighted_reference_is_the_largest_weight_share() -> None:
    frame = _depots({"east": 30, "north": 12, "west": 18})
    frame["trip_weight"] = np.where(frame["depot"] == "north", 10.0, 1.0)  # 120 of 168
    (group,) = run(frame, columns={"weight": "trip_weight"}).design.groups
    assert group.reference == "north"
    assert group.reference_reason == "most frequent level (71.4% of the weight of the used rows)"


def test_reference_override() -> None:
    frame = _depots({"east": 30, "north": 12, "west": 18})
    (group,) = run(frame, columns={"reference": {"depot": "north"}}).design.groups
    assert group.reference == "north" and group.levels == ("east", "west")
    assert group.reference_reason == "set by columns.reference"


def test_reference_override_with_an_unknown_level_names_the_levels_seen() -> None:
    frame = _depots({"east": 30, "north": 12, "west": 18})
    with pytest.raises(TableError) as caught:
        run(frame, columns={"reference": {"depot": "south"}})
    assert str(caught.value) == ("<DataFrame>: columns.reference sets level 'south' for column "
                                 "'depot', which has no such value; levels seen: east, north, "
                                 "west")
    with pytest.raises(TableError, match="columns.reference names 'odometer_km', which is not "
                                         "a categorical feature column"):
        run(frame, columns={"reference": {"odometer_km": "1"}})
    frame.loc[frame["depot"] == "north", "tyre_wear"] = np.nan
    with pytest.raises(DesignError, match="no used row has it"):
        run(frame, columns={"reference": {"depot": "north"}})


def test_reference_override_reads_numeric_levels_as_text() -> None:
    frame = fleet().assign(axle_count=np.tile([2, 3, 10], 20))
    verdict = run(frame, columns={"exclude": ["vehicle_id", "depot"],
                                  "categorical": ["axle_count"], "reference": {"axle_count": 10}})
    assert verdict.design.groups[0].reference == "10"


def test_changing_the_reference_keeps_gvif_and_other_vifs() -> None:
    # Fox & Monette (1992): GVIF does not depend on how the group is coded; the other features'
    # VIFs depend only on the span of the dummies. Checked against statsmodels'
    # variance_inflation_factor on a design built with pandas for each reference.
    from statsmodels.stats.outliers_influence import variance_inflation_factor
    from statsmodels.tools import add_constant

    frame = fleet(rows=300).drop(columns=["vehicle_id", "trip_weight"])
    frame["odometer_km"] += 4e4 * (frame["depot"] == "west")  # the group inflates odometer_km
    base = run(frame)
    for chosen in ("east", "north", "west"):
        other = run(frame, columns={"reference": {"depot": chosen}})
        assert other.diagnostics.groups[0].gvif == pytest.approx(
            base.diagnostics.groups[0].gvif, rel=1e-10)
        dummies = pd.get_dummies(frame["depot"], prefix="depot", prefix_sep="=", dtype=float)
        design = pd.concat([frame.drop(columns="depot").astype(float),
                            dummies.drop(columns=f"depot={chosen}")], axis=1)
        exog = add_constant(design.to_numpy())
        for position, name in enumerate(design.columns):
            expected = variance_inflation_factor(exog, position + 1)
            assert other.vif()[name] == pytest.approx(expected, rel=1e-9)
            if not name.startswith("depot="):
                assert other.vif()[name] == pytest.approx(base.vif()[name], rel=1e-10)


def test_single_level_categorical_adds_no_feature() -> None:
    frame = fleet().assign(depot="west")
    verdict = run(frame, columns={"exclude": ["vehicle_id"]})
    assert not any(name.startswith("depot") for name in verdict.features)
    assert any("single level" in note for note in verdict.design.notes)


def test_chunked_encoding_equals_whole() -> None:
    frame = fleet()
    frame.loc[[7, 30], "engine_hours"] = np.nan
    source = from_dataframe(frame)
    plan = plan_design(source, policy(columns={"exclude": ["vehicle_id"]}))
    whole, whole_counts = main_pass(source, plan, chunk_rows=10_000)
    chunked, chunked_counts = main_pass(source, plan, chunk_rows=7)
    assert whole_counts.read == chunked_counts.read == 60
    assert whole_counts.dropped == chunked_counts.dropped == 2
    assert whole_counts.missing == chunked_counts.missing == {"engine_hours": 2}
    np.testing.assert_allclose(chunked.mean, whole.mean, rtol=1e-13)
    np.testing.assert_allclose(chunked.comoment, whole.comoment, rtol=1e-11,
                               atol=1e-11 * np.abs(whole.comoment).max())


def test_encode_block_layout_and_values() -> None:
    frame = pd.DataFrame({"load_t": [1.5, 2.0, np.nan, 4.0],
                          "depot": ["west", None, "east", "east"],
                          "electric": [True, False, True, False]})
    source = ArrowTableSource(pa.Table.from_pandas(frame, preserve_index=False))
    plan = plan_design(source, policy())
    assert plan.layout == ("load_t", "depot=east", "depot=west", "electric")
    (chunk,) = list(source.chunks(plan.read_columns, 100))
    values, weights, counts = encode_block(plan, chunk)
    assert weights is None
    assert counts.read == 4 and counts.dropped == 2
    assert counts.missing == {"load_t": 1, "depot": 1}
    np.testing.assert_array_equal(values, [[1.5, 0.0, 1.0, 1.0], [4.0, 1.0, 0.0, 0.0]])


def test_encoded_sums_and_magnitudes_are_those_of_the_block() -> None:
    """encode_rows takes each column's sum and largest magnitude while writing it; they must be
    bit for bit what numpy's reductions over the finished block give (the main pass uses them
    for the chunk mean and the range check), and absent when rows are dropped."""
    from gate.design.plan import encode_rows

    rng = np.random.default_rng(20_261_202)  # invented depot readings over mixed magnitudes
    rows = 1_000
    frame = pd.DataFrame({"odometer_km": rng.normal(5e4, 2e4, rows),
                          "tyre_mm": -rng.gamma(2.0, 1e-3, rows),
                          "tiny": rng.normal(0, 1e-200, rows),
                          "depot": rng.choice(["north", "south", "east"], rows),
                          "electric": rng.random(rows) > 0.5})
    source = ArrowTableSource(pa.Table.from_pandas(frame, preserve_index=False))
    plan = plan_design(source, policy())
    for chunk in source.chunks(plan.read_columns, 333):
        block = encode_rows(plan, chunk)
        assert block.used is None and block.sums is not None and block.largest is not None
        assert np.array_equal(block.sums, block.values.sum(axis=0))
        assert np.array_equal(block.largest, np.abs(block.values).max(axis=0))
    frame.loc[3, "tyre_mm"] = np.nan
    source = ArrowTableSource(pa.Table.from_pandas(frame, preserve_index=False))
    (chunk,) = list(source.chunks(plan.read_columns, 10_000))
    block = encode_rows(plan, chunk)
    assert block.used is not None and block.sums is None and block.largest is None


def test_finish_design_names_and_selection() -> None:
    frame = pd.DataFrame({"load_t": [1.0, 2.0, 3.0, 5.0], "depot": ["b", "a", "c", "a"]})
    source = from_dataframe(frame)
    plan = plan_design(source, policy())
    values = np.array([[1.0, 0, 1, 0], [2.0, 1, 0, 0], [3.0, 0, 0, 1], [5.0, 1, 0, 0]])
    gram = CentredGram.from_block(values)
    design = finish_design(plan, gram.mean, gram.rows, main_pass(source, plan)[1])
    assert design.features == ("load_t", "depot=b", "depot=c")
    assert design.selection == (0, 2, 3)


def test_no_rows_left_is_a_design_error() -> None:
    frame = fleet(rows=3)
    frame["tyre_wear"] = np.nan
    with pytest.raises(DesignError) as caught:
        run(frame, columns={"exclude": ["vehicle_id"]})
    assert "tyre_wear" in str(caught.value)


def test_nothing_selected_is_a_design_error() -> None:
    with pytest.raises(DesignError) as caught:
        run(fleet(), columns={"include": ["nothing_*"]})
    assert "columns.include" in str(caught.value)


def test_pyarrow_table_is_accepted() -> None:
    table = pa.Table.from_pandas(fleet().drop(columns="vehicle_id"), preserve_index=False)
    verdict = gate.check(table, policy())
    assert "depot=west" in verdict.features
    assert verdict.table.sha256 is None  # no file bytes to hash


def test_numeric_codes_sort_by_value_for_the_reference() -> None:
    # '10' < '2' as text; as codes 2 < 3 < 10, so 2 is the first sorted level: with every level
    # equally frequent, the tie goes to it (the reference).
    frame = fleet().assign(axle_count=np.tile([2, 3, 10], 20),
                           load_class=np.tile([2.5, 10.0, 3.0], 20),
                           depot_code=np.tile(["B7", "A10", "A9"], 20))
    verdict = run(frame, columns={"exclude": ["vehicle_id", "depot"],
                                  "categorical": ["axle_count", "load_class", "depot_code"]})
    references = {g.column: g.reference for g in verdict.design.groups}
    assert references == {"axle_count": "2", "load_class": "2.5", "depot_code": "A10"}
    assert "axle_count=10" in verdict.features and "axle_count=3" in verdict.features


# --- target --------------------------------------------------------------------------------------

def test_target_is_never_a_feature_and_is_named_in_the_verdict() -> None:
    frame = fleet().assign(days_to_failure=np.arange(60.0))
    verdict = run(frame, columns={"exclude": ["vehicle_id"], "target": "days_to_failure"})
    assert "days_to_failure" not in verdict.features
    assert verdict.to_dict()["target"] == ["days_to_failure"]
    both = run(frame, columns={"exclude": ["vehicle_id"],
                               "target": ["days_to_failure", "tyre_wear"]})
    assert "tyre_wear" not in both.features
    assert both.to_dict()["target"] == ["days_to_failure", "tyre_wear"]
    assert run(frame, columns={"exclude": ["vehicle_id"]}).to_dict()["target"] == []


def test_target_must_be_a_column_and_not_a_feature_role() -> None:
    with pytest.raises(TableError, match="columns.target names 'failures', which is not a "
                                         "column of the table"):
        run(fleet(), columns={"target": "failures"})
    with pytest.raises(TableError, match="'depot' is both a target"):
        run(fleet(), columns={"target": "depot", "categorical": ["depot"]})
