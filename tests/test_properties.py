"""Property tests (hypothesis): what must hold for every table, not just the ones we thought of.

Sources of the properties: VIF_j = 1 / (1 - R^2_j) >= 1 by definition; VIF, GVIF and Pearson r
depend only on the span of each column's co-features and on centred, scaled columns, so they
are invariant to column order, shifts and rescaling (Belsley, Kuh & Welsch 1980, ch. 3 for the
scaling of condition indices); the pairwise update of Chan, Golub & LeVeque (1979) and TSQR
(Demmel et al. 2012) are exact in exact arithmetic, so any split of the rows agrees to rounding.
Data are invented: hypothesis draws seeds and shapes, numpy draws the values.
"""

from __future__ import annotations

import itertools
import random
from typing import Any

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

import gate
from gate.judge.verdict import Verdict
from gate.policy.models import Policy
from gate.stats.accumulators import CentredGram, TriangularFactor

PROPERTY_SETTINGS = settings(max_examples=40, deadline=None,
                             suppress_health_check=[HealthCheck.too_slow])
RTOL = 1e-10


def correlated_frame(seed: int, rows: int, features: int, strength: float) -> pd.DataFrame:
    """Invented sensor table: features share a common factor with weight ``strength``."""
    rng = np.random.default_rng(seed)
    common = rng.normal(size=(rows, 1))
    values = strength * common + rng.normal(size=(rows, features))
    values = values * rng.uniform(0.5, 20.0, features) + rng.uniform(-50, 50, features)
    return pd.DataFrame(values, columns=[f"sensor_{k}" for k in range(features)])


def check(frame: pd.DataFrame, chunk_rows: int | None = None, **overrides: Any) -> Verdict:
    return gate.check(frame, Policy.model_validate({"name": "property", **overrides}),
                      chunk_rows=chunk_rows)


frames = st.builds(
    correlated_frame,
    seed=st.integers(0, 2**32 - 1),
    rows=st.integers(12, 80),
    features=st.integers(2, 6),
    strength=st.floats(0.0, 8.0),
)


def assert_close(actual: Any, expected: Any, rtol: float = RTOL) -> None:
    np.testing.assert_allclose(np.asarray(actual, float), np.asarray(expected, float),
                               rtol=rtol, atol=0)


@PROPERTY_SETTINGS
@given(frame=frames)
def test_vif_is_at_least_one(frame: pd.DataFrame) -> None:
    vif = check(frame).diagnostics.vif
    assert np.all(vif >= 1.0 - 1e-12)


@PROPERTY_SETTINGS
@given(values=hnp.arrays(np.float64, st.tuples(st.integers(5, 30), st.integers(2, 5)),
                         elements=st.floats(-1e3, 1e3, allow_nan=False, allow_infinity=False)))
def test_vif_is_at_least_one_or_infinite_for_arbitrary_values(values: np.ndarray) -> None:
    # Arbitrary (often degenerate) values: every VIF is >= 1 or infinite, never NaN or < 1.
    frame = pd.DataFrame(values, columns=[f"x{k}" for k in range(values.shape[1])])
    d = check(frame).diagnostics
    assert not np.isnan(d.vif).any()
    assert np.all(d.vif >= 1.0 - 1e-9)
    assert np.all(np.isinf(d.vif) == d.in_dependency)
    assert 1 <= d.rank <= min(values.shape[0], values.shape[1] + 1)


@PROPERTY_SETTINGS
@given(frame=frames, order_seed=st.integers(0, 2**32 - 1))
def test_invariant_to_column_order(frame: pd.DataFrame, order_seed: int) -> None:
    order = list(frame.columns)
    random.Random(order_seed).shuffle(order)
    base, other = check(frame), check(frame[order])
    assert_close(pd.Series(other.vif())[list(frame.columns)], pd.Series(base.vif()))
    assert_close(other.diagnostics.condition.indices, base.diagnostics.condition.indices)
    position = [order.index(c) for c in frame.columns]
    assert_close(other.diagnostics.correlation[np.ix_(position, position)],
                 base.diagnostics.correlation, rtol=1e-12)


@PROPERTY_SETTINGS
@given(frame=frames, column=st.integers(0, 5), shift=st.floats(-1e3, 1e3),
       scale=st.floats(1e-3, 1e3), negate=st.booleans())
def test_invariant_to_shift_and_rescale(frame: pd.DataFrame, column: int, shift: float,
                                        scale: float, negate: bool) -> None:
    name = frame.columns[column % frame.shape[1]]
    moved = frame.copy()
    moved[name] = (frame[name] + shift * frame[name].std()) * (-scale if negate else scale)
    base, other = check(frame), check(moved)
    assert_close(other.diagnostics.vif, base.diagnostics.vif)
    # Standardised condition indices centre the columns: shift- and scale-invariant.
    standardized = {"limits": {"condition_number": {"scaling": "standardized"}}}
    assert_close(check(moved, **standardized).diagnostics.condition.indices,
                 check(frame, **standardized).diagnostics.condition.indices)
    # r is accurate to about eps absolute (not relative: r near 0 is fine to 1e-16 only).
    np.testing.assert_allclose(np.abs(other.diagnostics.correlation),
                               np.abs(base.diagnostics.correlation), rtol=0, atol=1e-12)


@PROPERTY_SETTINGS
@given(frame=frames, column=st.integers(0, 5), scale=st.floats(1e-3, 1e3))
def test_unit_length_condition_indices_invariant_to_rescaling(frame: pd.DataFrame, column: int,
                                                              scale: float) -> None:
    # Belsley, Kuh & Welsch (1980): unit-length scaling removes the columns' units (not their
    # means, so no shift invariance with the intercept).
    name = frame.columns[column % frame.shape[1]]
    scaled = frame.assign(**{name: frame[name] * scale})
    assert_close(check(scaled).diagnostics.condition.indices,
                 check(frame).diagnostics.condition.indices)


@PROPERTY_SETTINGS
@given(frame=frames, chunk_rows=st.integers(1, 90))
def test_chunked_check_agrees_with_whole_table(frame: pd.DataFrame, chunk_rows: int) -> None:
    whole, chunked = check(frame), check(frame, chunk_rows=chunk_rows)
    a, b = whole.diagnostics, chunked.diagnostics
    assert_close(b.vif, a.vif)
    assert_close(b.means, a.means)
    assert_close(b.scales, a.scales)
    assert_close(b.condition.indices, a.condition.indices)
    np.testing.assert_allclose(b.correlation, a.correlation, rtol=0, atol=1e-12)
    assert b.rank == a.rank


@PROPERTY_SETTINGS
@given(seed=st.integers(0, 2**32 - 1), rows=st.integers(6, 60), chunk_rows=st.integers(1, 60))
def test_chunked_check_agrees_on_exact_dependencies(seed: int, rows: int, chunk_rows: int
                                                    ) -> None:
    # Invented: total_kwh = heating_kwh + lighting_kwh exactly; the exact pass runs chunked too.
    rng = np.random.default_rng(seed)
    heating = rng.integers(0, 50, rows).astype(float)
    lighting = rng.integers(0, 50, rows).astype(float)
    frame = pd.DataFrame({"heating_kwh": heating, "lighting_kwh": lighting,
                          "total_kwh": heating + lighting,
                          "outdoor_c": rng.normal(10, 5, rows)})
    assume(np.linalg.matrix_rank(np.column_stack([np.ones(rows), heating, lighting,
                                                  frame["outdoor_c"]])) == 4)
    whole, chunked = check(frame), check(frame, chunk_rows=chunk_rows)
    a, b = whole.diagnostics, chunked.diagnostics
    assert a.rank == b.rank == 4
    # The relations are canonical (fixed by column order), so even their wording agrees.
    assert [(sorted(d.terms), d.expressed, d.kind) for d in a.dependencies] == \
        [(sorted(d.terms), d.expressed, d.kind) for d in b.dependencies]
    assert [d.expressed for d in a.dependencies] == [2]  # total_kwh = heating + lighting
    for da, db in zip(a.dependencies, b.dependencies):
        assert_close([db.terms[k] for k in sorted(db.terms)],
                     [da.terms[k] for k in sorted(da.terms)], rtol=1e-9)
    assert_close(b.vif[3], a.vif[3])


# --- the accumulators themselves ------------------------------------------------------------

def _split(rows: int, rng: np.random.Generator) -> list[tuple[int, int]]:
    cuts = sorted(set(rng.integers(0, rows + 1, rng.integers(0, 8)).tolist()) | {0, rows})
    return list(itertools.pairwise(cuts))


def _merge_randomly(parts: list[Any], rng: np.random.Generator) -> Any:
    """Merge in a random tree: pick two neighbours or any two, merge, repeat."""
    items = list(parts)
    while len(items) > 1:
        i, j = sorted(rng.choice(len(items), 2, replace=False).tolist())
        first, second = (items[i], items[j]) if rng.random() < 0.5 else (items[j], items[i])
        merged = first.merge(second)
        items = [x for k, x in enumerate(items) if k not in (i, j)] + [merged]
    return items[0]


@PROPERTY_SETTINGS
@given(seed=st.integers(0, 2**32 - 1), rows=st.integers(2, 80), features=st.integers(1, 6),
       weighted=st.booleans())
def test_centred_gram_merges_in_any_order(seed: int, rows: int, features: int,
                                          weighted: bool) -> None:
    rng = np.random.default_rng(seed)
    values = rng.normal(size=(rows, features)) * rng.uniform(0.1, 100, features) \
        + rng.uniform(-1e3, 1e3, features)
    weights = rng.uniform(0.0, 3.0, rows) if weighted else None
    whole = CentredGram.from_block(values, weights)
    parts = [CentredGram.from_block(values[a:b], None if weights is None else weights[a:b])
             for a, b in _split(rows, rng)]
    merged = _merge_randomly(parts, rng)
    assert merged.rows == whole.rows
    assert merged.weight_sum == pytest.approx(whole.weight_sum, rel=1e-13)
    assert_close(merged.mean, whole.mean)
    scale = np.sqrt(np.outer(np.diag(whole.comoment), np.diag(whole.comoment)))
    np.testing.assert_array_less(np.abs(merged.comoment - whole.comoment), RTOL * scale + 1e-300)


@PROPERTY_SETTINGS
@given(seed=st.integers(0, 2**32 - 1), rows=st.integers(2, 80), features=st.integers(1, 6),
       weighted=st.booleans(), powers=st.lists(st.integers(-1000, 1000), min_size=6,
                                               max_size=6))
def test_centred_gram_is_exact_under_power_of_two_scaling(seed: int, rows: int, features: int,
                                                          weighted: bool, powers: list[int]
                                                          ) -> None:
    # Scaling column j by 2**k_j is exact in binary, so the accumulated statistics of the
    # scaled block, read back in units of 2**k_j, equal the unscaled block's (to rounding),
    # even where squares of the scaled values (2**+-2000) lie far outside float64, and for any
    # split of the rows into chunks merged in any order.
    rng = np.random.default_rng(seed)
    values = rng.normal(size=(rows, features)) * rng.uniform(0.1, 100, features) \
        + rng.uniform(-1e3, 1e3, features)
    weights = rng.uniform(0.0, 3.0, rows) if weighted else None
    k = np.asarray(powers[:features])
    plain = CentredGram.from_block(values, weights)
    scaled_rows = values * np.ldexp(1.0, k)
    merged = _merge_randomly([CentredGram.from_block(
        scaled_rows[a:b], None if weights is None else weights[a:b])
        for a, b in _split(rows, rng)], rng)
    shift = merged.exponent - k
    assert_close(np.ldexp(merged.scaled_mean, shift), plain.mean)
    back = np.ldexp(merged.scaled_comoment, shift[:, None] + shift[None, :])
    scale = np.sqrt(np.outer(np.diag(plain.comoment), np.diag(plain.comoment)))
    np.testing.assert_array_less(np.abs(back - plain.comoment), RTOL * scale + 1e-300)


@PROPERTY_SETTINGS
@given(seed=st.integers(0, 2**32 - 1), rows=st.integers(1, 80), features=st.integers(1, 6))
def test_triangular_factor_merge_agrees_with_one_qr(seed: int, rows: int, features: int
                                                    ) -> None:
    # TSQR (Demmel, Grigori, Hoemmen & Langou 2012): R'R = A'A whatever the split; with a
    # non-negative diagonal the factor is unique when A has full column rank.
    rng = np.random.default_rng(seed)
    block = rng.normal(size=(rows, features)) * rng.uniform(0.1, 10, features)
    whole = TriangularFactor.from_block(block)
    merged = _merge_randomly([TriangularFactor.from_block(block[a:b])
                              for a, b in _split(rows, rng)], rng)
    gram = block.T @ block
    scale = np.sqrt(np.outer(np.diag(gram), np.diag(gram)))
    for factor in (whole, merged):
        r = factor.square()
        assert r.shape == (features, features)
        assert np.all(np.diag(r) >= 0)
        assert np.allclose(np.tril(r, -1), 0.0)
        np.testing.assert_array_less(np.abs(r.T @ r - gram), RTOL * scale + 1e-300)
    if rows >= features:
        r_a, r_b = merged.square(), whole.square()
        np.testing.assert_allclose(r_a, r_b, rtol=0, atol=1e-9 * np.abs(r_b).max())


def structured_frame(seed: int, rows: int, base: int, derived: int) -> pd.DataFrame:
    """Invented meter table with exact structure: derived columns are small-integer combinations
    (plus a constant) of earlier columns; some are copies, some constants; columns shuffled."""
    rng = np.random.default_rng(seed)
    columns: dict[str, np.ndarray] = {
        f"meter_{k}": rng.normal(size=rows) * rng.uniform(0.5, 50) + rng.uniform(-100, 100)
        for k in range(base)}
    for k in range(derived):
        names = list(columns)
        kind = rng.integers(0, 3)
        if kind == 0:  # copy, possibly scaled and shifted
            source = columns[names[rng.integers(len(names))]]
            columns[f"derived_{k}"] = source * float(rng.choice([1, -1, 2, 0.5])) \
                + float(rng.integers(-3, 4))
        elif kind == 1:  # constant
            columns[f"derived_{k}"] = np.full(rows, float(rng.integers(-5, 5)))
        else:  # sum of a few earlier columns
            picked = rng.choice(len(names), size=min(len(names), int(rng.integers(2, 4))),
                                replace=False)
            columns[f"derived_{k}"] = sum(float(rng.integers(1, 4)) * columns[names[i]]
                                          for i in picked) + float(rng.integers(-3, 4))
    frame = pd.DataFrame(columns)
    return frame[list(rng.permutation(frame.columns))]


@PROPERTY_SETTINGS
@given(seed=st.integers(0, 2**32 - 1), rows=st.integers(3, 60), base=st.integers(1, 5),
       derived=st.integers(0, 4), chunk_rows=st.integers(1, 60))
def test_exact_structure_is_found_and_stable(seed: int, rows: int, base: int, derived: int,
                                             chunk_rows: int) -> None:
    # References: numpy.linalg.matrix_rank of [1, X]; each relation must hold on the rows.
    frame = structured_frame(seed, rows, base, derived)
    x = frame.to_numpy()
    with_intercept = np.column_stack([np.ones(rows), x])
    whole = check(frame)
    d = whole.diagnostics
    assert d.rank == np.linalg.matrix_rank(with_intercept)
    assert len(d.dependencies) == with_intercept.shape[1] - d.rank
    scale = np.abs(x).max(axis=0) + 1.0
    for dep in d.dependencies:
        a = np.zeros(x.shape[1])
        for k, coef in dep.terms.items():
            a[k] = coef
        residual = np.abs(x @ a - dep.constant).max() / (np.abs(a) * scale).sum()
        assert residual < 1e-9, (dep, residual)
        assert dep.terms[dep.expressed] > 0
    involved = {k for dep in d.dependencies for k in dep.terms}
    assert set(np.flatnonzero(np.isinf(d.vif)).tolist()) == involved
    chunked = check(frame, chunk_rows=chunk_rows).diagnostics
    assert [(sorted(dep.terms), dep.expressed, dep.kind) for dep in chunked.dependencies] == \
        [(sorted(dep.terms), dep.expressed, dep.kind) for dep in d.dependencies]
    finite = np.isfinite(d.vif)
    assert_close(chunked.vif[finite], d.vif[finite], rtol=1e-8)


@PROPERTY_SETTINGS
@given(frame=frames, weight_seed=st.integers(0, 2**32 - 1))
def test_integer_weights_equal_repeated_rows(frame: pd.DataFrame, weight_seed: int) -> None:
    # Weighted moments with integer weights are the moments of the rows repeated that often.
    weights = np.random.default_rng(weight_seed).integers(0, 4, len(frame))
    assume(np.count_nonzero(weights) > frame.shape[1] + 1)
    weighted = check(frame.assign(row_weight=weights.astype(float)),
                     columns={"weight": "row_weight"}).diagnostics
    repeated = check(frame.loc[frame.index.repeat(weights)].reset_index(drop=True)).diagnostics
    assert weighted.rank == repeated.rank
    assert_close(weighted.vif, repeated.vif, rtol=1e-9)
    assert_close(weighted.condition.indices, repeated.condition.indices, rtol=1e-9)
    assert weighted.rows == int(np.count_nonzero(weights))


def _factor_with_spread(seed: int, order: int, log_condition: float) -> np.ndarray:
    """Upper factor of a (2 order + 3) x order matrix whose singular values are spread at
    random between 1 and 10^-log_condition, both ends included (invented, seeded)."""
    rng = np.random.default_rng(seed)
    left, _ = np.linalg.qr(rng.normal(size=(2 * order + 3, order)))
    right, _ = np.linalg.qr(rng.normal(size=(order, order)))
    mu = 10.0 ** rng.uniform(-log_condition, 0.0, order)
    mu[0], mu[-1] = 1.0, 10.0 ** -log_condition
    return np.asarray(np.linalg.qr((left * mu) @ right.T, mode="r"))


@PROPERTY_SETTINGS
@given(seed=st.integers(0, 2**32 - 1), order=st.integers(1, 40),
       log_condition=st.floats(0.0, 2.0))
def test_eigen_route_agrees_with_the_svd(seed: int, order: int, log_condition: float) -> None:
    """While the condition number is at most 100, ``kernels.spectrum`` reads singular values and
    right vectors off the eigen-decomposition of r'r; they must agree with numpy's SVD of r
    (itself accurate to about eps * condition) to 1e-11 in the indices and, wherever the
    singular values are apart (vectors are defined), in the proportions."""
    from gate.numerics.kernels import EIGEN_ROUTE_CONDITION, belsley_kuh_welsch, spectrum

    r = _factor_with_spread(seed, order, log_condition)
    found = spectrum(r, vectors=True)
    _, expected_mu, vt = np.linalg.svd(r)
    condition = expected_mu[0] / expected_mu[-1]
    if condition < EIGEN_ROUTE_CONDITION * (1 - 1e-9):  # the limit itself may go either way
        assert found.method == "eigh"
    elif condition > EIGEN_ROUTE_CONDITION * (1 + 1e-9):
        assert found.method == "svd"
    np.testing.assert_allclose(found.mu, expected_mu, rtol=1e-11, atol=0)
    indices, proportions = belsley_kuh_welsch(r)
    gaps = np.abs(np.subtract.outer(expected_mu, expected_mu)) + np.eye(order)
    assume(gaps.min() > 1e-3 * expected_mu[0])  # vectors of near-equal values are not defined
    phi = (vt.T / expected_mu) ** 2
    reference = (phi / phi.sum(axis=1, keepdims=True)).T  # mu descending: indices ascending
    np.testing.assert_allclose(indices, expected_mu[0] / expected_mu, rtol=1e-11)
    np.testing.assert_allclose(proportions, reference, rtol=0, atol=1e-10)


@PROPERTY_SETTINGS
@given(seed=st.integers(0, 2**32 - 1), order=st.integers(2, 40),
       log_condition=st.floats(0.0, 2.5), above=st.floats(1.0, 400.0),
       at_least=st.integers(0, 8))
def test_top_rows_agree_with_every_row(seed: int, order: int, log_condition: float,
                                       above: float, at_least: int) -> None:
    """``belsley_kuh_welsch_top`` gives every index, and the proportions of every index over
    ``above`` and of at least the ``at_least`` largest, equal to :func:`belsley_kuh_welsch`'s
    (itself checked against mpmath); rows before ``first`` are NaN, never stale numbers. Over
    the eigen route's limit (condition up to 10^2.5 here) it hands over and returns every
    row."""
    from gate.numerics.kernels import (
        EIGEN_ROUTE_CONDITION,
        belsley_kuh_welsch,
        belsley_kuh_welsch_top,
        rows_wanted,
    )

    r = _factor_with_spread(seed, order, log_condition)
    indices, proportions = belsley_kuh_welsch(r)
    top = belsley_kuh_welsch_top(r, above=above, at_least=at_least, min_order=1)
    np.testing.assert_allclose(top.indices, indices, rtol=1e-11)
    wanted = rows_wanted(top.indices, above, at_least)
    condition = float(indices[-1])
    if top.first:  # the tridiagonal route served: only below the limit, for few rows
        assert condition <= EIGEN_ROUTE_CONDITION * (1 + 1e-9) and 2 * wanted <= order
        assert top.first == order - wanted
    elif condition < EIGEN_ROUTE_CONDITION * (1 - 1e-9) and 0 < 2 * wanted <= order:
        raise AssertionError("the tridiagonal route should have served")
    assert np.isnan(top.proportions[:top.first]).all()
    assert not np.isnan(top.proportions[top.first:]).any()
    # Vectors of near-equal singular values are not defined: compare where they are apart.
    sv = np.sort(top.indices[0] / top.indices)[::-1]
    gaps = np.abs(np.subtract.outer(sv, sv)) + np.eye(order)
    assume(gaps.min() > 1e-3 * sv[0])
    np.testing.assert_allclose(top.proportions[top.first:], proportions[top.first:], rtol=0,
                               atol=1e-10)


@PROPERTY_SETTINGS
@given(seed=st.integers(0, 2**32 - 1), p=st.integers(1, 25), log_offset=st.floats(-3.0, 3.0),
       scaling=st.sampled_from(["unit_length", "standardized"]))
def test_proportion_denominators_from_the_kept_inverse(seed: int, p: int, log_offset: float,
                                                       scaling: str) -> None:
    """``inverse_cross_product_diagonal`` (O(k^2), from inv(R) of the kept columns) equals the
    squared row norms of the inverse of ``scaled_design_factor``'s r (what it replaces), for
    any subset of the columns in any order, columns far from or near zero."""
    from gate.numerics.kernels import (
        _upper_inverse,
        inverse_cross_product_diagonal,
        scaled_design_factor,
        squared_row_norms,
    )

    rng = np.random.default_rng(seed)
    rows = 3 * p + 5
    x = rng.normal(size=(rows, p)) * 10.0 ** rng.uniform(-2, 2, p) \
        + 10.0 ** log_offset * rng.normal(size=p)
    means = x.mean(axis=0)
    scales = np.linalg.norm(x - means, axis=0)
    kept = rng.permutation(p)[:rng.integers(1, p + 1)]
    r_kept = np.linalg.qr((x - means)[:, kept] / scales[kept], mode="r")
    r_kept = r_kept * np.where(np.diag(r_kept) < 0, -1.0, 1.0)[:, None]
    factor, _ = scaled_design_factor(float(rows), means, kept, r_kept, scales, scaling)
    expected = squared_row_norms(_upper_inverse(factor))
    found = inverse_cross_product_diagonal(float(rows), means, kept, r_kept,
                                           _upper_inverse(r_kept), scales, scaling)
    np.testing.assert_allclose(found, expected, rtol=1e-9)
