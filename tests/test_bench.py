"""Smoke run of the benchmark script (`python -m gate.bench --quick`): it runs end to end and
writes the figures as JSON with the documented shape. Timings are never asserted here."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest


@pytest.mark.slow
def test_quick_benchmark_writes_every_figure(tmp_path: Path) -> None:
    report_path = tmp_path / "bench.json"
    result = subprocess.run([sys.executable, "-m", "gate.bench", "--quick", "--json",
                             str(report_path)], capture_output=True, text=True, timeout=600, check=False)
    assert result.returncode == 0, result.stderr[-3000:]
    report = json.loads(report_path.read_text())
    assert report["mode"] == "quick"
    machine = report["machine"]
    assert machine["cores"] >= 1 and isinstance(machine["blas"], list)
    results = report["results"]
    assert set(results) == {"startup", "small", "main", "peer", "stream", "wide", "widest",
                            "history", "dask"}
    startup = results["startup"]
    assert startup["version_ratio"] == pytest.approx(startup["version_seconds"]
                                                     / startup["python_seconds"])
    assert startup["target_ratio"] == 4.0
    small = results["small"]
    assert small["target_ratio"] == 2.0 and small["target_ratio_no_html"] == 1.4
    assert small["check_files_ratio"] == pytest.approx(small["check_files_seconds"]
                                                       / small["check_seconds"])
    widest = results["widest"]
    assert widest["gate_peak_rss_mb"] > 0 and widest["verdict_json_mb"] > 0
    for key in ("main", "stream", "wide"):
        figures = results[key]
        assert figures["gate_seconds"] > 0 and figures["floor_seconds"] > 0
        assert figures["ratio"] == pytest.approx(figures["gate_seconds"]
                                                 / figures["floor_seconds"])
        assert figures["gate_peak_rss_mb"] > 0
    assert results["stream"]["target_peak_rss_mb"] == 600
    assert results["main"]["target_ratio"] == 1.3 and results["wide"]["target_ratio"] == 2.5
    peer = results["peer"]
    assert peer["sampled_columns"] < peer["columns"]  # sampled and extrapolated
    assert peer["speedup_in_process"] > 0
    assert peer["in_process_ratio"] == pytest.approx(peer["gate_in_process_seconds"]
                                                     / peer["floor_in_process_seconds"])
    assert peer["max_relative_vif_difference_on_sample"] < 1e-8  # same VIFs as statsmodels
    dask = results["dask"]
    assert dask["cluster_startup_seconds"] > 0 and dask["ratio"] > 0
    assert dask["max_relative_difference"] < 1e-10
    assert "ratio" in result.stdout and "machine:" in result.stdout


def test_bench_help_runs_without_heavy_work() -> None:
    result = subprocess.run([sys.executable, "-m", "gate.bench", "--help"],
                            capture_output=True, text=True, timeout=60, check=False)
    assert result.returncode == 0
    assert "--quick" in result.stdout and "--json" in result.stdout
