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


def test_string_columns_become_dummies_with_first_sorted_level_as_reference() -> None:
    verdict = run(fleet(), columns={"exclude": ["vehicle_id"]})
    assert "depot=north" in verdict.features and "depot=west" in verdict.features
    assert "depot=east" not in verdict.features  # 'east' sorts first: the reference
    (group,) = verdict.design.groups
    assert group.column == "depot" and group.reference == "east"
    assert group.levels == ("north", "west")
    assert [verdict.features[k] for k in group.indices] == ["depot=north", "depot=west"]


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


def test_reference_is_first_level_present_among_used_rows() -> None:
    frame = fleet()
    east = frame["depot"] == "east"
    frame.loc[east, "tyre_wear"] = np.nan  # every 'east' row is dropped
    verdict = run(frame, columns={"exclude": ["vehicle_id"]})
    (group,) = verdict.design.groups
    assert group.reference == "north" and group.levels == ("west",)


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


def test_finish_design_names_and_selection() -> None:
    frame = pd.DataFrame({"load_t": [1.0, 2.0, 3.0, 5.0], "depot": ["b", "a", "c", "a"]})
    source = from_dataframe(frame)
    plan = plan_design(source, policy())
    values = np.array([[1.0, 0, 1, 0], [2.0, 1, 0, 0], [3.0, 0, 0, 1], [5.0, 1, 0, 0]])
    design = finish_design(plan, CentredGram.from_block(values).mean, main_pass(source, plan)[1])
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
    # '10' < '2' as text; as codes 2 < 3 < 10, so 2 is the first sorted level (the reference).
    frame = fleet().assign(axle_count=np.tile([2, 3, 10], 20),
                           load_class=np.tile([2.5, 10.0, 3.0], 20),
                           depot_code=np.tile(["B7", "A10", "A9"], 20))
    verdict = run(frame, columns={"exclude": ["vehicle_id", "depot"],
                                  "categorical": ["axle_count", "load_class", "depot_code"]})
    references = {g.column: g.reference for g in verdict.design.groups}
    assert references == {"axle_count": "2", "load_class": "2.5", "depot_code": "A10"}
    assert "axle_count=10" in verdict.features and "axle_count=3" in verdict.features
