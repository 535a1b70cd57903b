"""table: the model-free monotone piecewise-linear curve through the points.

The expected numbers are worked out here by hand from the definition (knots at the distinct
readings, values at the knots = the weighted mean of the values measured there, linear
interpolation between): group means with numpy, not with the engine. Points are invented.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pytest

from shared import FAMILIES, BadInput, Fit, TooFewPoints, fit
from tests.shared.test_fit_contract import assert_same_fit

TABLE = FAMILIES["table"]
# an invented potentiometer-like unit, points given in no particular order
READING = np.array([300.0, 100.0, 500.0, 200.0, 400.0, 700.0])
VALUE = np.array([2.9, 1.0, 5.2, 2.1, 3.6, 9.0])
ORDER = np.argsort(READING)


def json_round_trip(f: Fit) -> Fit:
    return Fit.from_dict(json.loads(json.dumps(f.to_dict())))


# -- through the points ------------------------------------------------------------------------
def test_table_passes_through_unrepeated_points_with_stated_uncertainty() -> None:
    f = fit("table", READING, VALUE, u_value=0.05)
    assert f.options == {"knots": READING[ORDER].tolist()}
    assert f.param_names == tuple(f"v{k}" for k in range(READING.size))
    np.testing.assert_allclose(list(f.params.values()), VALUE[ORDER], rtol=1e-14)
    np.testing.assert_allclose(f.to_value(READING), VALUE, rtol=1e-14)
    # linear between knots: halfway from (100, 1.0) to (200, 2.1), a quarter from 500 to 700
    np.testing.assert_allclose(f.to_value([150.0, 550.0]), [1.55, 6.15], rtol=1e-14)
    assert f.to_value(150.0)[()] == pytest.approx(1.55, rel=1e-14)  # a scalar reading
    assert np.isnan(f.to_value([99.0, 701.0])).all()  # outside the span: not a calibrated value
    # dof 0: nothing left to estimate a scatter from, so rse and scale are 0 by definition and
    # the covariance is the given one: each knot value is one reading's value, u = 0.05
    assert f.dof == 0 and f.rse == 0.0 and f.scale == 0.0
    assert f.sigma_source == "given" and f.noise_value_sd == pytest.approx(0.05, rel=1e-15)
    np.testing.assert_allclose(f.covariance, 0.05**2 * np.eye(READING.size), rtol=1e-12, atol=0)
    assert f.valid_range == (100.0, 700.0) and f.monotone
    # a new reading between knots: the curve's u (interpolated) plus one observation's 0.05
    iv = f.value_interval(150.0)
    assert iv.u[0] == pytest.approx(np.sqrt(0.5**2 * 0.05**2 * 2 + 0.05**2), rel=1e-12)


def test_falling_table_is_monotone_too() -> None:
    f = fit("table", READING, -VALUE, u_value=0.05)
    np.testing.assert_allclose(list(f.params.values()), -VALUE[ORDER], rtol=1e-14)
    assert f.monotone


def test_table_with_reading_uncertainty_only() -> None:
    f = fit("table", READING, VALUE, u_reading=1.0)
    assert f.sigma_source == "given" and f.noise == "reading" and f.dof == 0
    np.testing.assert_allclose(list(f.params.values()), VALUE[ORDER], rtol=1e-12)


def test_unrepeated_points_without_uncertainty_are_too_few() -> None:
    with pytest.raises(TooFewPoints) as err:
        fit("table", READING, VALUE)
    message = str(err.value)
    assert "table passes through its points" in message
    assert "repeat some readings" in message and "u_value" in message


# -- repeats -----------------------------------------------------------------------------------
def test_repeats_are_averaged_and_their_scatter_gives_the_covariance() -> None:
    rng = np.random.default_rng(31)
    counts = np.array([3, 2, 3, 2, 4, 2])  # repeats per reading, in READING's order
    r = np.repeat(READING, counts)
    v = np.repeat(VALUE, counts) + rng.normal(0.0, 0.03, r.size)
    f = fit("table", r, v)
    knots = np.unique(r)
    means = np.array([v[r == k].mean() for k in knots])
    n_k = np.array([np.sum(r == k) for k in knots])
    within = sum(float(np.sum((v[r == k] - v[r == k].mean()) ** 2)) for k in knots)
    dof = r.size - knots.size
    pooled = np.sqrt(within / dof)  # pooled within-reading standard deviation
    assert f.dof == dof and f.sigma_source == "residuals"
    np.testing.assert_allclose(list(f.params.values()), means, rtol=1e-13)
    assert f.rse == pytest.approx(pooled, rel=1e-12) and f.scale == pytest.approx(pooled, rel=1e-12)
    np.testing.assert_allclose(f.covariance, np.diag(pooled**2 / n_k), rtol=1e-10, atol=1e-18)
    assert f.monotone
    back = json_round_trip(f)
    assert_same_fit(f, back)


def test_one_repeat_is_enough_for_a_residual_based_fit() -> None:
    r, v = np.r_[READING, 300.0], np.r_[VALUE, 3.1]
    f = fit("table", r, v)
    assert f.dof == 1 and f.params["v2"] == pytest.approx(3.0, rel=1e-14)
    assert f.rse == pytest.approx(np.sqrt(0.1**2 + 0.1**2), rel=1e-12)


# -- monotone or nothing -----------------------------------------------------------------------
def test_non_monotone_points_are_bad_input_naming_the_readings() -> None:
    v = VALUE.copy()
    v[READING == 300.0] = 1.9  # 2.1 at r = 200, then 1.9 at r = 300: the rise turns back
    with pytest.raises(BadInput, match=r"not monotone.*r = 200 -> 1\.9 at r = 300.*monotone"):
        fit("table", READING, v, u_value=0.05)


def test_repeats_whose_mean_turns_back_are_bad_input() -> None:
    r = np.r_[READING, 400.0, 400.0]
    v = np.r_[VALUE, 2.0, 1.0]  # at r = 400 the mean falls to 2.2, below 2.9 at r = 300
    with pytest.raises(BadInput, match=r"at r = 300 -> 2\.2 at r = 400"):
        fit("table", r, v)


# -- knots in the options ----------------------------------------------------------------------
def test_json_round_trip_is_exact_and_keeps_the_knots() -> None:
    f = fit("table", READING * 1.1, VALUE * 0.3, u_value=0.01)  # knots that are not round
    back = json_round_trip(f)
    assert_same_fit(f, back)
    assert back.options["knots"] == sorted((READING * 1.1).tolist())
    probe = np.linspace(*f.valid_range, 13)
    assert back.to_value(probe).tobytes() == f.to_value(probe).tobytes()
    a, b = f.value_interval(probe), back.value_interval(probe)
    assert a.lower.tobytes() == b.lower.tobytes() and a.upper.tobytes() == b.upper.tobytes()


def test_knots_come_from_the_used_points_only() -> None:
    f = fit("table", READING, VALUE, u_value=0.05, exclude={4: "probe slipped"})
    assert f.options["knots"] == [100.0, 200.0, 300.0, 500.0, 700.0]
    assert f.residuals[4] == pytest.approx(3.6 - (2.9 + 5.2) / 2, rel=1e-14)


def test_refit_with_the_fits_own_options_and_wrong_knots() -> None:
    f = fit("table", READING, VALUE, u_value=0.05)
    again = fit("table", READING, VALUE, u_value=0.05, **f.options)
    assert_same_fit(f, again)
    with pytest.raises(BadInput, match="knots given"):
        fit("table", READING, VALUE, u_value=0.05, knots=[100.0, 700.0])


@pytest.mark.parametrize(
    "knots", ["100,200", [100.0, 100.0], [200.0, 100.0], [1.0, float("nan")], [True, 2.0], 5.0]
)
def test_bad_knots_are_bad_input(knots: Any) -> None:
    with pytest.raises(BadInput, match="knots must be"):
        fit("table", READING, VALUE, u_value=0.05, knots=knots)


# -- derivatives -------------------------------------------------------------------------------
def test_jacobian_is_the_hat_basis_and_slope_the_segment_slope() -> None:
    f = fit("table", READING, VALUE, u_value=0.05)
    p, opts = np.array(list(f.params.values())), f.options
    r = np.array([100.0, 130.0, 200.0, 260.0, 650.0, 700.0])
    jac = TABLE.jacobian(p, r, opts)
    for k in range(p.size):
        step = np.zeros(p.size)
        step[k] = 1e-3
        num = (TABLE.evaluate(p + step, r, opts) - TABLE.evaluate(p - step, r, opts)) / 2e-3
        np.testing.assert_allclose(jac[:, k], num, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(jac.sum(axis=1), 1.0, rtol=1e-15)  # a partition of unity
    # segment slopes: 1.1/100 (100..200), 0.8/100 (200..300), 1.9/100 (500..700)
    slope = TABLE.slope(p, r, opts)
    # at an inner knot (200) the mean of the two segments, as a central difference gives
    np.testing.assert_allclose(slope, [0.011, 0.011, 0.0095, 0.008, 0.019, 0.019], rtol=1e-12)
