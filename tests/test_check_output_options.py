"""`gate check --format json` and `--quiet`: output for pipelines."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from conftest import make_clean_frame, make_docks_frame


def test_format_json_prints_exactly_the_verdict_document(tmp_path: Path, run_cli: Any,
                                                         write_table: Any) -> None:
    table = write_table(make_docks_frame(), "docks.parquet")
    result = run_cli(["check", table, "--out", tmp_path / "out", "--format", "json"])
    assert result.code == 1
    assert result.out == (tmp_path / "out" / "verdict.json").read_text(encoding="utf-8")
    assert json.loads(result.out)["status"] == "fail"


def test_quiet_prints_nothing_but_still_writes(tmp_path: Path, run_cli: Any,
                                               write_table: Any) -> None:
    table = write_table(make_clean_frame(), "clean.csv")
    result = run_cli(["check", table, "--out", tmp_path / "out", "--quiet"])
    assert (result.code, result.out, result.err) == (0, "", "")
    assert (tmp_path / "out" / "verdict.json").exists()
    assert (tmp_path / "out" / "summary.html").exists()


def test_quiet_still_reports_bad_input_on_stderr(tmp_path: Path, run_cli: Any) -> None:
    result = run_cli(["check", tmp_path / "missing.parquet", "--quiet"])
    assert result.code == 2 and result.out == "" and len(result.err_lines) == 1


def test_text_format_lists_the_written_files(tmp_path: Path, run_cli: Any,
                                             write_table: Any) -> None:
    table = write_table(make_clean_frame(), "clean.parquet")
    result = run_cli(["check", table, "--out", tmp_path / "out"])
    assert result.code == 0 and result.out.startswith("PASS")
    assert "summary.html" in result.out and "verdict.json" in result.out
