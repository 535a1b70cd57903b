"""The contract of fit() and Fit: serialisation, conversion, intervals, options and bad input.

Interval and covariance references come from statsmodels OLS (an independent, widely used
implementation of the same textbook formulas), not from our own code.
"""

from __future__ import annotations

import dataclasses
import json
import math
import struct
from typing import Any

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shared import (
    FAMILIES,
    BadInput,
    Fit,
    TooFewPoints,
    UnknownFamily,
    fit,
    fit_many,
)
from tests.shared.fitcompare import INVERSE_OFFSET, assert_fits_agree
from tests.shared.synthetic import (
    DISTANCES_MM,
    peaked_counts,
    rangefinder_counts,
    rangefinder_points,
)

REL = 1e-9
PROPERTY = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])


# -- helpers -----------------------------------------------------------------------------------
def _bits(x: float) -> bytes:
    return struct.pack("<d", x)


def assert_same_fit(a: Fit, b: Fit) -> None:
    """Every field equal; arrays and floats bit for bit (dtype and shape included)."""
    for f in dataclasses.fields(Fit):
        x, y = getattr(a, f.name), getattr(b, f.name)
        if isinstance(x, np.ndarray):
            assert isinstance(y, np.ndarray), f.name
            assert (x.dtype, x.shape) == (y.dtype, y.shape), f.name
            assert x.tobytes() == y.tobytes(), f.name
        elif isinstance(x, float):
            assert type(y) is float and _bits(x) == _bits(y), f.name
        elif f.name == "params":
            assert list(x) == list(y), f.name  # same names, same order
            assert [_bits(v) for v in x.values()] == [_bits(v) for v in y.values()], f.name
        elif f.name == "valid_range":
            assert [_bits(v) for v in x] == [_bits(v) for v in y], f.name
        else:
            assert type(x) is type(y) and x == y, f.name


def json_round_trip(f: Fit) -> Fit:
    return Fit.from_dict(json.loads(json.dumps(f.to_dict())))


def _readings(rng: np.random.Generator, n: int, lo: float, span: float) -> np.ndarray:
    """n well-spread distinct readings over exactly [lo, lo + span], in shuffled order."""
    grid = np.linspace(0.0, 1.0, n)
    grid[1:-1] += rng.uniform(-0.3, 0.3, n - 2) / (n - 1)
    return rng.permutation(lo + span * grid)


@st.composite
def well_posed(draw: st.DrawFn) -> tuple[str, dict[str, Any], np.ndarray, np.ndarray]:
    """(family, options, reading, value): enough distinct, spread points, modest noise."""
    family = draw(st.sampled_from(["line", "polynomial", "inverse_offset"]))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    options: dict[str, Any] = {}
    if family == "line":
        options["through_zero"] = draw(st.booleans())
        n_params = 1 if options["through_zero"] else 2
    elif family == "polynomial":
        options["degree"] = draw(st.integers(2, 4))
        n_params = options["degree"] + 1
    else:
        n_params = 3
    n = draw(st.integers(n_params + 2, 30))
    lo = draw(st.floats(-1e3, 1e3))
    span = draw(st.floats(1e-1, 1e4))
    r = _readings(rng, n, lo, span)
    if family == "inverse_offset":
        k = draw(st.floats(1e2, 1e6)) * draw(st.sampled_from([-1.0, 1.0]))
        gap = draw(st.floats(0.05, 3.0)) * span  # r_min + r0: the pole lies this far below r_min
        r0 = gap - lo
        v0 = draw(st.floats(-1e3, 1e3))
        truth: np.ndarray = k / (r + r0) + v0
    else:
        coef = [draw(st.floats(-1e2, 1e2)) for _ in range(n_params)]
        x = (r - lo) / span  # coefficients of a well-scaled polynomial in x
        if options.get("through_zero"):
            truth = coef[0] * r
        else:
            truth = np.polynomial.polynomial.polyval(x, coef)
    scale = float(np.ptp(truth)) or 1.0
    noise = draw(st.floats(1e-6, 1e-3)) * scale
    return family, options, r, truth + rng.normal(0.0, noise, n)


# -- JSON round trip ---------------------------------------------------------------------------
@PROPERTY
@given(data=well_posed(), given_u=st.booleans(), drop=st.integers(0, 10**6), why=st.text())
def test_json_round_trip_is_exact(
    data: tuple[str, dict[str, Any], np.ndarray, np.ndarray], given_u: bool, drop: int, why: str
) -> None:
    family, options, r, v = data
    u_value = np.full(r.size, 0.5) if given_u else None
    original = fit(family, r, v, u_value=u_value, exclude={drop % r.size: why}, **options)
    rebuilt = json_round_trip(original)
    assert_same_fit(original, rebuilt)
    probe = np.linspace(*original.valid_range, 7)
    assert original.to_value(probe).tobytes() == rebuilt.to_value(probe).tobytes()
    a, b = original.value_interval(probe), rebuilt.value_interval(probe)
    assert a.lower.tobytes() == b.lower.tobytes() and a.upper.tobytes() == b.upper.tobytes()


def test_json_round_trip_keeps_fold_back_exclusions() -> None:
    rng = np.random.default_rng(3)
    distances = np.r_[20.0, 30.0, 40.0, 60.0, 80.0, DISTANCES_MM]
    counts = peaked_counts(distances) + rng.normal(0, 0.5, distances.size)
    original = fit("inverse_offset", counts, distances, exclude={9: "operator: target slipped"})
    reasons = dict(original.excluded)
    assert "fold-back" in reasons[0] and "fold-back" in reasons[1]
    assert reasons[9] == "operator: target slipped"
    assert_same_fit(original, json_round_trip(original))


# -- conversion --------------------------------------------------------------------------------
def test_to_value_nan_outside_valid_range_and_formula_when_extrapolating() -> None:
    r = np.array([10.0, 20.0, 30.0, 40.0, 50.0])
    v = 1.5 + 0.25 * r + np.array([0.01, -0.02, 0.0, 0.02, -0.01])
    f = fit("line", r, v)
    assert f.valid_range == (10.0, 50.0)
    probe = np.array([9.999, 10.0, 33.0, 50.0, 50.001, -1e6])
    formula = f.params["c0"] + f.params["c1"] * probe
    got = f.to_value(probe)
    assert np.isnan(got[[0, 4, 5]]).all()
    np.testing.assert_allclose(got[[1, 2, 3]], formula[[1, 2, 3]], rtol=1e-15)
    np.testing.assert_allclose(f.to_value(probe, extrapolate=True), formula, rtol=1e-15)
    assert f.in_range(probe).tolist() == [False, True, True, True, False, False]


def test_to_value_polynomial_and_inverse_offset_follow_their_formulas() -> None:
    rng = np.random.default_rng(11)
    r = np.linspace(-2.0, 3.0, 12)
    p = fit("polynomial", r, 1 - 2 * r + 0.5 * r**3 + rng.normal(0, 1e-3, r.size), degree=3)
    probe = np.array([-5.0, -2.0, 0.7, 3.0, 8.0])
    c = [p.params[f"c{k}"] for k in range(4)]
    expect = c[0] + c[1] * probe + c[2] * probe**2 + c[3] * probe**3
    np.testing.assert_allclose(p.to_value(probe, extrapolate=True), expect, rtol=1e-12)
    assert np.isnan(p.to_value(probe)[[0, 4]]).all()

    counts, mm = rangefinder_points(rng, rangefinder_counts(DISTANCES_MM), 0.5)
    q = fit("inverse_offset", counts, mm)
    probe = np.array([100.0, 200.0, 300.0, 600.0])
    expect = q.params["k"] / (probe + q.params["r0"]) + q.params["v0"]
    np.testing.assert_allclose(q.to_value(probe, extrapolate=True), expect, rtol=1e-14)
    assert q.in_range(probe).tolist() == [False, True, True, False]
    assert np.isnan(q.to_value(probe)[[0, 3]]).all()


# -- intervals and covariance against statsmodels ----------------------------------------------
@pytest.fixture(scope="module")
def noisy_line() -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(20240501)
    r = np.linspace(100.0, 900.0, 14)
    return r, 25.0 + 0.08 * r + rng.normal(0.0, 0.4, r.size)


PROBE = np.array([0.0, 100.0, 333.3, 500.0, 900.0, 1500.0])  # inside and outside the range


def test_line_intervals_equal_statsmodels(noisy_line: tuple[np.ndarray, np.ndarray]) -> None:
    r, v = noisy_line
    f = fit("line", r, v)
    res = sm.OLS(v, sm.add_constant(r)).fit()
    frame = res.get_prediction(sm.add_constant(PROBE, has_constant="add")).summary_frame(alpha=0.05)
    band, pred = f.curve_band(PROBE), f.value_interval(PROBE)
    # reference: statsmodels OLS get_prediction(...).summary_frame(alpha=0.05)
    np.testing.assert_allclose(band.value, frame["mean"], rtol=REL)
    np.testing.assert_allclose(band.u, frame["mean_se"], rtol=REL)
    np.testing.assert_allclose(band.lower, frame["mean_ci_lower"], rtol=REL)
    np.testing.assert_allclose(band.upper, frame["mean_ci_upper"], rtol=REL)
    np.testing.assert_allclose(pred.lower, frame["obs_ci_lower"], rtol=REL)
    np.testing.assert_allclose(pred.upper, frame["obs_ci_upper"], rtol=REL)
    assert pred.in_range.tolist() == [False, True, True, True, True, False]


def test_line_covariance_and_rse_equal_statsmodels(
    noisy_line: tuple[np.ndarray, np.ndarray],
) -> None:
    r, v = noisy_line
    f = fit("line", r, v)
    res = sm.OLS(v, sm.add_constant(r)).fit()
    # reference: statsmodels OLS cov_params(), params, bse, scale (residual variance), df_resid
    np.testing.assert_allclose(f.covariance, res.cov_params(), rtol=REL)
    np.testing.assert_allclose(list(f.params.values()), res.params, rtol=REL)
    np.testing.assert_allclose(list(f.stderr.values()), res.bse, rtol=REL)
    assert f.rse == pytest.approx(math.sqrt(res.scale), rel=REL)
    assert f.dof == res.df_resid
    assert f.noise_value_sd == f.rse == f.scale and f.noise_reading_sd == 0.0
    assert f.sigma_source == "residuals" and f.noise == "value"


def test_level_none_uses_k_equal_two(noisy_line: tuple[np.ndarray, np.ndarray]) -> None:
    r, v = noisy_line
    f = fit("line", r, v)
    band = f.curve_band(PROBE, level=None)
    assert band.k == 2.0
    assert np.array_equal(band.upper, band.value + 2.0 * band.u)
    assert np.array_equal(band.lower, band.value - 2.0 * band.u)


def test_through_zero_line_matches_statsmodels_without_constant(
    noisy_line: tuple[np.ndarray, np.ndarray],
) -> None:
    r, _ = noisy_line
    v = 0.08 * r + np.random.default_rng(5).normal(0.0, 0.4, r.size)
    f = fit("line", r, v, through_zero=True)
    assert f.param_names == ("c1",)
    res = sm.OLS(v, r[:, None]).fit()
    # reference: statsmodels OLS with no constant column
    assert f.params["c1"] == pytest.approx(res.params[0], rel=REL)
    assert f.stderr["c1"] == pytest.approx(res.bse[0], rel=REL)
    np.testing.assert_allclose(f.covariance, res.cov_params(), rtol=REL)
    assert f.rse == pytest.approx(math.sqrt(res.scale), rel=REL)
    assert f.dof == r.size - 1 == res.df_resid
    frame = res.get_prediction(PROBE[:, None]).summary_frame(alpha=0.05)
    pred = f.value_interval(PROBE[1:])  # at r = 0 the through-zero band has zero width
    np.testing.assert_allclose(pred.lower, frame["obs_ci_lower"][1:], rtol=REL)
    np.testing.assert_allclose(pred.upper, frame["obs_ci_upper"][1:], rtol=REL)
    assert f.to_value(0.0, extrapolate=True) == 0.0


def test_given_uncertainty_makes_covariance_absolute() -> None:
    r = np.linspace(0.0, 10.0, 11)
    v = 3.0 + 2.0 * r + np.random.default_rng(8).normal(0.0, 0.1, r.size)
    f = fit("line", r, v, u_value=0.1)
    res = sm.WLS(v, sm.add_constant(r), weights=np.full(r.size, 100.0)).fit()
    assert f.sigma_source == "given" and f.noise_value_sd == pytest.approx(0.1, rel=1e-15)
    # reference: statsmodels WLS normalized_cov_params = (X^T W X)^-1, not rescaled
    np.testing.assert_allclose(f.covariance, res.normalized_cov_params, rtol=REL)


# -- fit_many ----------------------------------------------------------------------------------
def test_fit_many_equals_fit_one_by_one() -> None:
    rng = np.random.default_rng(9)
    units = [rangefinder_points(rng, rangefinder_counts(DISTANCES_MM), 0.5) for _ in range(4)]
    many = fit_many("inverse_offset", units)
    assert len(many) == 4
    for got, (r, v) in zip(many, units, strict=True):
        # the batched solver lands on the same minimum to rounding (see tests/shared/test_batch.py)
        assert_fits_agree(got, fit("inverse_offset", r, v), INVERSE_OFFSET)


# -- unknown names -----------------------------------------------------------------------------
def test_unknown_family_lists_the_catalog() -> None:
    with pytest.raises(UnknownFamily) as err:
        fit("quartic_spline", [1, 2, 3, 4], [1, 2, 3, 4])
    message = str(err.value)
    assert "quartic_spline" in message
    assert {"line", "polynomial", "inverse_offset"} <= set(FAMILIES)
    for name in FAMILIES:
        assert name in message
    assert isinstance(err.value, BadInput)


def test_fit_many_checks_family_and_options_even_without_units() -> None:
    with pytest.raises(UnknownFamily, match="line"):
        fit_many("quartic_spline", [])
    with pytest.raises(BadInput, match="degree"):
        fit_many("line", [], degree=2)


@pytest.mark.parametrize(
    ("family", "option", "allowed"),
    [
        ("line", "degree", ["through_zero"]),
        ("polynomial", "order", ["degree", "through_zero"]),
        ("inverse_offset", "through_zero", ["none"]),
    ],
)
def test_unknown_option_lists_the_allowed_ones(
    family: str, option: str, allowed: list[str]
) -> None:
    r = np.linspace(1.0, 10.0, 8)
    unknown: dict[str, Any] = {option: 2}
    with pytest.raises(BadInput) as err:
        fit(family, r, 100.0 / r, **unknown)
    message = str(err.value)
    assert option in message
    for name in allowed:
        assert name in message


@pytest.mark.parametrize("degree", [1, 11, 2.0, True, "3"])
def test_bad_polynomial_degree_is_bad_input(degree: object) -> None:
    with pytest.raises(BadInput, match="degree"):
        fit("polynomial", np.arange(20.0), np.arange(20.0) ** 2, degree=degree)


# -- bad input ---------------------------------------------------------------------------------
def _n_params(family: str, options: dict[str, Any]) -> int:
    return len(FAMILIES[family].param_names(FAMILIES[family].check_options(options)))


@PROPERTY
@given(
    data=well_posed(),
    where=st.sampled_from(["reading", "value"]),
    bad=st.sampled_from([math.nan, math.inf, -math.inf]),
    at=st.integers(0, 10**6),
)
def test_non_finite_points_are_bad_input(
    data: tuple[str, dict[str, Any], np.ndarray, np.ndarray], where: str, bad: float, at: int
) -> None:
    family, options, r, v = data
    r, v = r.copy(), v.copy()
    (r if where == "reading" else v)[at % r.size] = bad
    with pytest.raises(BadInput, match="finite"):
        fit(family, r, v, **options)


@PROPERTY
@given(data=well_posed(), cut=st.integers(1, 5), side=st.sampled_from(["reading", "value"]))
def test_mismatched_lengths_are_bad_input(
    data: tuple[str, dict[str, Any], np.ndarray, np.ndarray], cut: int, side: str
) -> None:
    family, options, r, v = data
    if side == "reading":
        r = r[:-cut]
    else:
        v = v[:-cut]
    with pytest.raises(BadInput, match="entries"):
        fit(family, r, v, **options)


@PROPERTY
@given(data=well_posed(), keep=st.integers(0, 10))
def test_too_few_points_raise(
    data: tuple[str, dict[str, Any], np.ndarray, np.ndarray], keep: int
) -> None:
    family, options, r, v = data
    n = keep % (_n_params(family, options) + 1)  # 0 .. parameters: one short of the minimum
    with pytest.raises(TooFewPoints, match="needs at least"):
        fit(family, r[:n], v[:n], **options)


@PROPERTY
@given(data=well_posed(), level=st.floats(-1e6, 1e6))
def test_constant_readings_are_bad_input(
    data: tuple[str, dict[str, Any], np.ndarray, np.ndarray], level: float
) -> None:
    family, options, r, v = data
    with pytest.raises(BadInput, match="equal"):
        fit(family, np.full(r.size, level), v, **options)


def test_excluding_too_many_points_raises_too_few_points() -> None:
    r = np.arange(5.0)
    with pytest.raises(TooFewPoints):
        fit("line", r, 2 * r, exclude={0: "a", 1: "b", 2: "c"})


@pytest.mark.parametrize(
    "reading",
    [["1", "2", "x", "4"], [1.0, 2.0, None, 4.0], [[1.0, 2.0], [3.0]]],
    ids=["text", "none", "ragged"],
)
def test_unparseable_readings_are_bad_input(reading: list[Any]) -> None:
    with pytest.raises(BadInput):
        fit("line", reading, [1.0, 2.0, 3.0, 4.0])


@pytest.mark.parametrize("u_value", [0.0, -0.1, math.nan, math.inf, [0.1, 0.1, 0.0, 0.1, 0.1]])
def test_non_positive_u_value_is_bad_input(u_value: Any) -> None:
    r = np.arange(5.0)
    with pytest.raises(BadInput, match="u_value"):
        fit("line", r, 2 * r + 1, u_value=u_value)


@pytest.mark.parametrize("index", [-1, 5, 99])
def test_excluding_a_missing_point_is_bad_input(index: int) -> None:
    r = np.arange(5.0)
    with pytest.raises(BadInput, match="does not exist"):
        fit("line", r, 2 * r + 1, exclude={index: "typo"})


def test_relative_weights_scale_the_covariance_by_the_residuals() -> None:
    # reference: statsmodels WLS (weights 1/u^2), whose covariance is scaled by the residual
    # variance, and scipy curve_fit with absolute_sigma=False
    rng = np.random.default_rng(21)
    r = np.linspace(0.0, 10.0, 15)
    u = 0.05 * (1.0 + r)  # noise grows with the reading
    v = 3.0 + 2.0 * r + rng.normal(0.0, 1.7 * u)  # true sd = 1.7 u: only ratios are known
    f = fit("line", r, v, u_value=u, relative=True)
    res = sm.WLS(v, sm.add_constant(r), weights=1.0 / u**2).fit()
    assert f.sigma_source == "residuals"
    np.testing.assert_allclose(list(f.params.values()), res.params, rtol=REL)
    np.testing.assert_allclose(f.covariance, res.cov_params(), rtol=REL)
    assert f.scale == pytest.approx(math.sqrt(res.scale), rel=REL)
    absolute = fit("line", r, v, u_value=u)
    np.testing.assert_allclose(f.covariance, absolute.covariance * f.scale**2, rtol=REL)
    with pytest.raises(BadInput, match="relative"):
        fit("line", r, v, relative=True)
