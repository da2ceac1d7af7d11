"""The commit hook definition, the example hook config and the pipeline-task example run."""

from __future__ import annotations

import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

ROOT = Path(__file__).resolve().parents[1]
SEED = 20261202


def hook() -> dict[str, object]:
    hooks = yaml.safe_load((ROOT / ".pre-commit-hooks.yaml").read_text())
    assert isinstance(hooks, list) and len(hooks) == 1
    entry = hooks[0]
    assert isinstance(entry, dict)
    return entry


def entry_command(entry: str) -> list[str]:
    """The hook's entry as argv; `gate` from PATH, else the same module via this Python."""
    argv = shlex.split(entry)
    if argv[0] == "gate" and shutil.which("gate") is None:
        argv = [sys.executable, "-m", "gate", *argv[1:]]
    return argv


def test_hook_definition() -> None:
    entry = hook()
    assert entry["id"] == "collinearity-gate"
    assert entry["language"] == "python"
    assert entry["entry"] == "gate check-files"
    assert entry["pass_filenames"] is True
    pattern = re.compile(str(entry["files"]))
    assert pattern.search("data/features/station_hours.parquet")
    assert pattern.search("station_hours.csv")
    assert not pattern.search("station_hours.json")
    assert not pattern.search("notes.parquet.md")


def test_example_config_uses_the_hook() -> None:
    config = yaml.safe_load((ROOT / "examples" / "pre-commit-config.yaml").read_text())
    [repo] = config["repos"]
    [used] = repo["hooks"]
    assert used["id"] == hook()["id"]
    assert "--policy" in used["args"]
    assert re.search(used["files"], "data/features/hours.parquet")


def tiny_tables(folder: Path) -> tuple[Path, Path]:
    rng = np.random.default_rng(SEED)
    rows = 120
    good = pd.DataFrame({"temp_c": rng.normal(12, 6, rows),
                         "docks_free": rng.normal(10, 3, rows)})
    bad = good.assign(docks_free_copy=good.docks_free * 2.0 + 1.0)
    good_path, bad_path = folder / "good.parquet", folder / "bad.csv"
    good.to_parquet(good_path)
    bad.to_csv(bad_path, index=False)
    return good_path, bad_path


def run_hook(folder: Path, *files: Path) -> subprocess.CompletedProcess[str]:
    # pre-commit runs the entry at the repository root with repository-relative paths
    argv = entry_command(str(hook()["entry"])) + ["--out", "out",
                                                  *(str(f.relative_to(folder)) for f in files)]
    return subprocess.run(argv, capture_output=True, text=True, cwd=folder, timeout=120,
                          check=False)


@pytest.mark.slow
def test_hook_entry_runs_on_tiny_tables(tmp_path: Path) -> None:
    good, bad = tiny_tables(tmp_path)
    passed = run_hook(tmp_path, good)
    assert passed.returncode == 0, passed.stderr
    assert "PASS" in passed.stdout
    assert (tmp_path / "out" / "good.parquet.gate" / "verdict.json").exists()
    both = run_hook(tmp_path, good, bad)
    assert both.returncode == 1
    assert "FAIL  bad.csv" in both.stdout
    assert (tmp_path / "out" / "bad.csv.gate" / "verdict.json").exists()
    missing = run_hook(tmp_path, good, tmp_path / "gone.parquet")
    assert missing.returncode == 2
    assert "gone.parquet" in missing.stderr and "Traceback" not in missing.stderr
    nothing = run_hook(tmp_path)
    assert nothing.returncode == 0


@pytest.mark.slow
def test_pipeline_task_example_runs(tmp_path: Path) -> None:
    result = subprocess.run([sys.executable, str(ROOT / "examples" / "pipeline_task.py"),
                             str(tmp_path)], capture_output=True, text=True, timeout=300,
                            check=False)
    assert result.returncode == 0, result.stderr
    assert "task failed as it should" in result.stderr
    assert "task passed" in result.stderr
    assert (tmp_path / "raw" / "verdict.json").exists()


def test_pipeline_task_function_raises_its_own_error(tmp_path: Path) -> None:
    from gate.errors import GateFailed
    from gate.examples.pipeline_task import FeatureTableRejected, validate_station_features

    good, bad = tiny_tables(tmp_path)
    summary = validate_station_features(good, None, tmp_path / "ok", run_id="1")
    assert summary["status"] == "pass" and summary["features"] == ["temp_c", "docks_free"]
    with pytest.raises(FeatureTableRejected) as caught:
        validate_station_features(bad, None, tmp_path / "no", run_id="2")
    assert isinstance(caught.value.__cause__, GateFailed)
    assert caught.value.__cause__.verdict.status == "fail"
