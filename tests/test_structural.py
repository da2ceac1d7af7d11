"""Structural collinearity: squares and products, and the VIF after centring the parents.

Closed form (derived here, checked against mpmath quadrature): for x ~ Uniform(a, b) with
mu = (a + b) / 2 and h = (b - a) / 2, write x = mu + h u with u ~ Uniform(-1, 1). Then
Cov(x, x^2) = 2 mu h^2 / 3, Var x = h^2 / 3, Var x^2 = 4 mu^2 h^2 / 3 + 4 h^4 / 45, so
r^2 = mu^2 / (mu^2 + h^2 / 15) and VIF(x) = VIF(x^2) = 1 / (1 - r^2) = 1 + 15 mu^2 / h^2.
After centring, Cov(x, (x - mu)^2) = h^3 E[u^3] = 0 (u is symmetric), so the VIF is 1: centring
lowers it by exactly 15 mu^2 / h^2.
"""

from __future__ import annotations

import json

import mpmath
import numpy as np
import pandas as pd
import pytest

from gate.api import check
from gate.artefacts.verdict_json import verdict_json

SEED = 20261202
LOW, HIGH = 1.0, 3.0  # wind speed in m/s: positive-valued, so x and x^2 move together


def closed_form_vif(a: float, b: float) -> float:
    mu, h = (a + b) / 2, (b - a) / 2
    return 1.0 + 15.0 * mu**2 / h**2


def mpmath_vif(a: float, b: float) -> float:
    """Reference: moments of Uniform(a, b) by 50-digit quadrature, VIF = 1 / (1 - r^2)."""
    mpmath.mp.dps = 50
    width = mpmath.mpf(b) - mpmath.mpf(a)

    def moment(k: int) -> mpmath.mpf:
        return mpmath.quad(lambda t: t**k, [a, b]) / width

    m1, m2, m3, m4 = (moment(k) for k in (1, 2, 3, 4))
    cov = m3 - m1 * m2
    r2 = cov**2 / ((m2 - m1**2) * (m4 - m2**2))
    return float(1 / (1 - r2))


@pytest.mark.parametrize(("a", "b"), [(1.0, 3.0), (0.5, 4.0), (10.0, 11.0)])
def test_closed_form_matches_mpmath(a: float, b: float) -> None:
    assert closed_form_vif(a, b) == pytest.approx(mpmath_vif(a, b), rel=1e-12)


@pytest.fixture(scope="module")
def wind_frame() -> pd.DataFrame:
    rng = np.random.default_rng(SEED)
    rows = 200_000
    wind = rng.uniform(LOW, HIGH, rows)
    return pd.DataFrame({"wind_ms": wind, "wind_ms_sq": wind**2,
                         "humidity_pct": rng.normal(65, 12, rows)})


def test_square_found_and_centring_removes_the_expected_vif(wind_frame: pd.DataFrame) -> None:
    verdict = check(wind_frame)
    expected = closed_form_vif(LOW, HIGH)  # 61
    vif = verdict.vif()
    # sampling error of the VIF at n = 200,000 is well under 2% (about 0.3% observed)
    assert vif["wind_ms"] == pytest.approx(expected, rel=0.02)
    assert vif["wind_ms_sq"] == pytest.approx(expected, rel=0.02)
    assert verdict.status == "fail"

    [term] = verdict.structural
    names = verdict.features
    assert term.kind == "square"
    assert names[term.feature] == "wind_ms_sq" and [names[p] for p in term.parents] == ["wind_ms"]
    assert term.correlation == pytest.approx(1.0, abs=1e-12)
    assert term.vif_centred is not None
    assert term.vif_centred == pytest.approx(1.0, abs=1e-3)  # population value: exactly 1
    assert term.vif - term.vif_centred == pytest.approx(expected - 1.0, rel=0.02)
    assert term.parent_vif_centred[0] == pytest.approx(1.0, abs=1e-3)

    # the centred VIF (computed from the Gram, no second pass) equals the VIF of an explicitly
    # centred column run through the whole gate
    mean = float(wind_frame["wind_ms"].mean())
    explicit = wind_frame.assign(wind_ms_sq=(wind_frame["wind_ms"] - mean) ** 2)
    assert check(explicit).vif()["wind_ms_sq"] == pytest.approx(term.vif_centred, rel=1e-8)

    notes = [f for f in verdict.findings if f.rule == "structural"]
    assert len(notes) == 1 and notes[0].level == "info"
    assert "square of wind_ms" in notes[0].message and "Centring wind_ms" in notes[0].message
    document = json.loads(verdict_json(verdict))
    [entry] = document["diagnostics"]["structural"]
    assert entry["feature"] == "wind_ms_sq" and entry["kind"] == "square"
    assert entry["vif_centred"] == pytest.approx(term.vif_centred)


def test_product_found_with_exact_centred_vif() -> None:
    rng = np.random.default_rng(SEED + 1)
    rows = 20_000
    hours = rng.uniform(2, 8, rows)
    docks = rng.uniform(10, 30, rows)
    frame = pd.DataFrame({"open_hours": hours, "docks_total": docks,
                          "dock_hours": 0.5 * hours * docks + 3.0,
                          "temp_c": rng.normal(12, 6, rows)})
    verdict = check(frame)
    [term] = verdict.structural
    names = verdict.features
    assert term.kind == "product" and names[term.feature] == "dock_hours"
    assert {names[p] for p in term.parents} == {"open_hours", "docks_total"}
    assert term.slope == pytest.approx(0.5, rel=1e-9)
    assert term.intercept == pytest.approx(3.0, rel=1e-6)
    centred = 0.5 * (hours - hours.mean()) * (docks - docks.mean()) + 3.0
    reference = check(frame.assign(dock_hours=centred)).vif()["dock_hours"]
    assert term.vif_centred == pytest.approx(reference, rel=1e-8)
    assert term.vif_centred is not None and term.vif_centred < term.vif / 5


def test_linear_near_duplicate_is_not_called_a_square() -> None:
    rng = np.random.default_rng(SEED + 2)
    rows = 5_000
    temp = rng.uniform(100.0, 101.0, rows)  # narrow range: x^2 is almost linear in x
    frame = pd.DataFrame({"temp_k": temp, "temp_k_copy": temp + rng.normal(0, 0.01, rows),
                          "wind_ms": rng.uniform(0, 10, rows)})
    verdict = check(frame)
    assert verdict.status == "fail"
    assert verdict.structural == ()


def test_no_breach_means_no_extra_read(clean_frame: pd.DataFrame,
                                       monkeypatch: pytest.MonkeyPatch) -> None:
    import gate.diagnose.structural

    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("the sample must not be read when no VIF breaches")

    monkeypatch.setattr(gate.diagnose.structural, "read_sample", refuse)
    verdict = check(clean_frame)
    assert verdict.structural == () and verdict.status != "fail"


def test_effective_rows_and_standard_error_growth(wind_frame: pd.DataFrame) -> None:
    verdict = check(wind_frame)
    document = json.loads(verdict_json(verdict))
    rows = verdict.diagnostics.rows
    for name, vif in verdict.vif().items():
        assert vif is not None
        assert document["diagnostics"]["effective_rows"][name] == pytest.approx(rows / vif)
        assert document["diagnostics"]["se_inflation"][name] == pytest.approx(np.sqrt(vif))
    message = next(f.message for f in verdict.findings
                   if f.rule == "vif" and f.features == ("wind_ms",))
    assert f"{rows / verdict.vif()['wind_ms']:,.0f} of the {rows:,} rows" in message


def test_linear_relation_at_a_large_offset_is_not_a_square() -> None:
    # Regression (issue 10, item 8): big_offset = 1e12 + c was reported as "close to the square
    # of big_offset". Its raw square is linear in c to ~24 digits, and the uncentred linear fit
    # lost the relation to rounding; centred, the square adds nothing to the linear fit.
    rng = np.random.default_rng(SEED + 3)
    rows = 5_000
    c = rng.normal(0.0, 1_000.0, rows)  # spread wide enough that 1e12 + c is not constant
    frame = pd.DataFrame({"c": c, "big_offset": 1e12 + c, "z": rng.normal(size=rows)})
    verdict = check(frame)
    assert verdict.status == "fail"  # the linear dependency itself is found
    assert any(f.rule == "rank_deficiency" and "big_offset" in f.message
               for f in verdict.findings)
    assert verdict.structural == ()
    assert not any(f.rule == "structural" for f in verdict.findings)


def test_a_square_at_a_large_offset_is_still_found() -> None:
    # The other side of centring: a true square far from zero (x = 1e4 + u, u ~ U(0, 1)) is
    # still a square, with the exact closed form of the centred VIF (mpmath-checked above):
    # VIF = 1 + 15 mu^2 / h^2 for x ~ U(a, b).
    rng = np.random.default_rng(SEED + 4)
    rows = 50_000
    low, high = 10_000.0, 10_001.0
    x = rng.uniform(low, high, rows)
    frame = pd.DataFrame({"odometer_km": x, "odometer_km_sq": x**2,
                          "oil_temp_c": rng.normal(90, 5, rows)})
    verdict = check(frame)
    [term] = verdict.structural
    assert term.kind == "square" and term.computed
    assert verdict.features[term.feature] == "odometer_km_sq"
    assert term.vif_centred == pytest.approx(1.0, abs=1e-2)  # population value: exactly 1


def _radius_frame(measured: bool) -> pd.DataFrame:
    """Invented fleet data: brake-disc radius (cm) and the disc's area (cm^2), either computed
    from the radius in the pipeline or measured separately (scanner error sd 0.05 cm^2)."""
    rng = np.random.default_rng(SEED + 5)
    rows = 4_000
    radius = rng.uniform(LOW, HIGH, rows)
    area = np.pi * radius**2
    if measured:
        area = area + rng.normal(0.0, 0.05, rows)
    return pd.DataFrame({"disc_radius_cm": radius, "disc_area_cm2": area,
                         "pad_wear_pct": rng.normal(40, 10, rows)})


def test_computed_square_offers_centring() -> None:
    verdict = check(_radius_frame(measured=False))
    [term] = verdict.structural
    assert term.computed and term.vif_centred is not None
    assert term.max_residual <= 1e-6 * 9 * np.pi  # rounding only
    assert term.slope == pytest.approx(np.pi, rel=1e-9)
    message = next(f.message for f in verdict.findings if f.rule == "structural")
    assert "Centring disc_radius_cm before squaring" in message


def test_measured_square_does_not_offer_centring() -> None:
    verdict = check(_radius_frame(measured=True))
    [term] = verdict.structural  # still structural collinearity (r >= 0.999) ...
    assert term.kind == "square" and not term.computed
    assert term.correlation > 0.999
    assert term.vif_centred is None  # ... but centring is not a remedy for a measured area
    assert term.max_residual > 0.05  # the scanner error, far above rounding
    message = next(f.message for f in verdict.findings if f.rule == "structural")
    assert "not computed from it" in message and "Centring" not in message
