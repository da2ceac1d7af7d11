"""Shared fixtures: small seeded, invented tables with known structure, table writers, a CLI runner.

Every table here is invented (seeded) and its structure is known in closed form, so tests can
state what the gate must find without running the gate to find out.
"""

from __future__ import annotations

import functools
import textwrap
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from pyarrow import feather

from gate.cli.main import main as cli_main
from gate.policy.models import Policy, parse_policy

SEED = 20261202


@dataclass(frozen=True)
class CliResult:
    code: int
    out: str
    err: str

    @property
    def err_lines(self) -> list[str]:
        return [line for line in self.err.splitlines() if line.strip()]


def make_docks_frame(rows: int = 240, seed: int = SEED) -> pd.DataFrame:
    """Invented docking-station table with every kind of exact structure, in closed form.

    - ``docks_total = docks_free + docks_in_use`` (exact three-term dependency)
    - ``region_code`` is 7 in every row (a constant)
    - ``capacity_copy`` equals ``docks_total`` (a duplicate)
    - ``air_temp_c`` and ``felt_temp_c`` are strongly but not exactly correlated
    - ``weather_kind`` is categorical with levels clear < fog < rain (reference 'clear')
    """
    rng = np.random.default_rng(seed)
    free = rng.integers(0, 20, rows).astype(float)
    in_use = rng.integers(0, 20, rows).astype(float)
    air = rng.normal(14.0, 6.0, rows)
    return pd.DataFrame({
        "docks_free": free,
        "docks_in_use": in_use,
        "docks_total": free + in_use,
        "region_code": np.full(rows, 7.0),
        "capacity_copy": free + in_use,
        "air_temp_c": air,
        "felt_temp_c": air + rng.normal(0.0, 0.5, rows),
        "wind_kmh": rng.gamma(2.0, 6.0, rows),
        "weather_kind": rng.choice(["clear", "fog", "rain"], rows),
    })


def make_clean_frame(rows: int = 300, seed: int = SEED) -> pd.DataFrame:
    """Invented table with weakly related numeric features and one categorical: passes."""
    rng = np.random.default_rng(seed + 1)
    return pd.DataFrame({
        "hour_sin": rng.normal(size=rows),
        "wind_kmh": rng.gamma(2.0, 6.0, rows),
        "humidity": rng.uniform(20, 95, rows),
        "weather_kind": rng.choice(["clear", "fog", "rain"], rows),
    })


@pytest.fixture
def docks_frame() -> pd.DataFrame:
    return make_docks_frame()


@pytest.fixture
def clean_frame() -> pd.DataFrame:
    return make_clean_frame()


def write_frame(frame: pd.DataFrame | pa.Table, path: Path) -> Path:
    """Write a table by suffix: .parquet, .csv, .feather/.arrow."""
    table = frame if isinstance(frame, pa.Table) else pa.Table.from_pandas(
        frame, preserve_index=False)
    suffix = path.suffix.lower()
    if suffix == ".parquet":
        pq.write_table(table, path)
    elif suffix == ".csv":
        import pyarrow.csv as pacsv

        pacsv.write_csv(table, path)
    elif suffix in (".feather", ".arrow"):
        feather.write_feather(table, path)
    else:  # tests of unknown suffixes write bytes themselves
        raise ValueError(f"no writer for {suffix}")
    return path


@pytest.fixture
def write_table(tmp_path: Path) -> Callable[..., Path]:
    """write_table(frame, name="table.parquet") -> path under tmp_path."""

    def _write(frame: pd.DataFrame | pa.Table, name: str = "table.parquet") -> Path:
        return write_frame(frame, tmp_path / name)

    return _write


@pytest.fixture
def write_policy(tmp_path: Path) -> Callable[..., Path]:
    """write_policy(yaml_text, name="policy.yaml") -> path; the text is dedented."""

    def _write(text: str, name: str = "policy.yaml") -> Path:
        path = tmp_path / name
        path.write_text(textwrap.dedent(text).lstrip("\n"), encoding="utf-8")
        return path

    return _write


def mp_columns_and_vifs(x: np.ndarray) -> tuple[list[list[Any]], list[Any]]:
    """Reference VIFs in 50-digit mpmath: VIF_j = [corr^-1]_jj, corr from the exactly centred
    cross-products of ``x`` (n x p); also the columns as mpmath numbers, for further
    references on the same data."""
    import mpmath

    n, p = x.shape
    with mpmath.workdps(50):
        cols = [[mpmath.mpf(float(v)) for v in x[:, j]] for j in range(p)]
        means = [mpmath.fsum(c) / n for c in cols]
        centred = [[v - m for v in c] for c, m in zip(cols, means)]
        comoment = mpmath.matrix(p, p)
        for i in range(p):
            for j in range(i, p):
                comoment[i, j] = comoment[j, i] = mpmath.fsum(
                    a * b for a, b in zip(centred[i], centred[j]))
        corr = mpmath.matrix(p, p)
        for i in range(p):
            for j in range(p):
                corr[i, j] = comoment[i, j] / mpmath.sqrt(comoment[i, i] * comoment[j, j])
        inverse = mpmath.inverse(corr)
        return cols, [inverse[j, j] for j in range(p)]


def policy_from(text: str) -> Policy:
    return parse_policy(textwrap.dedent(text).lstrip("\n"), source="<test>")


@pytest.fixture
def run_cli(capsys: pytest.CaptureFixture[str]) -> Callable[[Sequence[str]], CliResult]:
    """run_cli(argv) -> CliResult(code, out, err): gate.cli.main in-process, output captured."""

    def _run(argv: Sequence[str]) -> CliResult:
        capsys.readouterr()  # discard anything earlier
        try:
            code = cli_main([str(a) for a in argv])
        except SystemExit as exc:  # argparse usage errors
            code = exc.code if isinstance(exc.code, int) else 2
        captured = capsys.readouterr()
        return CliResult(code, captured.out, captured.err)

    return _run


#: Measured accuracy figures against outside references, filled by tests/test_references.py and
#: printed at the end of the run (the closing note quotes them).
ACCURACY: dict[str, float] = {}


@pytest.fixture
def record_accuracy() -> Callable[[str, float], None]:
    """record_accuracy(name, max_relative_error): keep the worst figure seen under a name."""

    def _record(name: str, error: float) -> None:
        ACCURACY[name] = max(error, ACCURACY.get(name, 0.0))

    return _record


def pytest_terminal_summary(terminalreporter: pytest.TerminalReporter) -> None:
    if not ACCURACY:
        return
    terminalreporter.section("accuracy against outside references (max relative error)")
    for name, error in sorted(ACCURACY.items()):
        terminalreporter.write_line(f"{name:<60} {error:.3e}")


@pytest.fixture(autouse=True)
def _every_verdict_matches_the_schema(monkeypatch: pytest.MonkeyPatch) -> None:
    """Validate every verdict.json document the suite builds (Verdict.to_dict: verdict.json,
    `--format json`, demo, segments) against the schema `gate verdict schema` prints."""
    from gate.judge.verdict import Verdict

    validator = _verdict_validator()
    original = Verdict.to_dict

    def checked(self: Verdict) -> dict[str, Any]:
        document = original(self)
        validator.validate(document)
        return document

    monkeypatch.setattr(Verdict, "to_dict", checked)


@functools.cache
def _verdict_validator() -> Any:
    import jsonschema

    from gate.judge.document import verdict_schema

    return jsonschema.Draft202012Validator(verdict_schema())
