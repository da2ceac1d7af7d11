"""Hostile and awkward tables: every one gives a verdict that does not depend on where a value
sits, or exit 2 with one line naming the file, column, row or value and the fix. All data is
invented (seeded) and written under tmp_path."""

from __future__ import annotations

import contextlib
import io
import os
import shutil
import stat
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest
from pyarrow import feather

from gate import api
from gate.errors import TableError, shown
from gate.read.sources import NUMBER_PATTERN, open_table

CliRunner = Callable[[list[Any]], Any]


def one_error_line(result: Any, *mentions: str) -> str:
    """Exit 2, exactly one stderr line 'gate: error: ...', no traceback, naming ``mentions``."""
    assert result.code == 2, (result.code, result.err)
    assert "Traceback" not in result.err
    lines = result.err_lines
    assert len(lines) == 1, lines
    assert lines[0].startswith("gate: error: ")
    for mention in mentions:
        assert mention in lines[0], (mention, lines[0])
    return lines[0]


def meter_csv(path: Path, rows: int, *, stray_at: int | None = None, stray: str = "n/a?",
              sep: str = ",") -> Path:
    """Invented energy-use table: load_kw, outdoor_temp_c, occupancy (seeded), written as text.
    ``stray_at`` replaces that data row's load_kw (0-based) with ``stray``."""
    rng = np.random.default_rng(41)
    load, temp, occ = rng.normal(50, 9, rows), rng.normal(12, 6, rows), rng.uniform(0, 1, rows)
    with path.open("w", encoding="utf-8") as handle:
        handle.write(sep.join(("load_kw", "outdoor_temp_c", "occupancy")) + "\n")
        for i in range(rows):
            first = stray if i == stray_at else f"{load[i]:.6f}"
            handle.write(sep.join((first, f"{temp[i]:.6f}", f"{occ[i]:.6f}")) + "\n")
    return path


# --- 1. CSV types hold for the whole file -------------------------------------------------------

MULTI_MIB_ROWS = 120_000  # about 3.6 MB: several of the reader's 1 MiB typing blocks


@pytest.mark.parametrize("where", ["top", "middle", "end"])
def test_stray_text_in_numeric_column_anywhere(run_cli: CliRunner, tmp_path: Path,
                                               where: str) -> None:
    rows = MULTI_MIB_ROWS
    at = {"top": 2, "middle": rows // 2, "end": rows - 1}[where]
    table = meter_csv(tmp_path / "meters.csv", rows, stray_at=at)
    assert table.stat().st_size > 3 * (1 << 20)
    line = one_error_line(run_cli(["check", table, "--out", tmp_path / "out"]),
                          str(table), "'load_kw'", f"data row {at + 1:,} holds 'n/a?'",
                          "columns.categorical")
    # The same sentence wherever the value sits; only the row number differs.
    first = f"{np.random.default_rng(41).normal(50, 9, rows)[0]:.6f}"
    assert line.replace(f"data row {at + 1:,} holds", "data row N holds") == (
        f"gate: error: {table}: column 'load_kw' mixes numbers and text: data row N holds "
        f"'n/a?', data row 1 holds the number '{first}'; correct the value, or list "
        "'load_kw' under columns.categorical to read every value as a level")
    assert not (tmp_path / "out").exists()


def test_text_column_with_a_number_far_down(run_cli: CliRunner, tmp_path: Path) -> None:
    # Typed text by the first block; a number further down is the same mix, refused.
    rng = np.random.default_rng(3)
    rows = 120_000
    table = tmp_path / "fleet.csv"
    with table.open("w") as handle:
        handle.write("depot,mileage_km\n")
        for i in range(rows):
            depot = "17" if i == rows - 5 else ("north", "south", "east")[i % 3]
            handle.write(f"{depot},{rng.uniform(1e3, 9e4):.3f}\n")
    one_error_line(run_cli(["check", table, "--out", tmp_path / "out"]), str(table),
                   "'depot'", f"data row {rows - 4:,} holds the number '17'", "data row 1 holds "
                   "'north'")


def test_declared_categorical_reads_every_value_as_a_level(tmp_path: Path) -> None:
    # A shift code that is mostly numbers and sometimes text, declared categorical: levels.
    rng = np.random.default_rng(8)
    rows = 600
    shifts = rng.choice(["1", "2", "night"], rows)
    frame = pd.DataFrame({"shift": shifts, "load_kw": rng.normal(50, 9, rows),
                          "outdoor_temp_c": rng.normal(12, 6, rows)})
    table = tmp_path / "shifts.csv"
    frame.to_csv(table, index=False)
    policy = tmp_path / "policy.yaml"
    policy.write_text("policy_version: 1\nname: shifts\ncolumns:\n  categorical: [shift]\n")
    verdict = api.check(table, policy)
    dummies = {f for f in verdict.features if f.startswith("shift=")}
    reference = verdict.design.groups[0].reference  # the most frequent level has no dummy
    assert dummies | {f"shift={reference}"} == {"shift=1", "shift=2", "shift=night"}
    # Without the declaration the mix is refused, naming the first text value's row.
    first_text = int(np.flatnonzero(shifts == "night")[0]) + 1
    with pytest.raises(TableError, match=f"data row {first_text:,} holds 'night'"):
        api.check(table)


def test_declared_categorical_numbers_keep_their_text(tmp_path: Path) -> None:
    # Read as text, a declared categorical keeps the levels as written ("07", not 7.0).
    rng = np.random.default_rng(9)
    rows = 400
    frame = pd.DataFrame({"route": rng.choice(["07", "12", "31"], rows),
                          "riders": rng.normal(80, 20, rows), "rain_mm": rng.gamma(2, 1, rows)})
    table = tmp_path / "routes.csv"
    frame.to_csv(table, index=False)
    policy = tmp_path / "policy.yaml"
    policy.write_text("policy_version: 1\nname: routes\ncolumns:\n  categorical: [route]\n")
    verdict = api.check(table, policy)
    levels = {f.removeprefix("route=") for f in verdict.features if f.startswith("route=")}
    levels.add(verdict.design.groups[0].reference)  # the most frequent level has no dummy
    assert {"07", "12", "31"} <= levels


@pytest.mark.parametrize("late", ["numbers", "text"])
def test_column_empty_in_the_first_block_is_typed_by_reading_through(tmp_path: Path,
                                                                     late: str) -> None:
    rng = np.random.default_rng(12)
    rows = 120_000
    values = rng.normal(size=(rows, 2))
    table = tmp_path / "late.csv"
    with table.open("w") as handle:
        handle.write("pump_hours,flow_lps,zone\n")
        for i in range(rows):
            zone = "" if i < rows - 500 else (f"{values[i, 0] * 3:.4f}" if late == "numbers"
                                              else ("upper", "lower")[i % 2])
            handle.write(f"{values[i, 0]:.6f},{values[i, 1]:.6f},{zone}\n")
    policy = tmp_path / "policy.yaml"
    policy.write_text("policy_version: 1\nname: late\nmissing: drop_rows\n")
    features = set(api.check(table, policy).features)
    assert features == ({"pump_hours", "flow_lps", "zone"} if late == "numbers"
                        else {"pump_hours", "flow_lps", "zone=upper"})


NUMBER_CANDIDATES = [
    "1", "+1", "-1", "1.", ".5", "1e5", "1E+05", "+.5e-3", " 1", "1 ", "\t1\t", "-0", "0001",
    "inf", "-inf", "Inf", "INF", "+inf", "infinity", "Infinity", "inF", "Nan", "nAn", "+nan",
    "1e400", "1e-400", "1.e5", "0.5E-2",
    "1_000", "0x10", "١", "１", "1d5", "--1", "+-1", "e5", ".", ".e5", "1.5f", "1e", "1e+", "+",
    "-", "infinit", "infinityx", "1.2.3", "0x1p3", "  ", "1 2", "\u00a01", "1\u00a0", "abc",
]


def test_number_pattern_agrees_with_the_csv_reader() -> None:
    # Outside reference: pyarrow's own CSV float64 converter, value by value.
    import pyarrow.compute as pc

    for text in NUMBER_CANDIDATES:
        quoted = '"' + text.replace('"', '""') + '"'
        try:
            pacsv.read_csv(io.BytesIO(f"c\n{quoted}\n".encode()),
                           convert_options=pacsv.ConvertOptions(
                               column_types={"c": pa.float64()}, strings_can_be_null=True))
            reader_says = True
        except pa.ArrowInvalid:
            reader_says = False
        ours = pc.match_substring_regex(pa.array([text]), NUMBER_PATTERN)[0].as_py()
        assert ours == reader_says, text


# --- 2. Delimiters ----------------------------------------------------------------------------


@pytest.mark.parametrize(("sep", "flag"), [(";", ";"), ("\t", "tab"), ("|", "|")])
def test_one_field_header_is_refused_with_the_delimiter_hint(
        run_cli: CliRunner, tmp_path: Path, sep: str, flag: str) -> None:
    table = meter_csv(tmp_path / "meters.csv", 300, sep=sep)
    line = one_error_line(run_cli(["check", table, "--out", tmp_path / "out"]), str(table),
                          f"--csv-delimiter '{flag}'", "csv_delimiter=")
    assert "\t" not in line  # the tab in the header is shown escaped
    result = run_cli(["check", table, "--out", tmp_path / "out", "--csv-delimiter", flag,
                      "--quiet"])
    assert result.code == 0, result.err
    verdict = api.check(table, csv_delimiter=flag)
    assert set(verdict.features) == {"load_kw", "outdoor_temp_c", "occupancy"}


@pytest.mark.parametrize("bad", ["", ";;", '"', "\n", "é"])
def test_bad_delimiter_value(run_cli: CliRunner, tmp_path: Path, bad: str) -> None:
    table = meter_csv(tmp_path / "meters.csv", 50)
    one_error_line(run_cli(["check", table, "--out", tmp_path / "out", "--csv-delimiter", bad]),
                   "--csv-delimiter")


def test_delimiter_on_a_parquet_table(run_cli: CliRunner, tmp_path: Path) -> None:
    table = tmp_path / "meters.parquet"
    pq.write_table(pa.table({"a": [1.0, 2.0, 3.0], "b": [3.0, 1.0, 2.0]}), table)
    one_error_line(run_cli(["check", table, "--out", tmp_path / "out", "--csv-delimiter", ";"]),
                   str(table), ".csv tables only")


# --- 3. Duplicate names, encodings, integers, nested values -----------------------------------


def test_duplicate_names_in_csv_parquet_and_arrow(run_cli: CliRunner, tmp_path: Path) -> None:
    csv = tmp_path / "dup.csv"
    csv.write_text("speed,speed,load\n1,2,3\n4,5,7\n7,8,8\n")
    one_error_line(run_cli(["check", csv, "--out", tmp_path / "o1"]), str(csv), "'speed'",
                   "2 times", "rename")
    table = pa.table([pa.array([1.0, 2.0, 4.0]), pa.array([2.0, 1.0, 3.0]),
                      pa.array([5.0, 1.0, 2.0])], names=["speed", "load", "speed"])
    parquet = tmp_path / "dup.parquet"
    pq.write_table(table, parquet)
    one_error_line(run_cli(["check", parquet, "--out", tmp_path / "o2"]), str(parquet),
                   "'speed'", "rename")
    arrow = tmp_path / "dup.feather"
    feather.write_feather(table, arrow)
    one_error_line(run_cli(["check", arrow, "--out", tmp_path / "o3"]), str(arrow), "'speed'")
    with pytest.raises(TableError, match="'speed' appears 2 times"):
        api.check(table)


def test_duplicate_names_in_a_dataframe() -> None:
    frame = pd.DataFrame(np.arange(12.0).reshape(4, 3), columns=["a", "b", "a"])
    with pytest.raises(TableError, match="<DataFrame>: the column name 'a' appears 2 times"):
        api.check(frame)
    mixed = pd.DataFrame(np.arange(8.0).reshape(4, 2), columns=[0, "0"])  # both become "0"
    with pytest.raises(TableError, match="'0' appears 2 times"):
        open_table(mixed)


def test_check_files_reports_every_file(run_cli: CliRunner, tmp_path: Path) -> None:
    bad_one = tmp_path / "a_dup.csv"
    bad_one.write_text("x,x\n1,2\n3,4\n")
    good = meter_csv(tmp_path / "b_good.csv", 200)
    bad_two = tmp_path / "c_semi.csv"
    meter_csv(bad_two, 50, sep=";")
    result = run_cli(["check-files", bad_one, good, bad_two, "--out", tmp_path / "out"])
    assert result.code == 2
    errors = [line for line in result.err_lines if line.startswith("gate: error")]
    assert len(errors) == 2 and str(bad_one) in errors[0] and str(bad_two) in errors[1], errors
    assert "Traceback" not in result.err
    assert str(good) in result.out  # checked although an earlier file was unusable


def test_latin1_header(run_cli: CliRunner, tmp_path: Path) -> None:
    table = tmp_path / "chaudière.csv"
    table.write_bytes("puissance_kW,température\n1,2\n3,5\n4,4\n".encode("latin-1"))
    line = one_error_line(run_cli(["check", table, "--out", tmp_path / "out"]), str(table),
                          "not UTF-8", "header", "iconv -f latin1 -t utf-8")
    assert "0xe9" in line


@pytest.mark.parametrize("rows_before", [3, 150_000])
def test_latin1_value(run_cli: CliRunner, tmp_path: Path, rows_before: int) -> None:
    table = tmp_path / "sites.csv"
    body = "".join(f"{i % 7},site_{i % 3},{i % 11}\n" for i in range(rows_before))
    table.write_bytes(("load,site,temp\n" + body).encode() + "9,caf\xe9,1\n".encode("latin-1"))
    one_error_line(run_cli(["check", table, "--out", tmp_path / "out"]), str(table),
                   "not UTF-8", "iconv")


def test_utf16_csv(run_cli: CliRunner, tmp_path: Path) -> None:
    table = tmp_path / "meters.csv"
    table.write_bytes("a,b\n1,2\n3,5\n".encode("utf-16"))
    one_error_line(run_cli(["check", table, "--out", tmp_path / "out"]), str(table), "UTF-16",
                   "iconv -f utf-16 -t utf-8")


def _big_integer_table(values: list[int], kind: pa.DataType) -> pa.Table:
    rng = np.random.default_rng(21)
    rows = len(values)
    return pa.table({"meter_serial": pa.array(values, kind),
                     "kwh": rng.normal(10, 2, rows), "volts": rng.normal(230, 3, rows)})


@pytest.mark.parametrize("kind", [pa.uint64(), pa.int64()])
def test_exact_integers_beyond_2_53_are_read_as_float64(tmp_path: Path,
                                                        kind: pa.DataType) -> None:
    # Multiples of 2**11 below 2**63 are exact in float64: read, and the verdict equals that
    # of the float64 copy (reference: numpy's exact int -> float64 conversion).
    rng = np.random.default_rng(4)
    values = [int(v) << 11 for v in rng.integers(1 << 50, 1 << 51, 200)]
    table = _big_integer_table(values, kind)
    path = tmp_path / "serials.parquet"
    pq.write_table(table, path)
    floats = table.set_column(0, "meter_serial", pa.array(np.array(values, dtype=np.float64)))
    got, want = api.check(path), api.check(floats)
    assert [f.value for f in got.findings] == [f.value for f in want.findings]
    assert got.features == want.features


@pytest.mark.parametrize("source", ["parquet", "feather", "table"])
def test_inexact_integers_beyond_2_53_are_refused(run_cli: CliRunner, tmp_path: Path,
                                                  source: str) -> None:
    values = [(1 << 64) - 1 - 3 * i for i in range(50)]  # not representable in float64
    table = _big_integer_table(values, pa.uint64())
    if source == "table":
        with pytest.raises(TableError, match="18446744073709551615 .row 1."):
            api.check(table)
        return
    path = tmp_path / f"serials.{source}"
    (pq.write_table if source == "parquet" else feather.write_feather)(table, path)
    one_error_line(run_cli(["check", path, "--out", tmp_path / "out"]), str(path),
                   "'meter_serial'", "18446744073709551615", "2^53", "exclude the column")


@pytest.mark.parametrize("column", [
    pa.array([b"\x00\x01", b"\x02"] * 10, pa.binary()),
    pa.array([[1, 2], [3]] * 10, pa.list_(pa.int64())),
    pa.array([{"x": 1}, {"x": 2}] * 10, pa.struct([("x", pa.int64())])),
], ids=["binary", "list", "struct"])
def test_nested_columns_as_categorical(run_cli: CliRunner, tmp_path: Path,
                                       column: pa.Array) -> None:
    rng = np.random.default_rng(6)
    table = pa.table({"parts": column, "odometer_km": rng.uniform(1e4, 2e5, 20),
                      "engine_hours": rng.uniform(100, 9000, 20)})
    path = tmp_path / "fleet.parquet"
    pq.write_table(table, path)
    out = tmp_path / "out"
    policy = tmp_path / "policy.yaml"
    for columns in ("{}", "{categorical: [parts]}"):
        policy.write_text(f"policy_version: 1\nname: fleet\ncolumns: {columns}\n")
        line = one_error_line(run_cli(["check", path, "--out", out, "--policy", policy]),
                              "'parts'", "columns.exclude")
        assert "columns.categorical" not in line  # the hint must not send users into a crash
    policy.write_text("policy_version: 1\nname: fleet\ncolumns:\n  exclude: [parts]\n")
    assert run_cli(["check", path, "--out", out, "--policy", policy, "--quiet"]).code == 0


# --- special files and folders ----------------------------------------------------------------


@pytest.mark.timeout(20)
@pytest.mark.parametrize("role", ["table", "policy", "inside_folder"])
def test_fifo_is_refused_without_opening(run_cli: CliRunner, tmp_path: Path, role: str) -> None:
    good = tmp_path / "good.parquet"
    pq.write_table(pa.table({"a": [1.0, 2.0, 4.0], "b": [3.0, 1.0, 2.0]}), good)
    if role == "inside_folder":
        folder = tmp_path / "parts"
        folder.mkdir()
        pq.write_table(pa.table({"a": [1.0, 2.0, 4.0], "b": [3.0, 1.0, 2.0]}),
                       folder / "part-0.parquet")
        fifo = folder / "part-1.parquet"
        os.mkfifo(fifo)
        argv: list[Any] = ["check", folder]
    elif role == "table":
        fifo = tmp_path / "meters.csv"
        os.mkfifo(fifo)
        argv = ["check", fifo]
    else:
        fifo = tmp_path / "policy.yaml"
        os.mkfifo(fifo)
        argv = ["check", good, "--policy", fifo]
    one_error_line(run_cli([*argv, "--out", tmp_path / "out"]), str(fifo), "not a regular file")


def test_folder_with_one_bad_parquet_file_names_it(run_cli: CliRunner, tmp_path: Path) -> None:
    folder = tmp_path / "readings"
    folder.mkdir()
    part = pa.table({"a": [1.0, 2.0, 4.0], "b": [3.0, 1.0, 2.0]})
    pq.write_table(part, folder / "part-0.parquet")
    (folder / "part-1.parquet").write_bytes(b"PAR1 this is not a Parquet file")
    pq.write_table(part, folder / "part-2.parquet")
    one_error_line(run_cli(["check", folder, "--out", tmp_path / "out"]),
                   str(folder / "part-1.parquet"), "not a readable Parquet file")


def _run_as_nobody(workdir: Path, argv: list[str]) -> tuple[int, str]:
    """gate.cli.main in a forked child that chdirs into ``workdir`` (as root) and then drops to
    uid/gid 65534, so relative paths resolve without traversing root-only parents."""
    # Imported before the fork: the child, as nobody, may not read the site folders.
    import gate.api
    import gate.artefacts.outputs
    import gate.artefacts.terminal
    import gate.stats.progress  # noqa: F401
    from gate.cli.main import build_parser, main

    build_parser()  # imports every command module while the site folders are readable

    read, write = os.pipe()
    pid = os.fork()
    if pid == 0:  # child
        code = 3
        try:
            os.close(read)
            os.chdir(workdir)
            os.setgroups([])
            os.setgid(65534)
            os.setuid(65534)
            err = io.StringIO()
            try:
                with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
                    code = main(argv)
            except BaseException as exc:  # noqa: BLE001 - reported to the parent
                err.write(repr(exc))
            os.write(write, err.getvalue().encode())
        finally:
            os._exit(code)
    os.close(write)
    with os.fdopen(read, "rb") as handle:
        text = handle.read().decode()
    _, status = os.waitpid(pid, 0)
    return os.waitstatus_to_exitcode(status), text


@pytest.mark.timeout(60)
def test_unreadable_folder_says_permission_denied(run_cli: CliRunner, tmp_path: Path) -> None:
    work = tmp_path / "work"
    locked = work / "readings"
    locked.mkdir(parents=True)
    pq.write_table(pa.table({"a": [1.0, 2.0, 4.0], "b": [3.0, 1.0, 2.0]}),
                   locked / "part-0.parquet")
    if os.geteuid() == 0:  # root ignores permissions: run the check as nobody
        work.chmod(0o777)
        locked.chmod(0o700)
        # Outputs are checked first: put them where nobody can reach them (our own temp folder).
        outputs = Path(tempfile.mkdtemp(prefix="gate-nobody-"))
        try:
            outputs.chmod(0o777)
            code, err = _run_as_nobody(work, ["check", "readings", "--out", str(outputs / "out")])
        finally:
            shutil.rmtree(outputs, ignore_errors=True)
    else:
        locked.chmod(0)
        try:
            result = run_cli(["check", locked, "--out", tmp_path / "out"])
        finally:
            locked.chmod(stat.S_IRWXU)
        code, err = result.code, result.err
    lines = [line for line in err.splitlines() if line.strip()]
    assert code == 2 and len(lines) == 1, (code, err)
    assert "permission denied" in lines[0] and "readings" in lines[0]
    assert "holds no .parquet" not in lines[0]


# --- 4. Echoed values are escaped and capped -------------------------------------------------


def test_shown_escapes_and_caps() -> None:
    assert shown("a\nb\tc\rd\x1b[31m\x7f\x85") == "a\\nb\\tc\\rd\\x1b[31m\\x7f\\x85"
    assert shown("é€ ok") == "é€ ok"  # printable text is left alone
    assert shown("x" * 200) == "x" * 200
    assert shown("x" * 201) == "x" * 199 + "…"  # at most 200 characters, "…" included
    assert shown("ab", limit=1) == "…"
    assert shown(2.5) == "2.5"


def test_hostile_column_name_and_value_cannot_forge_lines(run_cli: CliRunner,
                                                          tmp_path: Path) -> None:
    name = "load\ngate: PASS all good\x1b]0;owned\x07"
    value = "oops\r\n\x1b[2J" + "z" * 400
    table = tmp_path / "meters.csv"
    quoted_name = '"' + name + '"'
    quoted_value = '"' + value + '"'
    rows = [f"{quoted_name},temp"] + [f"{i * 1.5},{i % 7}" for i in range(50)]
    rows.insert(20, f"{quoted_value},3")
    table.write_text("\n".join(rows) + "\n")
    line = one_error_line(run_cli(["check", table, "--out", tmp_path / "out"]),
                          "load\\ngate: PASS all good\\x1b]0;owned\\x07", "oops\\r\\n\\x1b[2J")
    assert "\x1b" not in line and "z" * 201 not in line and "…" in line


def test_text_output_escapes_column_names_in_findings(run_cli: CliRunner,
                                                      tmp_path: Path) -> None:
    # Issue 10.6: a column name carrying a newline and an ANSI sequence is printed escaped in
    # the summary (findings name it), never as a forged line or a terminal command.
    rng = np.random.default_rng(4)
    x = rng.normal(size=300)
    name = "load\ngate: PASS all good\x1b[2J"
    table = tmp_path / "meters.parquet"
    pq.write_table(pa.table({name: x, "twin": x + 1e-3 * rng.normal(size=300),
                             "other": rng.normal(size=300)}), table)
    result = run_cli(["check", table, "--out", tmp_path / "out"])
    assert result.code == 1
    assert "\x1b" not in result.out and "\x1b" not in result.err
    assert not any(line.startswith("gate: PASS") for line in result.out.splitlines())
    assert "load\\ngate: PASS all good\\x1b[2J" in result.out
