"""The gate's numbers against outside references; each check names its source beside it.

Figures measured here (max relative error) are recorded with ``record_accuracy`` and printed at
the end of the pytest run, under "accuracy against outside references".
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import mpmath
import numpy as np
import pandas as pd
import pytest
import scipy.linalg as sla
import statsmodels.datasets.longley as longley_data
from conftest import mp_columns_and_vifs
from statsmodels.stats.outliers_influence import variance_inflation_factor
from statsmodels.tools import add_constant

import gate
from gate.judge.verdict import Verdict
from gate.numerics.kernels import INTERCEPT
from gate.policy.models import Policy

Recorder = Callable[[str, float], None]
SEED = 20261202

#: NIST StRD, Longley data set, certified R-squared of the full model (y on x1..x6).
#: Source: https://www.itl.nist.gov/div898/strd/lls/data/Longley.shtml
NIST_LONGLEY_R2 = 0.995479004577296
LONGLEY_REGRESSORS = ["GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"]


def policy(**overrides: Any) -> Policy:
    return Policy.model_validate({"name": "reference", **overrides})


def run_check(frame: pd.DataFrame, **policy_overrides: Any) -> Verdict:
    return gate.check(frame, policy(**policy_overrides))


@pytest.fixture(scope="module")
def longley() -> pd.DataFrame:
    """statsmodels' bundled copy of Longley (1967); matches NIST StRD's Longley data."""
    return longley_data.load_pandas().data


def relative_errors(actual: Any, expected: Any) -> np.ndarray:
    a = np.asarray(actual, dtype=float)
    e = np.asarray(expected, dtype=float)
    return np.abs(a - e) / np.abs(e)


def dummy_design(frame: pd.DataFrame, categorical: list[str]) -> pd.DataFrame:
    """Reference encoding: the most frequent level dropped (ties: the first sorted), dummies
    named '<col>=<level>' -- the gate's documented default, built here with pandas alone."""
    parts = []
    for name in frame.columns:
        if name in categorical:
            levels = sorted(frame[name].unique())
            counts = frame[name].value_counts()
            reference = min(levels, key=lambda level: (-counts[level], levels.index(level)))
            for level in (v for v in levels if v != reference):
                parts.append(pd.Series((frame[name] == level).astype(float),
                                       name=f"{name}={level}"))
        else:
            parts.append(frame[name].astype(float))
    return pd.concat(parts, axis=1)


# --- (a) statsmodels -----------------------------------------------------------------------

@pytest.mark.parametrize("columns", [LONGLEY_REGRESSORS, None], ids=["six", "seven"])
def test_longley_vif_matches_statsmodels(longley: pd.DataFrame, columns: list[str] | None,
                                         record_accuracy: Recorder) -> None:
    # Source: statsmodels.stats.outliers_influence.variance_inflation_factor, which regresses
    # each column on all others of the design passed in; the design includes the constant.
    frame = longley[columns] if columns else longley
    exog = add_constant(frame.to_numpy())
    expected = [variance_inflation_factor(exog, i) for i in range(1, exog.shape[1])]
    verdict = run_check(frame)
    assert verdict.features == tuple(frame.columns)
    errors = relative_errors(verdict.diagnostics.vif, expected)
    record_accuracy("Longley VIF vs statsmodels variance_inflation_factor", float(errors.max()))
    assert errors.max() < 1e-9


# --- (b) NIST StRD -------------------------------------------------------------------------

def test_longley_vif_of_totemp_matches_nist_certified_r2(longley: pd.DataFrame,
                                                         record_accuracy: Recorder) -> None:
    # Source: NIST StRD Longley, certified R^2 of TOTEMP on the six regressors. With all seven
    # columns as features, TOTEMP's auxiliary regression is exactly that model, so
    # VIF(TOTEMP) = 1 / (1 - R^2).
    verdict = run_check(longley)
    vif = verdict.vif()["TOTEMP"]
    assert vif is not None
    expected = 1.0 / (1.0 - NIST_LONGLEY_R2)
    error = abs(vif - expected) / expected
    record_accuracy("Longley VIF(TOTEMP) vs NIST StRD certified R^2", error)
    # The certified R^2 has 15 significant digits; 1 - R^2 ~ 4.5e-3 loses about two of them.
    assert error < 1e-10


# --- (c) mpmath, 50 digits -------------------------------------------------------------------

def _mp_longley_reference(x: np.ndarray) -> tuple[list[Any], Any]:
    """VIFs (diagonal of the inverse correlation matrix) and the Belsley-Kuh-Welsch condition
    number (unit-length columns of [1, X]), both computed in 50-digit arithmetic."""
    n, p = x.shape
    cols, vif = mp_columns_and_vifs(x)
    with mpmath.workdps(50):
        design = mpmath.matrix(n, p + 1)
        for j, column in enumerate([[mpmath.mpf(1)] * n, *cols]):
            norm = mpmath.sqrt(mpmath.fsum(v * v for v in column))
            for i in range(n):
                design[i, j] = column[i] / norm
        singular = mpmath.svd_r(design, compute_uv=False)
        values = [singular[k] for k in range(singular.rows)]
        condition = max(values) / min(values)
    return vif, condition


@pytest.mark.parametrize("columns", [LONGLEY_REGRESSORS, None], ids=["six", "seven"])
def test_longley_vif_and_condition_number_match_mpmath(longley: pd.DataFrame,
                                                       columns: list[str] | None,
                                                       record_accuracy: Recorder) -> None:
    # Source: mpmath at 50 digits (inverse of the correlation matrix; SVD of the unit-length
    # scaled [1, X]), the reference suggested by Belsley, Kuh & Welsch (1980, ch. 3).
    frame = longley[columns] if columns else longley
    vif_ref, condition_ref = _mp_longley_reference(frame.to_numpy())
    verdict = run_check(frame)
    with mpmath.workdps(50):
        vif_errors = [abs((mpmath.mpf(float(a)) - b) / b)
                      for a, b in zip(verdict.diagnostics.vif, vif_ref)]
        condition = verdict.diagnostics.condition_number
        assert condition is not None
        condition_error = abs((mpmath.mpf(condition) - condition_ref) / condition_ref)
    record_accuracy("Longley VIFs vs mpmath 50-digit", float(max(vif_errors)))
    record_accuracy("Longley BKW condition number vs mpmath 50-digit", float(condition_error))
    assert float(max(vif_errors)) < 1e-9
    assert float(condition_error) < 1e-9


# --- (d) numpy rank, scipy null space -------------------------------------------------------

def _generic_dependency_frame() -> pd.DataFrame:
    # Invented, seeded: lamp_hours = 0.3 * panel_kw - 2.1 * shade_pct + 4 exactly (to rounding).
    rng = np.random.default_rng(SEED + 5)
    rows = 120
    panel = rng.normal(50, 10, rows)
    shade = rng.uniform(0, 30, rows)
    return pd.DataFrame({
        "panel_kw": panel,
        "shade_pct": shade,
        "battery_age": rng.normal(3, 1, rows),
        "lamp_hours": 0.3 * panel - 2.1 * shade + 4.0,
        "cloud_cover": rng.uniform(0, 1, rows),
    })


def _few_rows_frame() -> pd.DataFrame:
    # Invented: 5 rows, 8 features: n <= p, so [1, X] has rank at most 5.
    rng = np.random.default_rng(SEED + 6)
    return pd.DataFrame(rng.normal(size=(5, 8)), columns=[f"sensor_{k}" for k in range(8)])


@pytest.mark.parametrize("name", ["docks", "generic", "few_rows"])
def test_rank_and_dependencies_match_numpy_and_scipy(name: str, docks_frame: pd.DataFrame,
                                                     record_accuracy: Recorder) -> None:
    # Sources: numpy.linalg.matrix_rank (SVD, tolerance max(n, p+1) eps sigma_max) for the rank
    # of [1, X]; scipy.linalg.null_space for the null space of the centred design.
    frame, categorical = {
        "docks": (docks_frame, ["weather_kind"]),
        "generic": (_generic_dependency_frame(), []),
        "few_rows": (_few_rows_frame(), []),
    }[name]
    verdict = run_check(frame, columns={"categorical": categorical})
    design = dummy_design(frame, categorical)
    assert list(design.columns) == list(verdict.features)
    x = design.to_numpy()
    with_intercept = np.column_stack([np.ones(len(x)), x])
    d = verdict.diagnostics
    assert d.rank == np.linalg.matrix_rank(with_intercept)
    assert len(d.dependencies) == with_intercept.shape[1] - d.rank
    assert d.condition_number is None

    centred = x - x.mean(axis=0)
    null = sla.null_space(centred)
    assert null.shape[1] == len(d.dependencies)
    worst = 0.0
    for dep in d.dependencies:
        a = np.zeros(x.shape[1])
        for k, coef in dep.terms.items():
            a[k] = coef
        assert max(abs(c) for c in dep.terms.values()) == pytest.approx(1.0)
        # The relation holds on the centred design and, with its constant, on the raw rows.
        residual = np.linalg.norm(centred @ a) / (np.linalg.norm(centred) * np.linalg.norm(a))
        raw = np.linalg.norm(x @ a - dep.constant) / (
            np.linalg.norm(x) * np.linalg.norm(a) + abs(dep.constant) * np.sqrt(len(x)))
        outside = np.linalg.norm(a - null @ (null.T @ a)) / np.linalg.norm(a)
        worst = max(worst, residual, raw, outside)
        assert residual < 1e-12
        assert raw < 1e-12
        assert outside < 1e-10  # within null_space's own accuracy
    record_accuracy("exact dependencies: residual / distance to scipy null space", worst)


def test_docks_relations_are_named_plainly(docks_frame: pd.DataFrame) -> None:
    # Closed form of the invented table: a constant, a duplicate and a three-term sum.
    verdict = run_check(docks_frame, columns={"categorical": ["weather_kind"]})
    names = verdict.features
    kinds = {}
    for dep in verdict.diagnostics.dependencies:
        kinds[frozenset(names[k] for k in dep.terms)] = dep.kind
    assert kinds[frozenset({"region_code"})] == "constant"
    assert sum(kind == "duplicate" for kind in kinds.values()) == 1
    assert any(kind == "linear" and {"docks_free", "docks_in_use"} <= members
               for members, kind in kinds.items())
    vif = verdict.vif()
    for feature in ("region_code", "docks_free", "docks_in_use", "docks_total", "capacity_copy"):
        assert vif[feature] is None
    for feature in ("air_temp_c", "felt_temp_c", "wind_kmh"):
        assert vif[feature] is not None


def test_generic_dependency_coefficients_are_recovered() -> None:
    # Closed form: lamp_hours - 0.3 panel_kw + 2.1 shade_pct = 4, scaled so the largest |coef|
    # is 1 (interface.md).
    verdict = run_check(_generic_dependency_frame())
    (dep,) = verdict.diagnostics.dependencies
    names = verdict.features
    terms = {names[k]: c for k, c in dep.terms.items()}
    scale = 1.0 / 2.1
    expected = {"lamp_hours": scale, "panel_kw": -0.3 * scale, "shade_pct": 2.1 * scale}
    sign = np.sign(terms["shade_pct"])
    assert set(terms) == set(expected)
    for key, value in expected.items():
        assert sign * terms[key] == pytest.approx(value, rel=1e-9)
    assert sign * dep.constant == pytest.approx(4.0 * scale, rel=1e-9)


def test_exact_vifs_beside_a_dependency_match_statsmodels_on_the_reduced_design() -> None:
    # Source: statsmodels' VIF on the design with one column per dependency dropped; dropping a
    # column of the dependency leaves the span of each other feature's co-features unchanged.
    frame = _generic_dependency_frame()
    verdict = run_check(frame)
    reduced = frame.drop(columns=["lamp_hours"])
    exog = add_constant(reduced.to_numpy())
    kept = list(reduced.columns)
    for name in ("battery_age", "cloud_cover"):
        reference = variance_inflation_factor(exog, kept.index(name) + 1)
        assert verdict.vif()[name] == pytest.approx(reference, rel=1e-9)
    for name in ("panel_kw", "shade_pct", "lamp_hours"):
        assert verdict.vif()[name] is None


# --- (e) two features ----------------------------------------------------------------------

def test_two_feature_vif_is_one_over_one_minus_r_squared(record_accuracy: Recorder) -> None:
    # Common practice, no source: with two features, each one's auxiliary R^2 is r^2.
    rng = np.random.default_rng(SEED + 7)
    a = rng.normal(size=400)
    frame = pd.DataFrame({"air_temp_c": a, "felt_temp_c": 0.9 * a + 0.3 * rng.normal(size=400)})
    r = np.corrcoef(frame.to_numpy(), rowvar=False)[0, 1]
    verdict = run_check(frame)
    expected = 1.0 / (1.0 - r**2)
    errors = relative_errors(verdict.diagnostics.vif, [expected, expected])
    record_accuracy("two-feature VIF vs 1/(1-r^2)", float(errors.max()))
    assert errors.max() < 1e-12
    (pair_a, pair_b, pair_r), = [(p["a"], p["b"], p["r"])
                                 for p in verdict.to_dict()["diagnostics"]["pairs"]]
    assert (pair_a, pair_b) == ("air_temp_c", "felt_temp_c")
    assert pair_r == pytest.approx(r, rel=1e-12)


# --- (f) GVIF --------------------------------------------------------------------------------

def _weather_frame(rows: int = 500) -> pd.DataFrame:
    # Invented: air temperature and humidity depend on the weather kind, so the group inflates.
    rng = np.random.default_rng(SEED + 8)
    kind = rng.choice(["clear", "fog", "rain", "snow"], rows, p=[0.4, 0.2, 0.25, 0.15])
    base = pd.Series(kind).map({"clear": 18.0, "fog": 9.0, "rain": 12.0, "snow": -2.0})
    wet = pd.Series(kind).map({"clear": 40.0, "fog": 90.0, "rain": 85.0, "snow": 70.0})
    return pd.DataFrame({
        "air_temp_c": base.to_numpy() + rng.normal(0, 4, rows),
        "humidity": wet.to_numpy() + rng.normal(0, 8, rows),
        "weather_kind": kind,
        "wind_kmh": rng.gamma(2.0, 6.0, rows),
    })


def _direct_gvif(design: pd.DataFrame, group: list[str]) -> float:
    # Fox & Monette (1992), JASA 87:178-183, eq. (10): GVIF = det(R11) det(R22) / det(R).
    corr = np.corrcoef(design.to_numpy(), rowvar=False)
    inside = [list(design.columns).index(c) for c in group]
    outside = [k for k in range(design.shape[1]) if k not in inside]
    return float(np.linalg.det(corr[np.ix_(inside, inside)])
                 * np.linalg.det(corr[np.ix_(outside, outside)]) / np.linalg.det(corr))


def test_gvif_matches_direct_determinant_formula(record_accuracy: Recorder) -> None:
    frame = _weather_frame()
    verdict = run_check(frame, columns={"categorical": ["weather_kind"]})
    design = dummy_design(frame, ["weather_kind"])
    group = [c for c in design.columns if c.startswith("weather_kind=")]
    expected = _direct_gvif(design, group)
    (result,) = verdict.diagnostics.groups
    assert result.df == 3
    error = abs(result.gvif - expected) / expected
    record_accuracy("GVIF vs det(R11) det(R22) / det(R)", error)
    assert error < 1e-10
    assert result.gvif > 1.5  # the invented dependence is real
    gvif_json = verdict.to_dict()["diagnostics"]["gvif"]["weather_kind"]
    assert gvif_json["df"] == 3
    assert gvif_json["gvif_adjusted"] == pytest.approx(expected ** (1 / 6), rel=1e-10)


def test_gvif_matches_mpmath_determinants(record_accuracy: Recorder) -> None:
    # Fox & Monette (1992) eq. (10), GVIF = det(R11) det(R22) / det(R), evaluated in 50-digit
    # mpmath arithmetic (correlations from exact centred sums).
    frame = _weather_frame(rows=300)
    verdict = run_check(frame, columns={"categorical": ["weather_kind"]})
    design = dummy_design(frame, ["weather_kind"])
    x = design.to_numpy()
    n, p = x.shape
    inside = [k for k, c in enumerate(design.columns) if c.startswith("weather_kind=")]
    outside = [k for k in range(p) if k not in inside]
    with mpmath.workdps(50):
        cols = [[mpmath.mpf(float(v)) for v in x[:, j]] for j in range(p)]
        centred = [[v - mpmath.fsum(c) / n for v in c] for c in cols]
        corr = mpmath.matrix(p, p)
        for i in range(p):
            for j in range(i, p):
                corr[i, j] = corr[j, i] = mpmath.fsum(a * b for a, b in zip(centred[i],
                                                                            centred[j]))
        norms = [mpmath.sqrt(corr[i, i]) for i in range(p)]
        for i in range(p):
            for j in range(p):
                corr[i, j] = corr[i, j] / (norms[i] * norms[j])

        def det(index: list[int]) -> Any:
            return mpmath.det(mpmath.matrix([[corr[i, j] for j in index] for i in index]))

        expected = det(inside) * det(outside) / det(list(range(p)))
        error = abs((mpmath.mpf(verdict.diagnostics.groups[0].gvif) - expected) / expected)
    record_accuracy("GVIF vs mpmath 50-digit determinants", float(error))
    assert float(error) < 1e-9


def test_gvif_does_not_depend_on_the_reference_level() -> None:
    # Fox & Monette (1992): GVIF is invariant to the coding of the group's columns.
    frame = _weather_frame()
    base = run_check(frame, columns={"categorical": ["weather_kind"]})
    levels = sorted(frame["weather_kind"].unique())
    assert base.design.groups[0].reference in levels
    for chosen in levels:
        other = run_check(frame, columns={"categorical": ["weather_kind"],
                                          "reference": {"weather_kind": chosen}})
        assert other.design.groups[0].reference == chosen
        assert other.diagnostics.groups[0].gvif == pytest.approx(
            base.diagnostics.groups[0].gvif, rel=1e-10)
        # The numeric features' VIFs are invariant too (same span).
        for name in ("air_temp_c", "humidity", "wind_kmh"):
            assert other.vif()[name] == pytest.approx(base.vif()[name], rel=1e-10)


def test_gvif_of_a_single_dummy_equals_its_vif() -> None:
    # Fox & Monette (1992): with df = 1 the GVIF is the ordinary VIF; reference: statsmodels'
    # variance_inflation_factor of the 0/1 column in the numeric design.
    rng = np.random.default_rng(SEED + 9)
    rows = 300
    weekend = rng.random(rows) < 0.3
    frame = pd.DataFrame({
        "leisure_trips": 5.0 * weekend + rng.normal(0, 2, rows),
        "day_kind": np.where(weekend, "weekend", "weekday"),
        "wind_kmh": rng.gamma(2.0, 6.0, rows),
    })
    verdict = run_check(frame, columns={"categorical": ["day_kind"]})
    (result,) = verdict.diagnostics.groups
    assert result.df == 1
    design = dummy_design(frame, ["day_kind"])
    exog = add_constant(design.to_numpy())
    position = list(design.columns).index("day_kind=weekend")
    expected = variance_inflation_factor(exog, position + 1)
    assert result.gvif == pytest.approx(expected, rel=1e-10)
    assert verdict.vif()["day_kind=weekend"] == pytest.approx(expected, rel=1e-10)


# --- (g) condition indices and variance-decomposition proportions ---------------------------

def _bkw_reference(x: np.ndarray, *, intercept: bool) -> tuple[np.ndarray, np.ndarray]:
    # Belsley, Kuh & Welsch (1980), ch. 3, from a direct numpy SVD: columns scaled to unit
    # length; eta_k = mu_max / mu_k; phi_jk = v_jk^2 / mu_k^2; pi_kj = phi_jk / sum_k phi_jk.
    if intercept:
        a = np.column_stack([np.ones(len(x)), x])
    else:
        a = x - x.mean(axis=0)
    a = a / np.linalg.norm(a, axis=0)
    _, mu, vt = np.linalg.svd(a, full_matrices=False)
    phi = (vt.T / mu) ** 2
    proportions = (phi / phi.sum(axis=1, keepdims=True)).T
    return mu[0] / mu, proportions


@pytest.mark.parametrize("scaling", ["unit_length", "standardized"])
@pytest.mark.parametrize("dataset", ["longley", "weather"])
def test_condition_indices_and_proportions_match_numpy_svd(
        dataset: str, scaling: str, longley: pd.DataFrame, record_accuracy: Recorder) -> None:
    if dataset == "longley":
        frame, categorical = longley[LONGLEY_REGRESSORS], []
    else:
        frame, categorical = _weather_frame(), ["weather_kind"]
    verdict = run_check(frame, columns={"categorical": categorical},
                        limits={"condition_number": {"scaling": scaling}})
    x = dummy_design(frame, categorical).to_numpy()
    indices, proportions = _bkw_reference(x, intercept=scaling == "unit_length")
    cond = verdict.diagnostics.condition
    assert cond.scaling == scaling
    p = x.shape[1]
    expected_columns = (INTERCEPT, *range(p)) if scaling == "unit_length" else tuple(range(p))
    assert cond.columns == expected_columns
    assert np.all(np.diff(cond.indices) >= 0) and cond.indices[0] == 1.0
    errors = relative_errors(cond.indices, indices)
    record_accuracy(f"condition indices ({scaling}) vs numpy SVD", float(errors.max()))
    # numpy's SVD of a 16 x 7 matrix with condition 4e4 is itself accurate to about
    # kappa * eps ~ 1e-11 in the smallest singular value.
    assert errors.max() < 1e-9
    np.testing.assert_allclose(cond.proportions, proportions, rtol=0, atol=1e-8)
    np.testing.assert_allclose(cond.proportions.sum(axis=0), 1.0, rtol=0, atol=1e-12)
    if scaling == "unit_length":
        number = verdict.diagnostics.condition_number
        assert number == pytest.approx(indices[-1], rel=1e-9)
        assert verdict.to_dict()["diagnostics"]["condition_indices"] == pytest.approx(
            list(indices), rel=1e-9)


def _factor_with_condition(order: int, condition: float, seed: int) -> np.ndarray:
    """Upper factor of a 3p x p matrix with unit columns and singular values geometric from 1
    to 1/condition before the columns are scaled (invented, seeded)."""
    rng = np.random.default_rng(seed)
    left, _ = np.linalg.qr(rng.normal(size=(3 * order, order)))
    right, _ = np.linalg.qr(rng.normal(size=(order, order)))
    a = (left * np.geomspace(1.0, 1.0 / condition, order)) @ right.T
    a /= np.linalg.norm(a, axis=0)
    return np.asarray(np.linalg.qr(a, mode="r"))


def _mp_bkw(r: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Belsley, Kuh & Welsch (1980, ch. 3) from mpmath's SVD at 40 digits of the same factor."""
    with mpmath.workdps(40):
        _, s, v = mpmath.svd_r(mpmath.matrix(r.tolist()))
        order = r.shape[0]
        mu = [s[k] for k in range(order)]
        phi = [[v[k, j] ** 2 / mu[k] ** 2 for k in range(order)] for j in range(order)]
        proportions = [[phi[j][k] / mpmath.fsum(phi[j]) for j in range(order)]
                       for k in range(order)]
        indices = [max(mu) / m for m in mu]
        keys = sorted(range(order), key=lambda k: indices[k])
        return (np.array([float(indices[k]) for k in keys]),
                np.array([[float(proportions[k][j]) for j in range(order)] for k in keys]))


@pytest.mark.parametrize(("condition", "method"), [
    (10.0, "eigh"), (90.0, "eigh"), (120.0, "svd"), (1e4, "svd"), (1e7, "svd")])
def test_spectrum_routes_match_mpmath_svd(condition: float, method: str,
                                          record_accuracy: Recorder) -> None:
    # The condition indices and proportions come from r'r (LAPACK dsyevd) while the condition
    # number is at most EIGEN_ROUTE_CONDITION = 100, else from the SVD (dgesdd). Reference:
    # mpmath's SVD of the same factor at 40 digits. Tolerances: the eigen route's error grows
    # like eps * condition^2 (1.1e-12 at 100 in double precision terms), the SVD's like
    # eps * condition; measured here at most 9e-14 (indices) and 4e-14 (proportions) for the
    # eigen route.
    from gate.numerics.kernels import belsley_kuh_welsch, spectrum

    r = _factor_with_condition(12, condition, SEED + int(condition))
    assert spectrum(r, vectors=True).method == method
    assert spectrum(r, vectors=False).method == method
    indices, proportions = belsley_kuh_welsch(r)
    expected_indices, expected_proportions = _mp_bkw(r)
    errors = relative_errors(indices, expected_indices)
    proportion_error = float(np.max(np.abs(proportions - expected_proportions)))
    record_accuracy(f"BKW indices ({method} route) vs mpmath 40-digit SVD", float(errors.max()))
    record_accuracy(f"BKW proportions ({method} route, absolute) vs mpmath 40-digit SVD",
                    proportion_error)
    index_tolerance = 1e-12 if condition < 1e3 else 1e-15 * condition * 100
    assert errors.max() < index_tolerance
    assert proportion_error < 1e-11


@pytest.mark.parametrize(("condition", "first"), [(10.0, 12), (90.0, 12), (120.0, 0)])
def test_top_rows_route_matches_mpmath_svd(condition: float, first: int,
                                           record_accuracy: Recorder) -> None:
    # belsley_kuh_welsch_top: every index from the eigenvalues of the tridiagonal form of r'r
    # (LAPACK dsytrd + dsterf), the proportions of the largest indices alone from the
    # eigenvectors of those (dstebz + dstein, back-transformed by dormqr) and the diagonal of
    # inv(r'r) (squared row norms of inv(r)). Reference: mpmath's SVD of the same factor at 40
    # digits. At condition 120 (over EIGEN_ROUTE_CONDITION) it must hand over to the SVD and
    # return every row.
    from gate.numerics.kernels import belsley_kuh_welsch_top

    r = _factor_with_condition(16, condition, SEED + 7 + int(condition))
    top = belsley_kuh_welsch_top(r, above=math.inf, at_least=4, min_order=1)
    expected_indices, expected_proportions = _mp_bkw(r)
    assert top.first == first
    assert np.isnan(top.proportions[:first]).all()
    errors = relative_errors(top.indices, expected_indices)
    proportion_error = float(np.max(np.abs(top.proportions[first:]
                                           - expected_proportions[first:])))
    route = "top rows" if first else "svd fallback"
    record_accuracy(f"BKW indices ({route}) vs mpmath 40-digit SVD", float(errors.max()))
    record_accuracy(f"BKW proportions ({route}, absolute) vs mpmath 40-digit SVD",
                    proportion_error)
    assert errors.max() < 1e-12
    assert proportion_error < 1e-11


def test_weighted_statistics_match_statsmodels_weighted_correlation() -> None:
    # Source: statsmodels.stats.weightstats.DescrStatsW (weighted correlation), and VIF as the
    # diagonal of the inverse weighted correlation matrix.
    from statsmodels.stats.weightstats import DescrStatsW

    rng = np.random.default_rng(SEED + 10)
    rows = 200
    a = rng.normal(size=rows)
    frame = pd.DataFrame({
        "air_temp_c": a,
        "felt_temp_c": a + 0.5 * rng.normal(size=rows),
        "wind_kmh": rng.gamma(2.0, 6.0, rows),
        "trips_weight": rng.uniform(0.1, 5.0, rows),
    })
    verdict = run_check(frame, columns={"weight": "trips_weight"})
    x = frame.drop(columns="trips_weight").to_numpy()
    stats = DescrStatsW(x, weights=frame["trips_weight"].to_numpy())
    corr = stats.corrcoef
    np.testing.assert_allclose(verdict.diagnostics.correlation, corr, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(verdict.diagnostics.vif, np.diag(np.linalg.inv(corr)),
                               rtol=1e-11)


@pytest.mark.parametrize("tolerance", [1e-2, 1e-5, None])
def test_policy_tolerance_matches_numpy_svd_rank(tolerance: float | None) -> None:
    # Source: numpy.linalg.svd of the centred, unit-length columns; a singular value counts when
    # it exceeds tolerance * the largest (numpy's matrix_rank convention, relative form).
    rng = np.random.default_rng(SEED + 11)
    rows = 200
    a, b, c, d = rng.normal(size=(4, rows))
    frame = pd.DataFrame({"pump_a": a, "pump_b": b, "valve_c": c,
                          "flow_total": a + b + 1e-3 * d})  # near, not exact
    verdict = run_check(frame, limits={"rank_deficiency": {"tolerance": tolerance}})
    x = frame.to_numpy()
    z = (x - x.mean(axis=0)) / np.linalg.norm(x - x.mean(axis=0), axis=0)
    s = np.linalg.svd(z, compute_uv=False)
    tol = tolerance if tolerance is not None else max(rows, 5) * np.finfo(float).eps
    assert verdict.diagnostics.rank == 1 + int(np.count_nonzero(s > tol * s[0]))
    if verdict.diagnostics.rank < 5:
        (dep,) = verdict.diagnostics.dependencies
        names = {verdict.features[k] for k in dep.terms}
        # valve_c's share is far below the tolerance: not part of the relation
        assert names == {"pump_a", "pump_b", "flow_total"}
        assert verdict.vif()["valve_c"] is not None


def test_exact_pass_route_matches_mpmath_on_longley(longley: pd.DataFrame,
                                                    record_accuracy: Recorder) -> None:
    # A copy of ARMED makes the design rank deficient, so the TSQR exact pass runs; the other
    # features' VIFs are exact on the design with the copy dropped, i.e. Longley's own VIFs.
    # Reference: mpmath at 50 digits on the six Longley regressors.
    frame = longley[LONGLEY_REGRESSORS].assign(ARMED_COPY=longley["ARMED"])
    verdict = run_check(frame)
    assert verdict.diagnostics.route == "gram+tsqr"
    (dep,) = verdict.diagnostics.dependencies
    assert dep.kind == "duplicate"
    vif_ref, _ = _mp_longley_reference(longley[LONGLEY_REGRESSORS].to_numpy())
    with mpmath.workdps(50):
        errors = [abs((mpmath.mpf(float(verdict.diagnostics.vif[k])) - vif_ref[k]) / vif_ref[k])
                  for k, name in enumerate(LONGLEY_REGRESSORS) if name != "ARMED"]
    record_accuracy("Longley VIFs via the exact (TSQR) pass vs mpmath 50-digit",
                    float(max(errors)))
    assert float(max(errors)) < 1e-9
    assert verdict.vif()["ARMED"] is None and verdict.vif()["ARMED_COPY"] is None


# --- the triangular inverse by halves (gate.numerics.kernels.triangular_inverse) -------------

@pytest.mark.parametrize("n", [5, 64, 65, 150, 300])
def test_triangular_inverse_matches_mpmath(n: int, record_accuracy: Recorder) -> None:
    """Reference: mpmath, 40 digits, back substitution on the same float upper-triangular
    factor (the Cholesky factor of an invented ill-conditioned correlation matrix, condition
    number ~1e8, so the inverse has entries spanning many magnitudes). Orders 65-300 go through
    the by-halves recursion (blocks of <= 64 are one dense solve). Checked: the VIFs (squared
    row norms of the inverse), which is what the gate uses the inverse for. Measured ~2e-15 at
    every order (LAPACK's dtrtri gave the same order); the bound asserted, 1e-10, leaves room
    for other BLAS builds yet fails for any error in the recursion (a wrong block sign or
    offset gives errors of order 1)."""
    from gate.numerics.kernels import cholesky_or_none, squared_row_norms, triangular_inverse

    rng = np.random.default_rng(SEED + n)
    basis = rng.standard_normal((4 * n, n))
    basis[:, -1] = basis[:, 0] + 1e-4 * rng.standard_normal(4 * n)  # a near duplicate
    corr = np.corrcoef(basis, rowvar=False)
    r = cholesky_or_none(corr)
    assert r is not None
    vif = squared_row_norms(triangular_inverse(r))
    with mpmath.workdps(40):
        m = mpmath.matrix(r.tolist())
        exact = mpmath.matrix(n, n)
        for col in range(n):  # back substitution for column col of inv(R)
            for row in range(col, -1, -1):
                acc = mpmath.mpf(1) if row == col else mpmath.mpf(0)
                for k in range(row + 1, col + 1):
                    acc -= m[row, k] * exact[k, col]
                exact[row, col] = acc / m[row, row]
        reference = np.array([float(mpmath.fsum(exact[i, k] ** 2 for k in range(n)))
                              for i in range(n)])
    error = float(np.max(np.abs(vif - reference) / reference))
    record_accuracy(f"VIFs from the triangular inverse by halves (n={n}) vs mpmath 40-digit",
                    error)
    assert error < 1e-10


def test_gram_products_are_exactly_symmetric() -> None:
    """U U' (upper_times_transpose) and the running Gram are symmetric bit for bit: numpy
    hands a @ a.T to BLAS dsyrk and mirrors the triangle (a property, checked exactly)."""
    from gate.numerics.kernels import upper_times_transpose
    from gate.stats.local import RunningGram

    rng = np.random.default_rng(SEED)
    u = np.triu(rng.standard_normal((130, 130)))
    product = upper_times_transpose(u)
    assert np.array_equal(product, product.T)
    assert np.allclose(product, u @ u.T, rtol=1e-13, atol=1e-12)
    running = RunningGram(7)
    for size in (50, 3, 200):
        running.add(rng.standard_normal((size, 7)) * 10 ** rng.uniform(-3, 3, 7) + 5.0, None)
    comoment = running.result().scaled_comoment
    assert np.array_equal(comoment, comoment.T)
