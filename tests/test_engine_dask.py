"""The Dask engine against the local engine on a real distributed.LocalCluster.

Two worker processes (``processes=True``, one thread each), started once for the module.
Every diagnostic must agree with the local engine to 1e-10 relative, on tables split into
uneven partitions, with missing rows, weights, and a categorical whose levels are missing from
some partitions. The references for the numbers themselves are in test_references.py and
test_streaming.py; here the local engine is the reference for the distributed route.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import gate
from gate.cli.main import main as cli_main
from gate.policy.models import parse_policy
from gate.stats.dask import path_partitions
from tests.test_streaming import (
    DEPENDENCY_POLICY,
    LONGLEY_POLICY,
    assert_same_verdict,
    dependency_frame,
    longley_frame,
    write_all_formats,
)

dask = pytest.importorskip("dask")
dd = pytest.importorskip("dask.dataframe")
distributed = pytest.importorskip("distributed")

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def client() -> Iterator[Any]:
    # A free port for the scheduler's HTTP server: 8787 may be taken by another cluster.
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       dashboard_address=":0",
                                       scheduler_kwargs={"dashboard": False})
    client = distributed.Client(cluster)
    client.wait_for_workers(2)
    yield client
    client.close()
    cluster.close()


def uneven(frame: pd.DataFrame, cuts: list[int]) -> Any:
    """A dask DataFrame whose partitions have the given (uneven) row boundaries."""
    frame = frame.reset_index(drop=True)
    parts = [frame.iloc[a:b] for a, b in zip([0, *cuts], [*cuts, len(frame)])]
    return dd.from_delayed([dask.delayed(part) for part in parts], meta=frame.iloc[:0])


def patchy_frame(rows: int = 1200) -> pd.DataFrame:
    """Invented bike-share depot table: the 'depot' level 'harbour' occurs only in the last
    rows (so most partitions never see it), missing values, a weight, a near-duplicate."""
    frame = dependency_frame(rows)
    frame["depot"] = np.where(np.arange(rows) < rows - 40,
                              np.where(np.arange(rows) % 2 == 0, "north", "east"), "harbour")
    frame.loc[5, "depot"] = None
    frame["hours_total"] += np.random.default_rng(3).normal(0, 0.5, rows)  # near, not exact
    return frame


def test_dask_dataframe_uneven_partitions_missing_weights_categorical(client: Any) -> None:
    frame = patchy_frame()
    local = gate.check(frame, DEPENDENCY_POLICY)
    distributed_verdict = gate.check(uneven(frame, [7, 300, 310, 1100]), DEPENDENCY_POLICY,
                                     scheduler=client)
    assert local.diagnostics.groups and local.table.rows_dropped > 0
    assert_same_verdict(local, distributed_verdict)


def test_dask_exact_dependency_needs_the_exact_pass_and_agrees(client: Any) -> None:
    frame = dependency_frame(1000)
    local = gate.check(frame, DEPENDENCY_POLICY)
    assert local.diagnostics.route == "gram+tsqr"
    remote = gate.check(uneven(frame, [1, 2, 480, 999]), DEPENDENCY_POLICY, scheduler=client)
    assert_same_verdict(local, remote)


def test_dask_longley_matches_local(client: Any) -> None:
    frame = longley_frame()
    remote = gate.check(uneven(frame, [3, 4, 11]), LONGLEY_POLICY, scheduler=client)
    assert_same_verdict(gate.check(frame, LONGLEY_POLICY), remote)


@pytest.mark.parametrize("route", ["parquet", "folder", "csv", "arrow"])
def test_dask_engine_on_files_matches_local(client: Any, tmp_path: Path, route: str) -> None:
    frame = patchy_frame(900)
    paths = write_all_formats(frame, tmp_path, row_group=128)
    local = gate.check(paths[route], DEPENDENCY_POLICY, chunk_rows=50)
    remote = gate.check(paths[route], DEPENDENCY_POLICY, chunk_rows=50, engine="dask",
                        scheduler=client)
    assert_same_verdict(local, remote)
    assert remote.table.sha256 == local.table.sha256


def test_parquet_partitions_are_row_groups_across_files(tmp_path: Path) -> None:
    paths = write_all_formats(dependency_frame(600), tmp_path, row_group=100)
    parts = path_partitions(paths["folder"])
    assert sum(p.rows for p in parts) == 600
    assert [p.first_row for p in parts] == list(np.cumsum([0] + [p.rows for p in parts])[:-1])


def test_cli_engine_dask_with_scheduler_address(client: Any, tmp_path: Path) -> None:
    frame = patchy_frame(500)
    table = tmp_path / "t.parquet"
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), table,
                   row_group_size=90)
    policy = tmp_path / "p.yaml"
    policy.write_text("policy_version: 1\nname: fleet\ncolumns:\n  weight: exposure\n")
    codes = [cli_main(["check", str(table), "--policy", str(policy), "--out", str(out),
                       "--quiet", *extra])
             for out, extra in ((tmp_path / "local", []),
                                (tmp_path / "dask", ["--engine", "dask", "--scheduler",
                                                     client.scheduler.address]))]
    assert codes[0] == codes[1]
    local, remote = (json.loads((tmp_path / k / "verdict.json").read_text())["diagnostics"]
                     for k in ("local", "dask"))
    for name, value in local["vif"].items():
        assert value == pytest.approx(remote["vif"][name], rel=1e-10)


def test_dask_dataframe_needs_the_dask_engine() -> None:
    frame = dd.from_pandas(longley_frame(), npartitions=2)
    with pytest.raises(gate.TableError, match="engine='dask'"):
        gate.check(frame, parse_policy("policy_version: 1\nname: t\n"), engine="local")
