"""Uncertainty of converted values against published worked examples.

The data and their sources are in tests/data/uncertainty_examples.json.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from shared import Fit, fit

DATA = json.loads((Path(__file__).parents[1] / "data" / "uncertainty_examples.json").read_text())


def test_iso_ts_28037_example_5_inverse_of_a_line_with_reading_noise() -> None:
    # Source: ISO/TS 28037:2010 example 5 (see the JSON file). The stimulus x is our reference
    # value, the response y our reading; noise in the reading = the standard's y-on-x regression,
    # inverted for a new response y0.
    ex = DATA["iso_ts_28037_example_5"]
    f = fit("line", ex["y_response"], ex["x_reference"], noise="reading")
    # value = c0 + c1 r is the inverse of y = a + b x: c1 = 1/b, c0 = -a/b
    assert f.params["c1"] == pytest.approx(1 / ex["b"], rel=1e-7)
    assert f.params["c0"] == pytest.approx(-ex["a"] / ex["b"], rel=1e-6)
    assert f.scale**2 * f.dof == pytest.approx(ex["rss"], rel=1e-7)
    band = f.value_interval(ex["inverse_y0"], level=0.95)
    assert band.value[0] == pytest.approx(ex["inverse_x0"], abs=1e-6)
    assert band.u[0] == pytest.approx(ex["inverse_u_x0"], abs=1e-6)
    assert (band.upper - band.value)[0] == pytest.approx(ex["inverse_half_width_95"], abs=1e-4)
    curve = f.curve_band(ex["inverse_y0"])
    assert curve.u[0] == pytest.approx(ex["inverse_u_x0_without_new_reading"], abs=1e-6)


def test_iso_ts_28037_example_1_known_reading_uncertainty() -> None:
    # Source: ISO/TS 28037:2010 example 1, weighted least squares with u(y) = 0.5 known.
    ex = DATA["iso_ts_28037_example_1"]
    f = fit("line", ex["y_response"], ex["x_reference"], u_reading=ex["u_y"])
    assert f.sigma_source == "given"
    assert f.scale**2 * f.dof == pytest.approx(ex["chi_squared"], rel=1e-7)
    band = f.value_interval(ex["inverse_y1"], level=None)
    assert band.value[0] == pytest.approx(ex["inverse_x1"], rel=1e-7)
    assert band.u[0] == pytest.approx(ex["inverse_u_x1"], rel=1e-6)


def test_gum_h3_correlated_parameters_propagate_into_the_curve() -> None:
    # Source: GUM (JCGM 100:2008) Annex H.3. Our line is b = c0 + c1 t, so y1 = c0 + 20 c1.
    ex = DATA["gum_h3"]
    f = fit("line", ex["t_reading"], ex["b_correction"])
    assert f.rse == pytest.approx(ex["s"], abs=5e-9)  # published to 8 decimals
    band = f.curve_band(30.0, level=None)
    assert band.value[0] == pytest.approx(ex["b_at_30"], rel=1e-7)
    assert band.u[0] == pytest.approx(ex["u_b_at_30"], rel=1e-5)
    # the stated y1 at t0 = 20 degC and its uncertainty come out of the same covariance
    at_t0 = f.curve_band(ex["t0"], level=None)
    assert at_t0.value[0] == pytest.approx(ex["y1"], rel=1e-6)
    assert at_t0.u[0] == pytest.approx(ex["u_y1"], rel=1e-5)
    assert f.stderr["c1"] == pytest.approx(ex["u_y2"], rel=1e-5)


def test_nist_handbook_line_width_propagation_of_error() -> None:
    # Source: NIST/SEMATECH e-Handbook 2.3.6.7.3. The handbook publishes the fit y = a + b x
    # (y = response, our reading) with its covariance, not the 40 points, so the check is on
    # propagation: a Fit carrying the published constants, re-expressed as value = (r - a) / b,
    # with the reading noise s_y, must give the published u(X') for a new response Y'.
    ex = DATA["nist_handbook_2_3_6_7_3"]
    a, b = ex["a"], ex["b"]
    cov_ab = np.array([[ex["var_a"], ex["cov_ab"]], [ex["cov_ab"], ex["var_b"]]])
    jac = np.array([[-1 / b, a / b**2], [0.0, -1 / b**2]])  # d(c0, c1) / d(a, b)
    published = fit("line", [0.0, 1.0, 2.0], [0.0, 1.0, 2.0]).to_dict()
    published.update(
        params={"c0": -a / b, "c1": 1 / b},
        covariance=(jac @ cov_ab @ jac.T).tolist(),
        dof=ex["dof"],
        noise="reading",
        noise_value_sd=0.0,
        noise_reading_sd=ex["s_y"],
        valid_range=[0.0, 12.0],
    )
    f = Fit.from_dict(published)
    for y_new, x_pub, u_pub in ex["checks"]:
        band = f.value_interval(y_new, level=None)
        assert band.value[0] == pytest.approx(x_pub, abs=1e-6)
        assert band.u[0] == pytest.approx(u_pub, abs=1e-6)
