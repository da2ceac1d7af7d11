"""Streaming: every route through the rows gives the same diagnostics (to 1e-10 relative).

Routes: an in-memory DataFrame, Parquet (file, folder of files, many row groups, a big row group
read in batches) with any chunk size, CSV in blocks, Arrow IPC memory-mapped. Longley and an
exact-dependency table go through every route and are also checked against their outside
references (statsmodels' variance_inflation_factor on its bundled Longley data; the exact
relation the table was built with). The Dask route is in tests/test_engine_dask.py.
"""

from __future__ import annotations

import io
import itertools
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest
import statsmodels.datasets.longley as longley_data
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pyarrow import feather
from statsmodels.stats.outliers_influence import variance_inflation_factor

import gate
from gate.cli.main import main as cli_main
from gate.diagnose.diagnostics import Diagnostics
from gate.judge.verdict import Verdict
from gate.policy.models import parse_policy
from gate.read import sources as table_module
from gate.read.sources import ParquetSource
from gate.stats.progress import RowProgress

RTOL = 1e-10
SEED = 20261202


# --- helpers ----------------------------------------------------------------------------------------

def assert_same_diagnostics(a: Diagnostics, b: Diagnostics, rtol: float = RTOL) -> None:
    """Every diagnostic the verdict carries agrees to ``rtol`` relative (inf/NaN in the same
    places)."""
    assert a.rank == b.rank
    assert a.rows == b.rows
    assert a.route == b.route
    for name in ("vif", "correlation", "inverse_correlation", "means", "scales"):
        x, y = getattr(a, name), getattr(b, name)
        np.testing.assert_array_equal(np.isfinite(x), np.isfinite(y), err_msg=name)
        finite = np.isfinite(x)
        np.testing.assert_allclose(x[finite], y[finite], rtol=rtol, atol=rtol, err_msg=name)
    np.testing.assert_allclose(a.condition.indices, b.condition.indices, rtol=rtol)
    np.testing.assert_allclose(a.condition.proportions, b.condition.proportions, rtol=rtol,
                               atol=rtol)
    assert a.condition.columns == b.condition.columns
    assert [g.df for g in a.groups] == [g.df for g in b.groups]
    np.testing.assert_allclose([g.gvif for g in a.groups], [g.gvif for g in b.groups],
                               rtol=rtol)
    assert len(a.dependencies) == len(b.dependencies)
    for da, db in zip(a.dependencies, b.dependencies):
        assert da.terms.keys() == db.terms.keys() and da.kind == db.kind
        np.testing.assert_allclose(list(da.terms.values()), list(db.terms.values()),
                                   rtol=1e-8, atol=1e-10)


def assert_same_verdict(a: Verdict, b: Verdict) -> None:
    assert a.status == b.status
    assert a.features == b.features
    assert [(f.rule, f.level, f.features) for f in a.findings] == \
        [(f.rule, f.level, f.features) for f in b.findings]
    assert (a.table.rows, a.table.rows_used, a.table.rows_dropped, a.table.missing) == \
        (b.table.rows, b.table.rows_used, b.table.rows_dropped, b.table.missing)
    assert_same_diagnostics(a.diagnostics, b.diagnostics)


def write_all_formats(frame: pd.DataFrame, folder: Path, *, row_group: int) -> dict[str, Path]:
    """The same rows as Parquet (many row groups), a Parquet folder, CSV and Arrow IPC."""
    table = pa.Table.from_pandas(frame, preserve_index=False)
    paths = {"parquet": folder / "t.parquet", "csv": folder / "t.csv",
             "arrow": folder / "t.arrow", "folder": folder / "parts"}
    pq.write_table(table, paths["parquet"], row_group_size=row_group)
    pacsv.write_csv(table, paths["csv"])
    feather.write_feather(table, paths["arrow"], chunksize=max(row_group // 2, 1))
    paths["folder"].mkdir()
    cuts = [0, len(frame) // 3, len(frame) // 3 + 1, len(frame)]  # uneven, one tiny file
    for k, (start, stop) in enumerate(itertools.pairwise(cuts)):
        pq.write_table(table.slice(start, stop - start), paths["folder"] / f"part-{k}.parquet",
                       row_group_size=row_group)
    return paths


def longley_frame() -> pd.DataFrame:
    return longley_data.load_pandas().data


def dependency_frame(rows: int = 900) -> pd.DataFrame:
    """Invented fleet-maintenance table: hours_total = hours_idle + hours_driving exactly,
    a categorical depot, a weight and missing values in two columns."""
    rng = np.random.default_rng(SEED)
    idle = rng.gamma(2.0, 3.0, rows)
    driving = rng.gamma(3.0, 4.0, rows)
    frame = pd.DataFrame({
        "hours_idle": idle,
        "hours_driving": driving,
        "hours_total": idle + driving,
        "oil_temp": rng.normal(90, 6, rows),
        "brake_wear": rng.uniform(0, 1, rows),
        "depot": rng.choice(["north", "east", "harbour", "south"], rows),
        "exposure": rng.uniform(0.5, 2.0, rows),
    })
    frame.loc[rng.choice(rows, 25, replace=False), "oil_temp"] = np.nan
    frame.loc[rng.choice(rows, 10, replace=False), "depot"] = None
    return frame


DEPENDENCY_POLICY = parse_policy("policy_version: 1\nname: fleet\ncolumns:\n  weight: exposure\n")
LONGLEY_POLICY = parse_policy("policy_version: 1\nname: longley\n")


# --- Longley and the exact dependency through every route --------------------------------------

@pytest.mark.parametrize("route", ["parquet", "folder", "csv", "arrow"])
def test_longley_through_every_file_route_matches_memory_and_statsmodels(
        tmp_path: Path, route: str) -> None:
    frame = longley_frame()
    paths = write_all_formats(frame, tmp_path, row_group=4)
    in_memory = gate.check(frame, LONGLEY_POLICY)
    streamed = gate.check(paths[route], LONGLEY_POLICY, chunk_rows=3)
    assert_same_verdict(in_memory, streamed)
    # Outside reference: statsmodels' variance_inflation_factor with a constant column.
    exog = np.column_stack([np.ones(len(frame)), frame.to_numpy()])
    expected = [variance_inflation_factor(exog, j) for j in range(1, exog.shape[1])]
    np.testing.assert_allclose(streamed.diagnostics.vif, expected, rtol=1e-7)


@pytest.mark.parametrize("route", ["parquet", "folder", "csv", "arrow"])
def test_exact_dependency_through_every_file_route(tmp_path: Path, route: str) -> None:
    frame = dependency_frame()
    paths = write_all_formats(frame, tmp_path, row_group=64)
    in_memory = gate.check(frame, DEPENDENCY_POLICY)
    streamed = gate.check(paths[route], DEPENDENCY_POLICY, chunk_rows=37)
    assert_same_verdict(in_memory, streamed)
    d = streamed.diagnostics
    names = streamed.features
    # Reference: the relation the table was built with (hours_total = idle + driving).
    (relation,) = [dep for dep in d.dependencies if dep.kind == "linear"]
    terms = {names[k]: v for k, v in relation.terms.items()}
    assert set(terms) == {"hours_idle", "hours_driving", "hours_total"}
    scale = terms["hours_total"]
    assert terms["hours_idle"] / scale == pytest.approx(-1.0, rel=1e-9)
    assert terms["hours_driving"] / scale == pytest.approx(-1.0, rel=1e-9)
    assert streamed.table.rows_dropped == in_memory.table.rows_dropped > 0


# --- any chunking gives the same verdict (hypothesis) --------------------------------------------

@pytest.fixture(scope="module")
def chunking_table(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Verdict]:
    folder = tmp_path_factory.mktemp("chunking")
    frame = dependency_frame(rows=700)
    path = folder / "fleet.parquet"
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), path, row_group_size=97)
    return path, gate.check(frame, DEPENDENCY_POLICY)


@settings(max_examples=25, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(chunk_rows=st.integers(min_value=1, max_value=800))
def test_any_chunking_gives_the_same_verdict(chunking_table: tuple[Path, Verdict],
                                             chunk_rows: int) -> None:
    path, whole = chunking_table
    assert_same_verdict(whole, gate.check(path, DEPENDENCY_POLICY, chunk_rows=chunk_rows))


def test_parquet_folder_equals_single_file(tmp_path: Path) -> None:
    frame = dependency_frame()
    paths = write_all_formats(frame, tmp_path, row_group=50)
    assert_same_verdict(gate.check(paths["parquet"], DEPENDENCY_POLICY),
                        gate.check(paths["folder"], DEPENDENCY_POLICY))


def test_big_row_group_is_read_in_bounded_batches(tmp_path: Path) -> None:
    """One row group of 5,000 rows comes out in chunks of at most chunk_rows rows."""
    rng = np.random.default_rng(SEED)
    path = tmp_path / "one_group.parquet"
    pq.write_table(pa.table({"a": rng.normal(size=5000), "b": rng.normal(size=5000)}), path)
    source = ParquetSource(path)
    assert pq.ParquetFile(path).metadata.num_row_groups == 1
    sizes = [chunk.num_rows for chunk in source.chunks(["a", "b"], chunk_rows=700)]
    assert sum(sizes) == 5000
    assert max(sizes) <= 700


def test_streamed_and_whole_row_group_reads_agree(tmp_path: Path,
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    """Small (or wide) row groups are read whole, big ones streamed in batches: same verdict."""
    frame = dependency_frame()
    path = write_all_formats(frame, tmp_path, row_group=400)["parquet"]
    whole = gate.check(path, DEPENDENCY_POLICY, chunk_rows=64)
    monkeypatch.setattr(table_module, "WHOLE_ROW_GROUP_BYTES", 0)
    monkeypatch.setattr(table_module, "STREAM_BYTES_PER_COLUMN", 0)
    source = ParquetSource(path)
    batches = [chunk.num_rows for chunk in source.chunks(["hours_idle"], chunk_rows=64)]
    assert max(batches) <= 64 and sum(batches) == len(frame)
    assert_same_verdict(whole, gate.check(path, DEPENDENCY_POLICY, chunk_rows=64))


def test_cli_chunk_rows_gives_the_same_verdict_json(tmp_path: Path) -> None:
    frame = dependency_frame()
    paths = write_all_formats(frame, tmp_path, row_group=64)
    policy = tmp_path / "policy.yaml"
    policy.write_text("policy_version: 1\nname: fleet\ncolumns:\n  weight: exposure\n")
    documents = []
    for chunk in ("5", "100000"):
        out = tmp_path / f"out-{chunk}"
        code = cli_main(["check", str(paths["parquet"]), "--policy", str(policy),
                              "--out", str(out), "--chunk-rows", chunk, "--quiet"])
        assert code == 1
        documents.append(json.loads((out / "verdict.json").read_text())["diagnostics"])
    small, large = documents
    for name, value in small["vif"].items():
        other = large["vif"][name]
        assert (value is None) == (other is None)
        if value is not None:
            assert value == pytest.approx(other, rel=RTOL)


# --- the local path stays light -----------------------------------------------------------------

def test_local_check_imports_neither_pandas_nor_dask(tmp_path: Path) -> None:
    """pandas costs ~0.9 s to import and dask more: a file check must not pay for them."""
    path = tmp_path / "t.parquet"
    rng = np.random.default_rng(SEED)
    pq.write_table(pa.table({"a": rng.normal(size=300), "b": rng.normal(size=300),
                             "kind": pa.array(rng.choice(["x", "y"], 300)),
                             "gap": pa.array([None if i % 7 else 1.0 for i in range(300)])}),
                   path)
    code = (
        "import sys, gate\n"
        f"v = gate.check({str(path)!r}, gate.parse_policy('policy_version: 1\\nname: t\\n"
        "columns:\\n  exclude: [gap]\\n'))\n"
        "print(v.status, 'pandas' in sys.modules, 'dask' in sys.modules)\n")
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                            check=True)
    status, pandas_loaded, dask_loaded = result.stdout.split()
    assert status in ("pass", "warn")
    assert (pandas_loaded, dask_loaded) == ("False", "False")


# --- progress line -------------------------------------------------------------------------------

class FakeClock:
    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


class FakeTerminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_is_silent_for_short_passes_and_when_not_a_terminal() -> None:
    clock = FakeClock()
    terminal = FakeTerminal()
    quick = RowProgress("reading rows", 1000, stream=terminal, clock=clock)
    clock.now = 1.0
    quick.advance(1000)
    quick.finish()
    assert terminal.getvalue() == ""

    pipe = io.StringIO()  # not a terminal: nothing, however long it runs
    slow = RowProgress("reading rows", 1000, stream=pipe, clock=clock)
    clock.now = 100.0
    slow.advance(10)
    slow.finish()
    assert pipe.getvalue() == ""


def test_progress_shows_rows_rate_and_time_left_then_clears() -> None:
    clock = FakeClock()
    terminal = FakeTerminal()
    progress = RowProgress("reading rows", 10_000_000, stream=terminal, clock=clock)
    clock.now = 4.0
    progress.advance(2_000_000)
    text = terminal.getvalue()
    assert "2,000,000 of 10,000,000 rows (20%)" in text
    assert "500.0k rows/s" in text
    assert "about 16 s left" in text
    progress.finish()
    assert terminal.getvalue().endswith("\r")
    assert not progress.shown


def test_progress_without_a_known_total_gives_rows_and_rate_only() -> None:
    clock = FakeClock()
    line = RowProgress("reading rows", None, stream=FakeTerminal(), clock=clock).line(2.0)
    assert "left" not in line and "rows/s" in line


def test_passes_report_every_row_to_the_progress(tmp_path: Path) -> None:
    frame = dependency_frame()
    path = write_all_formats(frame, tmp_path, row_group=64)["parquet"]
    counters: list[RowProgress] = []

    def factory(label: str, total: int | None) -> RowProgress:
        counters.append(RowProgress(label, total, stream=io.StringIO()))
        return counters[-1]

    gate.check(path, DEPENDENCY_POLICY, chunk_rows=50, progress=factory)
    main = counters[0]
    assert main.total == len(frame) and main.rows == len(frame)

