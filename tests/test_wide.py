"""Wide tables (p = 1,000-2,000 features, moderate n): the p x p stages, the pairs list, a
verdict.json that grows with what breaches (not with p^2), --full-matrices, a short summary.

Outside reference: numpy's corrcoef on the same rows (pairs and the correlation matrix) and
numpy's matrix inverse (VIF = diagonal of the inverse correlation matrix).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import gate
from gate.artefacts.outputs import write_check_outputs
from gate.artefacts.terminal import summary_lines
from gate.artefacts.verdict_json import verdict_json
from gate.cli.main import main as cli_main
from gate.policy.models import parse_policy

SEED = 20261202
LIMIT = 0.8  # the packaged default's pairwise_correlation.max
#: With p/n near 1 even independent columns reach VIF ~ 1 / (1 - p/n) and condition indices in
#: the tens (Marchenko-Pastur), so the VIF and condition limits are opened up: these tests are
#: about the pairs, the sizes and the outputs, not the thresholds.
WIDE_POLICY = parse_policy(
    "policy_version: 1\nname: wide\nlimits:\n"
    "  pairwise_correlation: {max: 0.8, level: warn}\n"
    "  vif: {max: 50, level: fail}\n"
    "  condition_number: {max: 1000, level: warn}\n")


def wide_values(rows: int, columns: int, pairs: int, seed: int = SEED) -> np.ndarray:
    """Invented wind-farm sensor features: independent noise, except ``pairs`` columns that
    each shadow another column (r about 0.85: above the 0.8 |r| limit, VIF about 3.6, under
    the VIF limit of 5)."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((rows, columns))
    for k in range(pairs):
        x[:, 2 * k + 1] = x[:, 2 * k] + 0.62 * rng.standard_normal(rows)
    return x


def write(path: Path, x: np.ndarray) -> Path:
    names = [f"turbine_{j:04d}" for j in range(x.shape[1])]
    pq.write_table(pa.table({n: x[:, j] for j, n in enumerate(names)}), path)
    return path


@pytest.fixture(scope="module")
def wide_check(tmp_path_factory: pytest.TempPathFactory
               ) -> tuple[np.ndarray, gate.Verdict, Path]:
    """One check of 2,000 x 1,000 with 30 breaching pairs; verdict.json and matrices.npz
    written the way `gate check --full-matrices` writes them (the HTML summary is left out:
    its own tests cover it)."""
    folder = tmp_path_factory.mktemp("wide")
    x = wide_values(2_000, 1_000, pairs=30)
    verdict = gate.check(write(folder / "wide.parquet", x), WIDE_POLICY)
    assert verdict.status == "warn"
    out = folder / "out"
    write_check_outputs(verdict, out, html=False, full_matrices=True)
    return x, verdict, out


def test_pairs_match_numpy_corrcoef(wide_check: tuple[np.ndarray, gate.Verdict, Path]) -> None:
    x, _, out = wide_check
    reference = np.corrcoef(x, rowvar=False)
    i, j = np.nonzero(np.triu(np.abs(reference) >= LIMIT, 1))
    expected = {(f"turbine_{a:04d}", f"turbine_{b:04d}"): reference[a, b] for a, b in zip(i, j)}
    listed = json.loads((out / "verdict.json").read_text())["diagnostics"]["pairs"]
    assert len(expected) == 30
    assert {(p["a"], p["b"]) for p in listed} == set(expected)
    for p in listed:
        assert p["r"] == pytest.approx(expected[(p["a"], p["b"])], rel=1e-10)
    magnitudes = [abs(p["r"]) for p in listed]
    assert magnitudes == sorted(magnitudes, reverse=True)


def test_full_matrices_round_trip(wide_check: tuple[np.ndarray, gate.Verdict, Path]) -> None:
    x, _, out = wide_check
    verdict = json.loads((out / "verdict.json").read_text())
    with np.load(out / "matrices.npz", allow_pickle=False) as npz:
        arrays = {k: npz[k] for k in npz.files}
    p = x.shape[1]
    assert list(arrays["features"]) == verdict["features"]
    np.testing.assert_allclose(arrays["correlation"], np.corrcoef(x, rowvar=False),
                               rtol=1e-10, atol=1e-12)
    reference_inverse = np.linalg.inv(np.corrcoef(x, rowvar=False))
    np.testing.assert_allclose(arrays["inverse_correlation"], reference_inverse, rtol=1e-9,
                               atol=1e-12)
    np.testing.assert_allclose(arrays["vif"], np.diag(reference_inverse), rtol=1e-9)
    assert [arrays["vif"][k] for k in range(p)] == pytest.approx(
        [verdict["diagnostics"]["vif"][n] for n in verdict["features"]], rel=1e-12)
    np.testing.assert_allclose(arrays["condition_indices"],
                               verdict["diagnostics"]["condition_indices"], rtol=1e-12)
    assert arrays["proportions"].shape == (p + 1, p + 1)
    np.testing.assert_allclose(arrays["proportions"].sum(axis=0), 1.0, rtol=1e-9)
    assert arrays["proportion_columns"][0] == "(intercept)"
    assert str(arrays["condition_scaling"]) == verdict["diagnostics"]["condition_scaling"]


def test_verdict_json_grows_with_breaches_not_with_p_squared(
        wide_check: tuple[np.ndarray, gate.Verdict, Path], tmp_path: Path) -> None:
    out = wide_check[2]
    clean = gate.check(write(tmp_path / "clean.parquet", wide_values(2_000, 1_000, pairs=0)),
                       WIDE_POLICY)
    assert clean.status == "pass"
    # Like with like: both without --full-matrices (which adds every feature's auxiliary
    # regression, O(p) records); the written file has them for every feature.
    sizes = {0: len(verdict_json(clean)), 30: len(verdict_json(wide_check[1]))}
    written = json.loads((out / "verdict.json").read_text())
    assert set(written["diagnostics"]["auxiliary"]) == set(written["features"])
    p = 1_000
    # Per-feature entries (names, VIF, condition indices) are O(p); one p x p matrix of
    # numbers would be over 10 MB here.
    assert sizes[0] < 400 * p
    extra_per_breach = (sizes[30] - sizes[0]) / 30
    assert 0 < extra_per_breach < 3_000  # a pair entry and its finding


def test_terminal_summary_stays_short_with_many_findings(
        wide_check: tuple[np.ndarray, gate.Verdict, Path]) -> None:
    _, verdict, _ = wide_check
    assert len(verdict.findings) >= 30
    lines = summary_lines(verdict)
    assert len(lines) <= 15
    assert any("more in verdict.json" in line for line in lines)


def test_cli_full_matrices_writes_the_npz_beside_the_verdict(tmp_path: Path) -> None:
    table = write(tmp_path / "narrow.parquet", wide_values(300, 12, pairs=2))
    out = tmp_path / "out"
    assert cli_main(["check", str(table), "--out", str(out), "--quiet", "--full-matrices"]) == 0
    with np.load(out / "matrices.npz", allow_pickle=False) as npz:
        assert list(npz["features"]) == [f"turbine_{j:04d}" for j in range(12)]
        assert npz["correlation"].shape == (12, 12)
    assert cli_main(["check", str(table), "--out", str(tmp_path / "plain"), "--quiet"]) == 0
    assert not (tmp_path / "plain" / "matrices.npz").exists()


@pytest.mark.slow
def test_two_thousand_features(tmp_path: Path) -> None:
    x = wide_values(3_000, 2_000, pairs=10)
    verdict = gate.check(write(tmp_path / "w2k.parquet", x))
    d = verdict.diagnostics
    assert d.rank == 2_001 and d.route == "gram"
    reference = np.linalg.inv(np.corrcoef(x, rowvar=False))
    np.testing.assert_allclose(d.vif, np.diag(reference), rtol=1e-9)
    i, _, _ = d.pairs(LIMIT)
    assert i.size == 10
