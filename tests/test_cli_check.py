"""`gate check` end to end: verdict.json fields (interface.md), exit codes, atomic writes, names,
and the weighted-equals-repeated-rows identity."""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import stat
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from gate.policy.models import packaged_policy_path

CliRunner = Callable[[list[Any]], Any]
Writer = Callable[..., Path]

DOCKS_POLICY = """
    policy_version: 1
    name: station-docks
    columns:
      categorical: [weather_kind]
    limits:
      pairwise_correlation: {max: 0.8, level: warn}
      vif: {max: 5, level: fail}
      condition_number: {max: 30, level: warn}
      rank_deficiency: {level: fail}
"""


def read_verdict(out: Path) -> dict[str, Any]:
    return json.loads((out / "verdict.json").read_text(encoding="utf-8"))


@pytest.fixture(params=["parquet", "csv", "feather"])
def docks_run(request: pytest.FixtureRequest, docks_frame: pd.DataFrame, write_table: Writer,
              write_policy: Writer, run_cli: CliRunner, tmp_path: Path
              ) -> tuple[Any, dict[str, Any], Path, Path]:
    table = write_table(docks_frame, f"docks.{request.param}")
    policy = write_policy(DOCKS_POLICY)
    out = tmp_path / "out"
    result = run_cli(["check", table, "--policy", policy, "--out", out, "--label", "run-42"])
    return result, read_verdict(out), table, policy


def test_every_interface_field_is_present(docks_run: tuple[Any, dict[str, Any], Path, Path]
                                          ) -> None:
    result, verdict, table, policy = docks_run
    assert result.code == 1 and verdict["status"] == "fail"
    assert verdict["table"]["rows"] == 240 and verdict["table"]["rows_used"] == 240
    assert verdict["table"]["sha256"] == hashlib.sha256(table.read_bytes()).hexdigest()
    assert verdict["policy"]["sha256"] == hashlib.sha256(policy.read_bytes()).hexdigest()
    assert verdict["label"] == "run-42"
    created = dt.datetime.fromisoformat(verdict["created_at"])
    assert created.utcoffset() == dt.timedelta(0)
    assert verdict["tool"]["version"]
    d = verdict["diagnostics"]
    for key in ("vif", "gvif", "condition_number", "condition_indices", "rank", "dependencies",
                "pairs"):
        assert key in d
    for finding in verdict["findings"]:
        assert set(finding) >= {"rule", "level", "features", "value", "limit", "waived",
                                "message"}
        assert finding["level"] in ("fail", "warn", "info")
        assert isinstance(finding["features"], list) and isinstance(finding["waived"], bool)


def test_features_and_dummy_names(docks_run: tuple[Any, dict[str, Any], Path, Path]) -> None:
    _, verdict, _, _ = docks_run
    assert verdict["features"] == [
        "docks_free", "docks_in_use", "docks_total", "region_code", "capacity_copy",
        "air_temp_c", "felt_temp_c", "wind_kmh", "weather_kind=fog", "weather_kind=rain"]
    gvif = verdict["diagnostics"]["gvif"]["weather_kind"]
    assert gvif["df"] == 2 and gvif["gvif"] >= 1.0
    assert gvif["gvif_adjusted"] == pytest.approx(gvif["gvif"] ** 0.25)


def test_dependencies_and_infinite_vifs(docks_run: tuple[Any, dict[str, Any], Path, Path]
                                        ) -> None:
    _, verdict, _, _ = docks_run
    d = verdict["diagnostics"]
    assert d["rank"] == 8  # 11 columns with the intercept, 3 exact dependencies
    assert d["condition_number"] is None  # rank deficient
    for name in ("docks_free", "docks_in_use", "docks_total", "region_code", "capacity_copy"):
        assert d["vif"][name] is None
    for name in ("air_temp_c", "felt_temp_c", "wind_kmh", "weather_kind=fog"):
        assert d["vif"][name] >= 1.0
    relations = [dep["relation"] for dep in d["dependencies"]]
    assert any("docks_total = docks_free + docks_in_use" in r for r in relations), relations
    assert any("capacity_copy = docks_total" in r for r in relations), relations
    for dep in d["dependencies"]:
        assert max(abs(c) for c in dep["terms"].values()) == pytest.approx(1.0, abs=1e-15)
        assert "constant" in dep
    constant = next(dep for dep in d["dependencies"] if list(dep["terms"]) == ["region_code"])
    assert constant["constant"] == pytest.approx(7.0)


def test_pairs_are_every_pair_at_or_above_the_limit(
        docks_run: tuple[Any, dict[str, Any], Path, Path], docks_frame: pd.DataFrame) -> None:
    # Reference: numpy.corrcoef over the numeric, non-constant features.
    _, verdict, _, _ = docks_run
    numeric = docks_frame.drop(columns=["weather_kind", "region_code"])
    corr = np.corrcoef(numeric.to_numpy(), rowvar=False)
    names = list(numeric.columns)
    expected = {frozenset((names[i], names[j])) for i in range(len(names))
                for j in range(i + 1, len(names)) if abs(corr[i, j]) >= 0.8}
    pairs = verdict["diagnostics"]["pairs"]
    assert {frozenset((p["a"], p["b"])) for p in pairs} == expected
    for pair in pairs:
        i, j = names.index(pair["a"]), names.index(pair["b"])
        assert pair["r"] == pytest.approx(corr[i, j], abs=1e-12)
        assert -1.0 <= pair["r"] <= 1.0


def test_condition_indices(docks_run: tuple[Any, dict[str, Any], Path, Path]) -> None:
    _, verdict, _, _ = docks_run
    indices = verdict["diagnostics"]["condition_indices"]
    assert indices[0] == 1.0
    assert indices == sorted(indices)


def test_atomic_write_leaves_only_the_artefacts(docks_run: tuple[Any, dict[str, Any], Path, Path],
                                                tmp_path: Path) -> None:
    out = tmp_path / "out"
    names = sorted(p.name for p in out.iterdir())
    assert "verdict.json" in names
    assert not [n for n in names if n.startswith(".") or n.endswith(".tmp")], names


def test_artefacts_are_readable_like_any_new_file(docks_frame: pd.DataFrame, write_table: Writer,
                                                  run_cli: CliRunner, tmp_path: Path) -> None:
    # A CI job or web server reading the artefacts must not be locked out by the temp-file
    # mode: the final file gets the mode a plain open() would give under the current umask.
    table = write_table(docks_frame)
    out = tmp_path / "out"
    run_cli(["check", table, "--out", out])
    plain = tmp_path / "plain.txt"
    plain.write_text("x")
    expected = stat.S_IMODE(plain.stat().st_mode)
    mode = stat.S_IMODE((out / "verdict.json").stat().st_mode)
    assert mode == expected, (oct(mode), oct(expected))


def test_rerun_replaces_the_verdict(docks_frame: pd.DataFrame, clean_frame: pd.DataFrame,
                                    write_table: Writer, run_cli: CliRunner, tmp_path: Path
                                    ) -> None:
    out = tmp_path / "out"
    first = run_cli(["check", write_table(docks_frame, "a.parquet"), "--out", out])
    assert first.code == 1 and read_verdict(out)["status"] == "fail"
    second = run_cli(["check", write_table(clean_frame, "b.parquet"), "--out", out])
    assert second.code == 0 and read_verdict(out)["status"] == "pass"


def test_pass_exits_zero_and_default_policy_is_packaged(clean_frame: pd.DataFrame,
                                                        write_table: Writer, run_cli: CliRunner,
                                                        tmp_path: Path) -> None:
    out = tmp_path / "out"
    result = run_cli(["check", write_table(clean_frame), "--out", out])
    assert result.code == 0, result.err
    verdict = read_verdict(out)
    assert verdict["status"] == "pass" and verdict["findings"] == []
    default = packaged_policy_path()
    assert verdict["policy"]["sha256"] == hashlib.sha256(default.read_bytes()).hexdigest()
    # string columns are categorical without being listed
    assert "weather_kind=fog" in verdict["features"]
    assert result.out.startswith("PASS")


def test_warn_exits_zero(write_table: Writer, run_cli: CliRunner, tmp_path: Path) -> None:
    # Invented: two moderately related meters, |r| ~ 0.85 (warn) but VIF ~ 3.6 (< 5).
    rng = np.random.default_rng(21)
    a = rng.normal(size=500)
    frame = pd.DataFrame({"meter_a": a, "meter_b": 0.85 * a + np.sqrt(1 - 0.85**2)
                          * rng.normal(size=500)})
    out = tmp_path / "out"
    result = run_cli(["check", write_table(frame), "--out", out])
    verdict = read_verdict(out)
    assert verdict["status"] == "warn", verdict["findings"]
    assert result.code == 0
    assert result.out.startswith("WARN")


def test_terminal_summary_is_compact(docks_run: tuple[Any, dict[str, Any], Path, Path]) -> None:
    result, _, _, _ = docks_run
    lines = result.out.splitlines()
    assert lines[0].startswith("FAIL")
    assert any("rank 8 of 11" in line for line in lines)
    assert len(lines) <= 15
    assert any("docks_total = docks_free + docks_in_use" in line for line in lines)


def test_more_features_than_rows_is_plain_rank_deficiency(write_table: Writer,
                                                          run_cli: CliRunner,
                                                          tmp_path: Path) -> None:
    rng = np.random.default_rng(23)
    frame = pd.DataFrame(rng.normal(size=(5, 9)), columns=[f"probe_{k}" for k in range(9)])
    out = tmp_path / "out"
    result = run_cli(["check", write_table(frame), "--out", out])
    assert result.code == 1
    verdict = read_verdict(out)
    assert verdict["diagnostics"]["rank"] == 5
    plain = [f for f in verdict["findings"]
             if f["rule"] == "rank_deficiency" and not f["features"]]
    assert len(plain) == 1
    assert "only 5 rows for 10 design columns" in plain[0]["message"]
    assert "add rows or drop features" in plain[0]["message"]


def test_missing_values_are_dropped_and_counted(docks_frame: pd.DataFrame, write_table: Writer,
                                                run_cli: CliRunner, tmp_path: Path) -> None:
    frame = docks_frame.copy()
    frame.loc[[2, 5, 9], "wind_kmh"] = np.nan
    frame.loc[[5, 11], "weather_kind"] = None
    out = tmp_path / "out"
    run_cli(["check", write_table(frame), "--out", out])
    table = read_verdict(out)["table"]
    assert table["rows"] == 240 and table["rows_used"] == 236
    assert table["missing"] == {"wind_kmh": 3, "weather_kind": 2}


# --- weights: weighted diagnostics == diagnostics of rows repeated by their integer weight ---

def _weighted_and_repeated(docks_frame: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    rng = np.random.default_rng(29)
    frame = docks_frame.drop(columns=["capacity_copy"]).copy()
    weights = rng.integers(0, 4, len(frame))
    # A level seen only in zero-weight rows must vanish, as it does from the repeated table.
    zero_rows = np.flatnonzero(weights == 0)[:3]
    frame.loc[zero_rows, "weather_kind"] = "hail"
    weighted = frame.assign(trips=weights.astype(float))
    repeated = frame.loc[frame.index.repeat(weights)].reset_index(drop=True)
    return weighted, repeated


def test_weighted_equals_repeated_rows(docks_frame: pd.DataFrame, write_table: Writer,
                                       write_policy: Writer, run_cli: CliRunner,
                                       tmp_path: Path) -> None:
    weighted, repeated = _weighted_and_repeated(docks_frame)
    base = DOCKS_POLICY.replace("columns:\n", "columns:\n      weight: trips\n")
    a_out, b_out = tmp_path / "weighted", tmp_path / "repeated"
    run_cli(["check", write_table(weighted, "w.parquet"), "--policy",
             write_policy(base, "w.yaml"), "--out", a_out])
    run_cli(["check", write_table(repeated, "r.parquet"), "--policy",
             write_policy(DOCKS_POLICY, "r.yaml"), "--out", b_out])
    a, b = read_verdict(a_out), read_verdict(b_out)
    assert a["features"] == b["features"]
    assert "weather_kind=hail" not in a["features"]
    da, db = a["diagnostics"], b["diagnostics"]
    assert da["rank"] == db["rank"]
    for name in a["features"]:
        if db["vif"][name] is None:
            assert da["vif"][name] is None
        else:
            assert da["vif"][name] == pytest.approx(db["vif"][name], rel=1e-10)
    assert da["gvif"]["weather_kind"]["gvif"] == pytest.approx(
        db["gvif"]["weather_kind"]["gvif"], rel=1e-10)
    assert da["condition_indices"] == pytest.approx(db["condition_indices"], rel=1e-9)
    assert [dep["relation"] for dep in da["dependencies"]] == [
        dep["relation"] for dep in db["dependencies"]]
    assert {(p["a"], p["b"]) for p in da["pairs"]} == {(p["a"], p["b"]) for p in db["pairs"]}
    for pa_, pb in zip(da["pairs"], db["pairs"]):
        assert pa_["r"] == pytest.approx(pb["r"], rel=1e-12)
    assert a["status"] == b["status"]
    assert a["table"]["weight"] == "trips"


@pytest.mark.parametrize("suffix", ["csv", "feather"])
def test_formats_agree(docks_frame: pd.DataFrame, write_table: Writer, run_cli: CliRunner,
                       tmp_path: Path, suffix: str) -> None:
    results = {}
    for kind in ("parquet", suffix):
        out = tmp_path / kind
        run_cli(["check", write_table(docks_frame, f"docks.{kind}"), "--out", out])
        results[kind] = read_verdict(out)["diagnostics"]
    a, b = results["parquet"], results[suffix]
    assert a["rank"] == b["rank"]
    for name, value in a["vif"].items():
        assert (value is None) == (b["vif"][name] is None)
        if value is not None:
            assert b["vif"][name] == pytest.approx(value, rel=1e-10)


def test_out_folder_is_created(clean_frame: pd.DataFrame, write_table: Writer,
                               run_cli: CliRunner, tmp_path: Path) -> None:
    out = tmp_path / "deep" / "er" / "out"
    assert run_cli(["check", write_table(clean_frame), "--out", out]).code == 0
    assert (out / "verdict.json").is_file()
    assert os.access(out / "verdict.json", os.R_OK)



def test_parquet_folder_is_one_table(docks_frame: pd.DataFrame, run_cli: CliRunner,
                                     tmp_path: Path) -> None:
    # A folder of Parquet files (e.g. one per day) is read as one table, in sorted order.
    import pyarrow as pa
    import pyarrow.parquet as pq

    folder = tmp_path / "docks_parts"
    folder.mkdir()
    table = pa.Table.from_pandas(docks_frame, preserve_index=False)
    pq.write_table(table.slice(0, 100), folder / "part-0.parquet", row_group_size=30)
    pq.write_table(table.slice(100), folder / "part-1.parquet", row_group_size=50)
    whole = tmp_path / "whole.parquet"
    pq.write_table(table, whole)
    a_out, b_out = tmp_path / "a", tmp_path / "b"
    run_cli(["check", folder, "--out", a_out])
    run_cli(["check", whole, "--out", b_out])
    a, b = read_verdict(a_out), read_verdict(b_out)
    assert a["table"]["rows"] == b["table"]["rows"] == 240
    assert a["features"] == b["features"]
    for name, value in b["diagnostics"]["vif"].items():
        if value is None:
            assert a["diagnostics"]["vif"][name] is None
        else:
            assert a["diagnostics"]["vif"][name] == pytest.approx(value, rel=1e-10)
    assert [d["relation"] for d in a["diagnostics"]["dependencies"]] == [
        d["relation"] for d in b["diagnostics"]["dependencies"]]
    first = a["table"]["sha256"]
    pq.write_table(table.slice(100, 50), folder / "part-1.parquet")
    run_cli(["check", folder, "--out", a_out])
    assert read_verdict(a_out)["table"]["sha256"] != first  # the digest covers every file


def test_chunk_rows_does_not_change_the_verdict(docks_frame: pd.DataFrame, write_table: Writer,
                                                run_cli: CliRunner, tmp_path: Path) -> None:
    table = write_table(docks_frame)
    documents = []
    for chunk in ("7", "100000"):
        out = tmp_path / chunk
        run_cli(["check", table, "--out", out, "--chunk-rows", chunk])
        documents.append(read_verdict(out))
    a, b = documents
    assert [f["message"] for f in a["findings"]] == [f["message"] for f in b["findings"]]
    assert a["status"] == b["status"]


def test_failed_write_keeps_the_old_verdict_and_no_temp_file(
        docks_frame: pd.DataFrame, clean_frame: pd.DataFrame, write_table: Writer,
        run_cli: CliRunner, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from gate.artefacts import files

    out = tmp_path / "out"
    assert run_cli(["check", write_table(clean_frame, "ok.parquet"), "--out", out]).code == 0
    before = (out / "verdict.json").read_bytes()

    def refuse(src: str, dst: str) -> None:
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(files.os, "replace", refuse)
    result = run_cli(["check", write_table(docks_frame, "bad.parquet"), "--out", out])
    assert result.code == 2 and "Traceback" not in result.err
    assert len(result.err_lines) == 1 and str(out) in result.err
    assert (out / "verdict.json").read_bytes() == before  # readers never see a partial file
    assert not [p.name for p in out.iterdir() if p.name.endswith(".tmp")]
