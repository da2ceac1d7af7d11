"""Every bad-input path through `gate check`: exit 2, one line on stderr, no traceback, and the
line names what is wrong (file, column or key) so the user can fix it."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

CliRunner = Callable[[list[Any]], Any]
Writer = Callable[..., Path]


def assert_unusable(result: Any, *mentions: str) -> str:
    """Exit 2, exactly one stderr line starting 'gate: error:', no traceback, names given."""
    assert result.code == 2, (result.code, result.err)
    assert "Traceback" not in result.err
    lines = result.err_lines
    assert len(lines) == 1, lines
    line = lines[0]
    assert line.startswith("gate: error: ")
    for mention in mentions:
        assert mention in line, (mention, line)
    return line


def sample_frame(rows: int = 30) -> pd.DataFrame:
    # Invented fleet-maintenance table.
    rng = np.random.default_rng(11)
    return pd.DataFrame({
        "odometer_km": rng.uniform(1e4, 2e5, rows),
        "engine_hours": rng.uniform(100, 9000, rows),
        "tyre_wear": rng.uniform(0, 1, rows),
    })


@pytest.fixture
def out(tmp_path: Path) -> Path:
    return tmp_path / "out"


def check_argv(table: Path, out: Path, policy: Path | None = None) -> list[Any]:
    argv: list[Any] = ["check", table, "--out", out]
    if policy is not None:
        argv += ["--policy", policy]
    return argv


def test_missing_table_file(run_cli: CliRunner, tmp_path: Path, out: Path) -> None:
    missing = tmp_path / "no_such_table.parquet"
    line = assert_unusable(run_cli(check_argv(missing, out)), str(missing))
    assert "not found" in line
    assert not out.exists()


def test_unknown_suffix(run_cli: CliRunner, tmp_path: Path, out: Path) -> None:
    table = tmp_path / "fleet.xlsx"
    table.write_bytes(b"PK\x03\x04 not really a spreadsheet")
    line = assert_unusable(run_cli(check_argv(table, out)), str(table), ".xlsx")
    assert ".parquet" in line and ".csv" in line  # says what is allowed


@pytest.mark.parametrize("name", ["fleet.parquet", "fleet.feather", "fleet.arrow"])
def test_corrupt_binary_table(run_cli: CliRunner, tmp_path: Path, out: Path, name: str) -> None:
    table = tmp_path / name
    table.write_bytes(b"\x00\x01garbage, not a columnar file\xff" * 10)
    assert_unusable(run_cli(check_argv(table, out)), str(table))


def test_truncated_parquet(run_cli: CliRunner, write_table: Writer, out: Path) -> None:
    table = write_table(sample_frame(), "fleet.parquet")
    data = table.read_bytes()
    table.write_bytes(data[: len(data) // 2])
    assert_unusable(run_cli(check_argv(table, out)), str(table))


def test_empty_csv(run_cli: CliRunner, tmp_path: Path, out: Path) -> None:
    table = tmp_path / "fleet.csv"
    table.write_bytes(b"")
    assert_unusable(run_cli(check_argv(table, out)), str(table))


def test_csv_value_of_wrong_type_late_in_file(run_cli: CliRunner, tmp_path: Path, out: Path
                                              ) -> None:
    # The first block infers numbers; a word far down must still be reported, not crash.
    rows = ["odometer_km,engine_hours"] + [f"{i * 10.5},{i}" for i in range(200_000)]
    rows.append("broken,7")
    table = tmp_path / "fleet.csv"
    table.write_text("\n".join(rows) + "\n")
    assert_unusable(run_cli(check_argv(table, out)), str(table))


def test_folder_without_parquet_files(run_cli: CliRunner, tmp_path: Path, out: Path) -> None:
    folder = tmp_path / "empty_folder"
    folder.mkdir()
    assert_unusable(run_cli(check_argv(folder, out)), str(folder))


def test_datetime_column_not_excluded(run_cli: CliRunner, write_table: Writer, out: Path
                                      ) -> None:
    frame = sample_frame().assign(
        serviced_at=pd.date_range("2026-01-01", periods=30, freq="D"))
    table = write_table(frame, "fleet.parquet")
    line = assert_unusable(run_cli(check_argv(table, out)), str(table), "serviced_at")
    assert "columns.exclude" in line  # the fix


def test_nested_column_not_excluded(run_cli: CliRunner, write_table: Writer, out: Path) -> None:
    table = pa.Table.from_pandas(sample_frame(), preserve_index=False).append_column(
        "parts", pa.array([[1, 2]] * 30, pa.list_(pa.int64())))
    path = write_table(table, "fleet.parquet")
    assert_unusable(run_cli(check_argv(path, out)), str(path), "parts")


def test_include_names_a_missing_column(run_cli: CliRunner, write_table: Writer,
                                        write_policy: Writer, out: Path) -> None:
    table = write_table(sample_frame())
    policy = write_policy("""
        policy_version: 1
        name: fleet
        columns: {include: [odometer_km, brake_wear]}
    """)
    assert_unusable(run_cli(check_argv(table, out, policy)), str(table), "brake_wear",
                    "columns.include")


@pytest.mark.parametrize("key", ["categorical", "weight"])
def test_categorical_or_weight_column_missing(run_cli: CliRunner, write_table: Writer,
                                              write_policy: Writer, out: Path, key: str) -> None:
    table = write_table(sample_frame())
    value = "[depot]" if key == "categorical" else "depot"
    policy = write_policy(f"""
        policy_version: 1
        name: fleet
        columns: {{{key}: {value}}}
    """)
    assert_unusable(run_cli(check_argv(table, out, policy)), str(table), "depot",
                    f"columns.{key}")


WEIGHT_CASES = {
    "negative": ([1.0] * 29 + [-2.0], "negative"),
    "missing": ([1.0] * 29 + [None], "missing"),
    "all_zero": ([0.0] * 30, "zero"),
    "infinite": ([1.0] * 29 + [float("inf")], "infinite"),
}


@pytest.mark.parametrize("case", list(WEIGHT_CASES))
@pytest.mark.parametrize("suffix", [".parquet", ".csv"])
def test_bad_weights(run_cli: CliRunner, write_table: Writer, write_policy: Writer, out: Path,
                     case: str, suffix: str) -> None:
    weights, word = WEIGHT_CASES[case]
    frame = sample_frame().assign(trip_weight=pd.array(weights, dtype="Float64"))
    table = write_table(frame, f"fleet{suffix}")
    policy = write_policy("""
        policy_version: 1
        name: fleet
        columns: {weight: trip_weight}
    """)
    line = assert_unusable(run_cli(check_argv(table, out, policy)), str(table), "trip_weight")
    assert word in line


def test_non_numeric_weight(run_cli: CliRunner, write_table: Writer, write_policy: Writer,
                            out: Path) -> None:
    frame = sample_frame().assign(trip_weight=["heavy", "light"] * 15)
    table = write_table(frame)
    policy = write_policy("""
        policy_version: 1
        name: fleet
        columns: {weight: trip_weight}
    """)
    line = assert_unusable(run_cli(check_argv(table, out, policy)), str(table), "trip_weight")
    assert "numeric" in line


@pytest.mark.parametrize("value", [np.inf, -np.inf])
@pytest.mark.parametrize("suffix", [".parquet", ".feather", ".csv"])
def test_infinite_values_name_column_and_count(run_cli: CliRunner, write_table: Writer,
                                               out: Path, value: float, suffix: str) -> None:
    frame = sample_frame()
    frame.loc[[3, 17, 20], "engine_hours"] = value
    table = write_table(frame, f"fleet{suffix}")
    line = assert_unusable(run_cli(check_argv(table, out)), str(table), "engine_hours")
    assert "3 infinite" in line


def test_infinite_values_counted_over_the_whole_table(run_cli: CliRunner, write_table: Writer,
                                                      out: Path) -> None:
    # Spread over several chunks: the count is the column's total, not the first chunk's.
    frame = sample_frame(rows=30)
    frame.loc[[1, 12, 25], "tyre_wear"] = np.inf
    table = write_table(frame)
    result = run_cli(check_argv(table, out) + ["--chunk-rows", "5"])
    line = assert_unusable(result, str(table), "tyre_wear")
    assert "3 infinite" in line


def test_missing_values_with_missing_fail(run_cli: CliRunner, write_table: Writer,
                                          write_policy: Writer, out: Path) -> None:
    frame = sample_frame()
    frame.loc[[4, 9], "tyre_wear"] = np.nan
    table = write_table(frame)
    policy = write_policy("""
        policy_version: 1
        name: fleet
        missing: fail
    """)
    line = assert_unusable(run_cli(check_argv(table, out, policy)), str(table), "tyre_wear")
    assert "missing" in line and "drop_rows" in line  # the fix


def test_missing_category_with_missing_fail(run_cli: CliRunner, write_table: Writer,
                                            write_policy: Writer, out: Path) -> None:
    frame = sample_frame().assign(depot=["north", "south", None] * 10)
    table = write_table(frame)
    policy = write_policy("""
        policy_version: 1
        name: fleet
        missing: fail
    """)
    assert_unusable(run_cli(check_argv(table, out, policy)), str(table), "depot")


@pytest.mark.parametrize("rows", [0, 1])
def test_fewer_than_two_rows(run_cli: CliRunner, write_table: Writer, out: Path,
                             rows: int) -> None:
    table = write_table(sample_frame().head(rows))
    line = assert_unusable(run_cli(check_argv(table, out)), str(table))
    assert "2" in line


def test_fewer_than_two_rows_after_dropping_missing(run_cli: CliRunner, write_table: Writer,
                                                    out: Path) -> None:
    frame = sample_frame(rows=4)
    frame.loc[[0, 1, 2], "tyre_wear"] = np.nan
    table = write_table(frame)
    line = assert_unusable(run_cli(check_argv(table, out)), str(table), "tyre_wear")
    assert "1 usable row" in line


def test_no_feature_selected(run_cli: CliRunner, write_table: Writer, write_policy: Writer,
                             out: Path) -> None:
    table = write_table(sample_frame())
    policy = write_policy("""
        policy_version: 1
        name: fleet
        columns: {exclude: ["*"]}
    """)
    assert_unusable(run_cli(check_argv(table, out, policy)), str(table), "columns.")


# --- invalid policies --------------------------------------------------------------------------

POLICY_CASES = {
    "not_yaml": ("policy_version: 1\nname: [fleet\n", ["line", "YAML"]),
    "not_a_mapping": ("- just\n- a list\n", ["mapping"]),
    "unknown_top_key": ("policy_version: 1\nname: fleet\nlimitz: {}\n", ["limitz", "line 3"]),
    "unknown_nested_key": (
        "policy_version: 1\nname: fleet\nlimits:\n  vif: {max: 5, levle: fail}\n",
        ["limits.vif.levle", "line 4", "level"]),
    "bad_level": ("policy_version: 1\nname: fleet\nlimits:\n  vif: {max: 5, level: block}\n",
                  ["limits.vif.level", "line 4"]),
    "bad_number": ("policy_version: 1\nname: fleet\nlimits:\n  vif: {max: -3}\n",
                   ["limits.vif.max", "line 4"]),
    "missing_name": ("policy_version: 1\n", ["name"]),
    "wrong_version": ("policy_version: 9\nname: fleet\n", ["policy_version", "line 1"]),
    "bad_missing": ("policy_version: 1\nname: fleet\nmissing: ignore\n", ["missing", "line 3"]),
    "waiver_without_owner": (
        ("policy_version: 1\nname: fleet\nwaivers:\n  - rule: vif\n    features: [a]\n"
         "    reason: kept\n    expires: 2030-01-01\n"), ["waivers[0]", "owner"]),
}


@pytest.mark.parametrize("case", list(POLICY_CASES))
def test_invalid_policy(run_cli: CliRunner, write_table: Writer, write_policy: Writer,
                        out: Path, case: str) -> None:
    text, mentions = POLICY_CASES[case]
    table = write_table(sample_frame())
    policy = write_policy(text, name="fleet-policy.yaml")
    assert_unusable(run_cli(check_argv(table, out, policy)), str(policy), *mentions)
    assert not out.exists()


def test_policy_file_missing(run_cli: CliRunner, write_table: Writer, tmp_path: Path,
                             out: Path) -> None:
    table = write_table(sample_frame())
    missing = tmp_path / "nowhere.yaml"
    line = assert_unusable(run_cli(check_argv(table, out, missing)), str(missing))
    assert "not found" in line


def test_policy_not_utf8(run_cli: CliRunner, write_table: Writer, tmp_path: Path,
                         out: Path) -> None:
    table = write_table(sample_frame())
    policy = tmp_path / "latin.yaml"
    policy.write_bytes("policy_version: 1\nname: fl\xe8et\n".encode("latin-1"))
    assert_unusable(run_cli(check_argv(table, out, policy)), str(policy))


def test_output_folder_is_a_file(run_cli: CliRunner, write_table: Writer, tmp_path: Path
                                 ) -> None:
    table = write_table(sample_frame())
    blocker = tmp_path / "out"
    blocker.write_text("a file where the folder should be")
    assert_unusable(run_cli(check_argv(table, blocker)), str(blocker))


def test_fewer_than_two_positive_weights(run_cli: CliRunner, write_table: Writer,
                                         write_policy: Writer, out: Path) -> None:
    frame = sample_frame().assign(trip_weight=[0.0] * 29 + [1.5])
    table = write_table(frame)
    policy = write_policy("""
        policy_version: 1
        name: fleet
        columns: {weight: trip_weight}
    """)
    line = assert_unusable(run_cli(check_argv(table, out, policy)), str(table), "trip_weight")
    assert "positive weight" in line and "missing" not in line


def test_policy_path_is_a_folder(run_cli: CliRunner, write_table: Writer, tmp_path: Path,
                                 out: Path) -> None:
    table = write_table(sample_frame())
    folder = tmp_path / "policies"
    folder.mkdir()
    assert_unusable(run_cli(check_argv(table, out, folder)), str(folder))


def test_csv_with_only_a_header(run_cli: CliRunner, tmp_path: Path, out: Path) -> None:
    table = tmp_path / "fleet.csv"
    table.write_text("odometer_km,engine_hours\n")
    line = assert_unusable(run_cli(check_argv(table, out)), str(table))
    assert "2" in line


def test_column_name_clashes_with_a_dummy(run_cli: CliRunner, write_table: Writer,
                                          out: Path) -> None:
    frame = sample_frame().assign(depot=["north", "south", "west"] * 10)
    frame["depot=south"] = np.arange(30.0)
    table = write_table(frame)
    line = assert_unusable(run_cli(check_argv(table, out)), str(table), "depot=south")
    assert "rename" in line


def test_parquet_folder_with_different_schemas(run_cli: CliRunner, tmp_path: Path,
                                               out: Path) -> None:
    import pyarrow.parquet as pq

    folder = tmp_path / "parts"
    folder.mkdir()
    table = pa.Table.from_pandas(sample_frame(), preserve_index=False)
    pq.write_table(table, folder / "a.parquet")
    pq.write_table(table.drop_columns(["tyre_wear"]), folder / "b.parquet")
    line = assert_unusable(run_cli(check_argv(folder, out)), str(folder))
    assert "schema" in line


def test_a_closed_stdout_pipe_exits_quietly(tmp_path: Path) -> None:
    # `gate diff --format json | head -1`: the reader goes away after one line. The command
    # must not print a BrokenPipe traceback nor report an internal error (exit 3).
    import json
    import subprocess
    import sys

    many = [{"rule": "vif", "level": "fail", "features": [f"x{k}"], "value": 10.0,
             "limit": 5.0, "waived": False, "waiver": None, "message": "m" * 200}
            for k in range(3000)]
    old = {"status": "pass", "features": [], "diagnostics": {"vif": {}}, "findings": []}
    new = {"status": "fail", "features": [], "diagnostics": {"vif": {}}, "findings": many}
    (tmp_path / "old.json").write_text(json.dumps(old))
    (tmp_path / "new.json").write_text(json.dumps(new))
    script = (f"'{sys.executable}' -m gate diff old.json new.json --format json | head -1 "
              ">/dev/null; echo ${PIPESTATUS[0]}")
    result = subprocess.run(["bash", "-c", script], cwd=tmp_path, capture_output=True,
                            text=True, timeout=120, check=False)
    assert "Traceback" not in result.stderr and "BrokenPipe" not in result.stderr, result.stderr
    assert result.stdout.strip() in ("1", "141")  # worse (if it finished first) or SIGPIPE's
