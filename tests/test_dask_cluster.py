"""`gate check --engine dask --scheduler tcp://...` against a real cluster of separate processes.

The module starts one scheduler and one worker as their own processes (``dask scheduler``,
``dask worker``), each in its own temporary working directory, different from the one the CLI
runs in, and stops them afterwards (terminate, wait, kill on timeout). The CLI runs as a
subprocess from the table's folder with a RELATIVE table path, as a user would type it.

When the tests run as root, the worker runs in its own mount namespace with a tmpfs mounted
over one folder, so a table there exists for the CLI but not for the worker: the real "every
worker must see the path" situation on one machine. Otherwise that test is skipped.

Reference: the local engine (its numbers are checked against statsmodels, mpmath and NIST in
test_references.py and test_streaming.py); here the distributed route must agree to 1e-10.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

import gate

pytest.importorskip("distributed")

pytestmark = pytest.mark.slow

#: The worktree root, so that the scheduler, the worker and the CLI import this gate.
ROOT = Path(gate.__file__).resolve().parent.parent
#: Seconds to wait for the cluster to come up (a loaded CI machine is slow to start Python).
START_TIMEOUT_S = 120
STOP_TIMEOUT_S = 20


@dataclass
class Cluster:
    address: str
    hidden: Path | None  # a folder the worker cannot see (None: not set up, not root)
    worker_dir: Path


def _env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(ROOT), env.get("PYTHONPATH")) if p)
    return env


def _stop(process: subprocess.Popen[bytes]) -> None:
    if process.poll() is None:
        process.terminate()
        try:
            process.wait(STOP_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(STOP_TIMEOUT_S)


@contextmanager
def running_cluster(base: Path, *, worker_env: dict[str, str] | None = None,
                    hide: bool = False) -> Iterator[Cluster]:
    """One scheduler and one worker process, each in its own folder under ``base``; stopped
    (terminate, wait, kill on timeout) however the block ends."""
    from distributed import Client

    scheduler_dir, worker_dir, hidden = base / "scheduler", base / "worker", base / "hidden"
    for folder in (scheduler_dir, worker_dir, hidden):
        folder.mkdir(parents=True)
    address_file = base / "scheduler.json"
    dask = [sys.executable, "-m", "dask"]
    processes: list[subprocess.Popen[bytes]] = []
    try:
        with (scheduler_dir / "log").open("wb") as log:
            processes.append(subprocess.Popen(
                [*dask, "scheduler", "--port", "0", "--no-dashboard",
                 "--scheduler-file", str(address_file)],
                cwd=scheduler_dir, env=_env(), stdout=log, stderr=subprocess.STDOUT))
        worker = [*dask, "worker", "--scheduler-file", str(address_file), "--nworkers", "1",
                  "--nthreads", "1", "--no-dashboard"]
        can_hide = hide and os.geteuid() == 0 and shutil.which("unshare") is not None and \
            subprocess.run(["unshare", "-m", "--propagation", "private", "true"],
                           check=False, capture_output=True).returncode == 0
        if can_hide:
            # The worker's own mount namespace: an empty tmpfs over `hidden`.
            worker = ["unshare", "-m", "--propagation", "private", "sh", "-c",
                      'mount -t tmpfs gate-hidden "$0" && exec "$@"', str(hidden), *worker]
        with (worker_dir / "log").open("wb") as log:
            processes.append(subprocess.Popen(worker, cwd=worker_dir, env=worker_env or _env(),
                                              stdout=log, stderr=subprocess.STDOUT))
        deadline = time.monotonic() + START_TIMEOUT_S
        while not address_file.exists() or not address_file.read_text().strip():
            assert time.monotonic() < deadline, "the scheduler did not start"
            assert all(p.poll() is None for p in processes), "a cluster process exited"
            time.sleep(0.2)
        address = json.loads(address_file.read_text())["address"]
        with Client(address, timeout=f"{START_TIMEOUT_S}s") as client:  # type: ignore[no-untyped-call]
            client.wait_for_workers(1, timeout=START_TIMEOUT_S)
        yield Cluster(address, hidden if can_hide else None, worker_dir)
    finally:
        for process in reversed(processes):
            _stop(process)
    assert all(p.returncode is not None for p in processes)  # nothing left running


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Cluster]:
    with running_cluster(tmp_path_factory.mktemp("cluster"), hide=True) as running:
        yield running


def run_local(args: list[str], cwd: Path, capsys: pytest.CaptureFixture[str],
              monkeypatch: pytest.MonkeyPatch) -> tuple[int, str]:
    """The local engine in this process (same CLI code, same stderr): exit code and stderr."""
    from gate.cli.main import main

    capsys.readouterr()
    with monkeypatch.context() as patch:
        patch.chdir(cwd)
        code = main(["check", *args, "--quiet"])
    return code, capsys.readouterr().err


def run_cli(args: list[str], cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "gate", "check", *args, "--quiet"], check=False,
                          cwd=cwd, env=_env(), capture_output=True, text=True, timeout=300)


def fleet_table(rows: int = 1500, seed: int = 11) -> pa.Table:
    """Invented fleet-maintenance table: an exact dependency (total = parts + labour, so the
    exact pass runs), a near-duplicate, a depot level seen only in the last rows, missing
    values and an exposure weight."""
    rng = np.random.default_rng(seed)
    mileage = rng.gamma(4.0, 20_000.0, rows)
    parts = rng.normal(800.0, 150.0, rows)
    labour = rng.normal(500.0, 90.0, rows)
    engine_hours = mileage / 45.0 + rng.normal(0.0, 60.0, rows)
    depot = np.where(np.arange(rows) % 3 == 0, "riverside", "uplands").astype(object)
    depot[-25:] = "harbour"
    age = rng.uniform(0.5, 12.0, rows)
    age[[row for row in (40, 700, 1321) if row < rows]] = np.nan
    return pa.table({
        "mileage_km": mileage, "engine_hours": engine_hours, "parts_cost": parts,
        "labour_cost": labour, "total_cost": parts + labour, "age_years": age,
        "depot": pa.array(depot, pa.string()),
        "exposure": rng.uniform(0.2, 1.0, rows),
    })


POLICY = "policy_version: 1\nname: fleet\ncolumns:\n  weight: exposure\n"


def assert_close(local: Any, remote: Any, where: str = "verdict") -> None:
    """Every number to 1e-10 relative (1e-12 absolute near zero); everything else equal."""
    if isinstance(local, dict):
        assert isinstance(remote, dict) and local.keys() == remote.keys(), where
        for key in local:
            if key != "created_at":
                assert_close(local[key], remote[key], f"{where}.{key}")
    elif isinstance(local, list):
        assert isinstance(remote, list) and len(local) == len(remote), where
        for k, (a, b) in enumerate(zip(local, remote)):
            assert_close(a, b, f"{where}[{k}]")
    elif isinstance(local, float) and not isinstance(local, bool):
        assert remote == pytest.approx(local, rel=1e-10, abs=1e-12), where
    else:
        assert local == remote, where


@pytest.mark.parametrize("layout", ["file", "folder"])
def test_relative_path_from_another_directory_matches_local(
        cluster: Cluster, tmp_path: Path, layout: str, capsys: pytest.CaptureFixture[str],
        monkeypatch: pytest.MonkeyPatch) -> None:
    data = tmp_path / "data"
    data.mkdir()
    table = fleet_table()
    if layout == "file":
        pq.write_table(table, data / "fleet.parquet", row_group_size=220)
        relative = "data/fleet.parquet"
    else:
        (data / "fleet").mkdir()
        for k, start in enumerate((0, 600, 601)):
            stop = {0: 600, 600: 601, 601: table.num_rows}[start]
            pq.write_table(table.slice(start, stop - start), data / "fleet" / f"p{k}.parquet",
                           row_group_size=250)
        relative = "data/fleet"
    (tmp_path / "policy.yaml").write_text(POLICY)
    assert tmp_path.resolve() != cluster.worker_dir.resolve()
    common = [relative, "--policy", "policy.yaml", "--junit", "junit.xml"]
    local = run_local([*common, "--out", "out-local"], tmp_path, capsys, monkeypatch)
    remote = run_cli([*common, "--out", "out-dask", "--engine", "dask",
                      "--scheduler", cluster.address], tmp_path)
    assert (remote.returncode, remote.stderr) == local
    assert local[0] in (0, 1), local[1]
    expected, got = (json.loads((tmp_path / out / "verdict.json").read_text())
                     for out in ("out-local", "out-dask"))
    assert expected["diagnostics"]["route"] == "gram+tsqr"  # the exact pass ran on the cluster
    assert got["table"]["source"] == relative  # the name the user typed, not the worker's path
    assert_close(expected, got)


def _bad_tables(folder: Path) -> dict[str, tuple[str, str | None]]:
    """(relative table path, policy text or None) per kind of unusable input; each bad value
    sits in a later row group than the first, and infinite values in three row groups."""
    base = fleet_table(1200, seed=5)
    cases: dict[str, tuple[pa.Table, str | None]] = {}

    def replaced(name: str, rows: list[int], value: float | None) -> pa.Table:
        column = base.column(name).to_pylist()
        for row in rows:
            column[row] = value
        return base.set_column(base.schema.get_field_index(name), name,
                               pa.array(column, pa.float64()))

    cases["infinite"] = (replaced("engine_hours", [450, 451, 900, 1199], float("inf")), None)
    cases["missing-fail"] = (replaced("mileage_km", [610, 1000], None).drop_columns(
        ["age_years"]), "policy_version: 1\nname: strict\nmissing: fail\n")
    cases["negative-weight"] = (replaced("exposure", [777], -0.5), POLICY)
    levels = np.array([f"unit-{k:04d}" for k in range(base.num_rows)], dtype=object)
    cases["categorical-levels"] = (base.append_column("vehicle", pa.array(levels, pa.string())),
                                   None)
    out: dict[str, tuple[str, str | None]] = {}
    for name, (table, policy) in cases.items():
        pq.write_table(table, folder / f"{name}.parquet", row_group_size=200)
        if policy is not None:
            (folder / f"{name}.yaml").write_text(policy)
        out[name] = (f"{name}.parquet", f"{name}.yaml" if policy is not None else None)
    return out


BAD = ["infinite", "missing-fail", "negative-weight", "categorical-levels"]


@pytest.fixture(scope="module")
def bad_tables(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, Any]]:
    folder = tmp_path_factory.mktemp("bad")
    return folder, _bad_tables(folder)


@pytest.mark.parametrize("case", BAD)
def test_unusable_input_prints_the_local_engines_line(
        cluster: Cluster, bad_tables: Any, case: str, capsys: pytest.CaptureFixture[str],
        monkeypatch: pytest.MonkeyPatch) -> None:
    folder, cases = bad_tables
    table, policy = cases[case]
    args = [table, "--out", "out", *(["--policy", policy] if policy else [])]
    local = run_local(args, folder, capsys, monkeypatch)
    remote = run_cli([*args, "--engine", "dask", "--scheduler", cluster.address], folder)
    assert local[0] == 2 and local[1].count("\n") == 1, local[1]
    assert (remote.returncode, remote.stderr) == local
    if case == "infinite":  # the whole table's count, and the first chunk that holds one
        assert "4 infinite values (the first in rows 400-599)" in local[1]


def test_unusable_input_on_the_default_local_cluster(
        bad_tables: Any, capsys: pytest.CaptureFixture[str],
        monkeypatch: pytest.MonkeyPatch) -> None:
    """Without --scheduler the engine starts worker processes that share the terminal: they
    must print nothing either."""
    folder, cases = bad_tables
    table, _ = cases["infinite"]
    local = run_local([table, "--out", "out"], folder, capsys, monkeypatch)
    remote = run_cli([table, "--out", "out", "--engine", "dask"], folder)
    assert (remote.returncode, remote.stderr) == local


def test_a_path_the_worker_cannot_see_is_exit_2_naming_it(cluster: Cluster) -> None:
    if cluster.hidden is None:
        pytest.skip("needs root and unshare to hide a folder from the worker")
    pq.write_table(fleet_table(300), cluster.hidden / "fleet.parquet")
    result = run_cli(["fleet.parquet", "--out", "out", "--engine", "dask",
                      "--scheduler", cluster.address], cluster.hidden)
    assert result.returncode == 2, result.stderr
    assert result.stderr.count("\n") == 1, result.stderr
    assert result.stderr.startswith("gate: error: fleet.parquet: a Dask worker (tcp://")
    assert f"cannot open {cluster.hidden / 'fleet.parquet'} (no such file or directory)" \
        in result.stderr
    assert "every worker must see the table at this absolute path" in result.stderr


def test_a_csv_the_worker_cannot_see_is_exit_2_too(cluster: Cluster) -> None:
    if cluster.hidden is None:
        pytest.skip("needs root and unshare to hide a folder from the worker")
    pacsv.write_csv(fleet_table(300), cluster.hidden / "fleet.csv")
    result = run_cli(["fleet.csv", "--out", "out", "--engine", "dask",
                      "--scheduler", cluster.address], cluster.hidden)
    assert result.returncode == 2 and result.stderr.count("\n") == 1, result.stderr
    assert "every worker must see the table" in result.stderr


@pytest.mark.parametrize("address", ["not an address", "tcp://scheduler-host",
                                     "tcp://10.0.0.5:99999", "http://10.0.0.5:8786",
                                     "tcp://evil\n:8786"])
def test_malformed_scheduler_address_is_exit_2(
        tmp_path: Path, address: str, capsys: pytest.CaptureFixture[str],
        monkeypatch: pytest.MonkeyPatch) -> None:
    pq.write_table(fleet_table(100), tmp_path / "t.parquet")
    started = time.monotonic()
    code, stderr = run_local(["t.parquet", "--out", "out", "--engine", "dask",
                              "--scheduler", address], tmp_path, capsys, monkeypatch)
    assert code == 2 and stderr.count("\n") == 1, stderr
    assert stderr.startswith("gate: error: scheduler address '")
    assert "is not SCHEME://HOST:PORT" in stderr
    assert time.monotonic() - started < 5  # refused before any connection attempt


def test_unreachable_scheduler_is_exit_2_after_the_stated_timeout(tmp_path: Path) -> None:
    from gate.stats.dask import SCHEDULER_TIMEOUT_S

    with socket.socket() as probe:  # a port nothing listens on
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    pq.write_table(fleet_table(100), tmp_path / "t.parquet")
    started = time.monotonic()
    result = run_cli(["t.parquet", "--out", "out", "--engine", "dask",
                      "--scheduler", f"tcp://127.0.0.1:{port}"], tmp_path)
    elapsed = time.monotonic() - started
    assert result.returncode == 2, result.stderr
    assert result.stderr == (f"gate: error: cannot reach the Dask scheduler at "
                             f"tcp://127.0.0.1:{port} within {SCHEDULER_TIMEOUT_S} s; start it "
                             "(dask scheduler) or fix --scheduler\n")
    assert SCHEDULER_TIMEOUT_S <= elapsed < SCHEDULER_TIMEOUT_S + 60


def test_workers_that_cannot_import_gate_are_exit_2_at_once(tmp_path: Path) -> None:
    """A worker whose environment lacks gate (here: a `gate` package first on its path that
    fails to import, as a missing install does) used to drop its connection on the first task
    it could not unpickle, and the check then waited for ever. Now: exit 2 before any task,
    one line naming the cause and the fix, and the worker is still up."""
    fake = tmp_path / "no-gate"
    (fake / "gate").mkdir(parents=True)
    (fake / "gate" / "__init__.py").write_text(
        'raise ModuleNotFoundError("No module named \'gate\'", name="gate")\n')
    worker_env = {**os.environ, "PYTHONPATH": str(fake)}
    table = tmp_path / "fleet.parquet"
    pq.write_table(fleet_table(200), table)
    with running_cluster(tmp_path / "cluster", worker_env=worker_env) as bad:
        start = time.monotonic()
        result = run_cli(["fleet.parquet", "--engine", "dask", "--scheduler", bad.address,
                          "--no-html"], tmp_path)
        assert time.monotonic() - start < 120
        assert result.returncode == 2, result.stderr[-2000:]
        lines = result.stderr.strip().splitlines()
        assert len(lines) == 1 and "Traceback" not in result.stderr, result.stderr
        assert "cannot import gate" in lines[0] and "install collinearity-gate" in lines[0]
        from distributed import Client

        with Client(bad.address, timeout="30s") as client:  # type: ignore[no-untyped-call]
            assert len(client.scheduler_info()["workers"]) == 1  # the worker is still up
