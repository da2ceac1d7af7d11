"""Segments: the whole gate per segment and on the whole table, from one pass over the rows.

References: the whole table checked without segments (its statistics must equal the merge of
the segments' statistics, Chan, Golub & LeVeque 1979), and each segment checked on its own as a
separate table.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from gate.api import check
from gate.artefacts.verdict_json import verdict_json
from gate.design.plan import plan_design
from gate.errors import TableError
from gate.policy.models import Policy
from gate.read.sources import ArrowTableSource, Column
from gate.remedies.search import suggest
from gate.stats.local import main_pass
from gate.stats.segments import segment_pass, segment_policy

SEED = 20261202


def zoned_frame(harbour_rows: int = 300, inland_rows: int = 3000) -> pd.DataFrame:
    """Invented hourly rows of three station zones.

    In the harbour zone, the dock-pressure index is computed from docks in use (nearly the same
    number); inland, the two are unrelated. Diluted over the whole table the pair looks harmless.
    """
    rng = np.random.default_rng(SEED)
    parts = []
    for zone, rows in (("inland_north", inland_rows), ("inland_south", inland_rows),
                       ("harbour", harbour_rows)):
        in_use = rng.normal(10, 3, rows)
        pressure = (in_use + rng.normal(0, 0.3, rows) if zone == "harbour"
                    else rng.normal(10, 3, rows))
        parts.append(pd.DataFrame({"zone": zone, "docks_in_use": in_use,
                                   "dock_pressure": pressure,
                                   "temp_c": rng.normal(12, 6, rows)}))
    return pd.concat(parts, ignore_index=True)


def segmented(min_rows: int = 30, **limits: object) -> Policy:
    return Policy.model_validate({"name": "zones", "segments": {"by": ["zone"],
                                                                "min_rows": min_rows},
                                  "limits": limits})


def test_whole_passes_but_a_segment_fails_so_the_table_fails() -> None:
    frame = zoned_frame()
    plain = check(frame.drop(columns="zone"))
    assert plain.status == "pass"  # the whole table alone looks fine

    verdict = check(frame, segmented())
    assert verdict.status == "fail"
    statuses = {s.label: s.status for s in verdict.segments}
    assert statuses == {"zone=harbour": "fail", "zone=inland_north": "pass",
                        "zone=inland_south": "pass"}
    failing = [f for f in verdict.findings if f.rule == "segment" and f.level == "fail"]
    assert len(failing) == 1 and "zone=harbour" in failing[0].message
    assert "zone" not in verdict.features  # segment columns are not features

    document = json.loads(verdict_json(verdict))
    assert document["status"] == "fail"
    by_label = {s["label"]: s for s in document["segments"]}
    assert by_label["zone=harbour"]["status"] == "fail"
    assert by_label["zone=harbour"]["judged"] is True
    assert any(f["rule"] == "vif" for f in by_label["zone=harbour"]["findings"])
    assert by_label["zone=inland_north"]["diagnostics"]["vif"]["dock_pressure"] < 1.1


def test_segment_statistics_equal_separate_checks_and_merge_to_the_whole() -> None:
    frame = zoned_frame()
    verdict = check(frame, segmented())
    whole = check(frame.drop(columns="zone"))
    names = whole.features
    np.testing.assert_allclose(verdict.diagnostics.vif, whole.diagnostics.vif, rtol=1e-10)
    for segment in verdict.segments:
        alone = check(frame[frame["zone"] == segment.key[0]].drop(columns="zone"))
        assert segment.verdict is not None
        assert segment.verdict.features == names
        np.testing.assert_allclose(segment.verdict.diagnostics.vif, alone.diagnostics.vif,
                                   rtol=1e-10)
        assert segment.rows_used == alone.table.rows_used


def test_one_pass_merge_equals_the_plain_main_pass() -> None:
    frame = zoned_frame()
    source = ArrowTableSource(pa.Table.from_pandas(frame, preserve_index=False))
    policy = segmented()
    plan = plan_design(source, segment_policy(policy))
    result = segment_pass(source, plan, ["zone"], chunk_rows=1000)  # chunks cut across zones
    plain, counts = main_pass(source, plan, chunk_rows=4096)
    assert result.counts.read == counts.read == len(frame)
    np.testing.assert_allclose(result.gram.mean, plain.mean, rtol=1e-12)
    np.testing.assert_allclose(result.gram.comoment, plain.comoment, rtol=1e-10)
    assert [s.key for s in result.segments] == [("harbour",), ("inland_north",),
                                               ("inland_south",)]


class CountingSource:
    """A table source that counts how often its rows are read."""

    def __init__(self, frame: pd.DataFrame) -> None:
        self.inner = ArrowTableSource(pa.Table.from_pandas(frame, preserve_index=False),
                                      "<counted>")
        self.name = "<counted>"
        self.reads = 0

    @property
    def columns(self) -> tuple[Column, ...]:
        return self.inner.columns

    @property
    def row_count(self) -> int | None:
        return self.inner.row_count

    def sha256(self) -> str | None:
        return None

    def chunks(self, columns: Sequence[str], chunk_rows: int = 65_536) -> Iterator[pa.Table]:
        self.reads += 1
        return self.inner.chunks(columns, chunk_rows)


def test_rows_are_read_once_for_every_segment_and_the_whole() -> None:
    source = CountingSource(zoned_frame())
    verdict = check(source, segmented())
    assert verdict.status == "fail" and len(verdict.segments) == 3
    assert source.reads == 1


def test_small_segments_are_reported_not_judged() -> None:
    frame = zoned_frame(harbour_rows=20)
    verdict = check(frame, segmented(min_rows=50))
    harbour = next(s for s in verdict.segments if s.label == "zone=harbour")
    assert not harbour.judged and harbour.status == "not_judged"
    assert "20 used rows < segments.min_rows 50" in (harbour.reason or "")
    assert verdict.status == "pass"
    info = [f for f in verdict.findings if f.rule == "segment" and "harbour" in f.message]
    assert info[0].level == "info"
    document = json.loads(verdict_json(verdict))
    entry = next(s for s in document["segments"] if s["label"] == "zone=harbour")
    assert entry["judged"] is False and "findings" not in entry
    # judged with a lower threshold, the same segment fails
    assert check(frame, segmented(min_rows=10)).status == "fail"


def test_missing_segment_values_form_their_own_segment() -> None:
    frame = zoned_frame().astype({"zone": object})
    frame.loc[frame.index[:40], "zone"] = None
    verdict = check(frame, segmented())
    assert "zone=(missing)" in {s.label for s in verdict.segments}
    missing = next(s for s in verdict.segments if s.key == (None,))
    assert missing.rows == 40


def test_two_segment_columns_and_exact_pass_per_segment() -> None:
    rng = np.random.default_rng(SEED + 1)
    rows = 800
    frame = pd.DataFrame({"zone": rng.choice(["harbour", "inland"], rows),
                          "month": rng.choice([5, 6], rows),
                          "docks_free": rng.integers(0, 20, rows).astype(float),
                          "docks_in_use": rng.integers(0, 20, rows).astype(float),
                          "temp_c": rng.normal(12, 6, rows)})
    frame["docks_total"] = frame["docks_free"] + frame["docks_in_use"]
    policy = Policy.model_validate({"name": "two", "segments": {"by": ["zone", "month"]}})
    verdict = check(frame, policy)
    assert len(verdict.segments) == 4 and verdict.status == "fail"
    for segment in verdict.segments:
        assert segment.verdict is not None
        assert len(segment.verdict.diagnostics.dependencies) == 1  # exact, in every segment
        assert segment.label.startswith("zone=") and ", month=" in segment.label


def test_unknown_segment_column_is_a_clear_error(run_cli: Callable[..., object],
                                                 tmp_path: Path) -> None:
    with pytest.raises(TableError, match="segments.by names 'region'"):
        check(zoned_frame(), Policy.model_validate({"name": "x", "segments": {"by": ["region"]}}))
    table = tmp_path / "zones.parquet"
    zoned_frame().to_parquet(table)
    policy = tmp_path / "policy.yaml"
    policy.write_text("policy_version: 1\nname: zones\nsegments: {by: [region]}\n")
    result = run_cli(["check", str(table), "--policy", str(policy), "--out",
                      str(tmp_path / "out")])
    assert result.code == 2  # type: ignore[attr-defined]
    assert "segments.by names 'region'" in result.err  # type: ignore[attr-defined]


def test_suggest_fixes_the_failing_segment_too() -> None:
    frame = zoned_frame()
    verdict = check(frame, segmented())
    result = suggest(verdict)
    assert len(result.drops) == 1 and result.drops[0] in {"docks_in_use", "dock_pressure"}
    assert check(frame.drop(columns=list(result.drops)), segmented()).status == "pass"


def test_summary_html_has_a_segment_overview_and_effective_rows() -> None:
    from gate.artefacts.html_summary import summary_html

    page = summary_html(check(zoned_frame(), segmented()))
    assert 'id="sec-segments"' in page and "zone=harbour" in page
    assert "Effective rows n/VIF" in page
    assert "move its features apart" in page
    plain = summary_html(check(zoned_frame().drop(columns="zone")))
    assert 'id="sec-segments"' not in plain


def _inf_frame() -> pd.DataFrame:
    rng = np.random.default_rng(20261202)
    frame = pd.DataFrame({"a": rng.normal(size=30), "b": rng.normal(size=30),
                          "zone": ["x", "y", "z"] * 10})
    frame.loc[[7, 12, 20], "a"] = np.inf
    return frame


@pytest.mark.parametrize("segments", [False, True])
def test_infinite_values_are_counted_over_the_whole_table_with_or_without_segments(
        segments: bool) -> None:
    # Segments are the same main pass split by key: same count, same row range.
    policy = Policy.model_validate({"policy_version": 1, "name": "inf", **(
        {"segments": {"by": ["zone"], "min_rows": 2}} if segments else {})})
    with pytest.raises(Exception) as caught:
        check(_inf_frame(), policy, chunk_rows=5)
    assert "3 infinite values (the first in rows 5-9)" in str(caught.value)


def test_segment_counts_missing_rows_per_segment_and_whole() -> None:
    rng = np.random.default_rng(7)
    frame = pd.DataFrame({"a": rng.normal(size=30), "b": rng.normal(size=30),
                          "zone": ["x", "y", "z"] * 10})
    frame.loc[[0, 3, 6, 9, 12, 15, 18, 21, 24, 27], "a"] = np.nan  # every row of zone x
    frame.loc[[1], "b"] = np.nan  # one row of zone y
    policy = Policy.model_validate({"policy_version": 1, "name": "missing",
                                    "segments": {"by": ["zone"], "min_rows": 2}})
    verdict = check(frame, policy, chunk_rows=4)
    by_label = {s.label: s for s in verdict.segments}
    assert (by_label["zone=x"].rows, by_label["zone=x"].rows_used) == (10, 0)
    assert not by_label["zone=x"].judged
    assert (by_label["zone=y"].rows, by_label["zone=y"].rows_used) == (10, 9)
    assert (by_label["zone=z"].rows, by_label["zone=z"].rows_used) == (10, 10)
    assert verdict.table.rows_used == 19 and verdict.table.missing == {"a": 10, "b": 1}
