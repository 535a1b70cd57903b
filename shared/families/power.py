"""power: value = a * r^b, readings r > 0. A power law (photoresistors, flow, rangefinders...).

Only the exponent b enters non-linearly, so it is found by variable projection: for each trial b
the factor a is solved exactly (a one-column weighted least squares), and the residual sum of
squares is minimised over b alone. The search starts from the straight-line fit of log|value|
against log r, scans b around it over +-24 e-folds of r^b across the readings (the scan step is
a quarter of an e-fold), and refines the best cell with a bounded scalar search. A final
Levenberg–Marquardt polish of (a, b) with the analytic Jacobian gives the estimate the covariance
is taken at. Inside the search the basis is r^b / r_c^b (r_c the geometric mean of the readings),
which keeps it far from overflow whatever the exponent.
"""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

import numpy as np
from scipy.optimize import minimize_scalar

from shared.errors import BadInput, SingularFit
from shared.families.base import (
    Array,
    Options,
    Solution,
    check_known_options,
    polish,
    unscaled_covariance,
)

SCAN = np.linspace(-24.0, 24.0, 193)  # (b - b_loglog) * ln(r_max / r_min)
HUGE = 1e300  # the cost of a trial whose basis overflows


def check_positive(family: str, reading: Array) -> None:
    """BadInput unless every reading is > 0."""
    bad = reading[reading <= 0]
    if bad.size:
        raise BadInput(
            f"{family}: every reading must be > 0 (r^b is not a real number for r <= 0); got "
            f"r = {', '.join(f'{r:.6g}' for r in bad[:10])}{' ...' if bad.size > 10 else ''}"
        )


def loglog_slope(log_r: Array, value: Array, weight: Array) -> float:
    """Slope of log|value| on log r (points with value 0 left out); 0 when it is undefined."""
    ok = value != 0
    if np.count_nonzero(ok) < 2 or np.ptp(log_r[ok]) == 0:
        return 0.0
    x, y, w = log_r[ok], np.log(np.abs(value[ok])), weight[ok]
    dx = x - (w @ x) / w.sum()
    return float((w * dx) @ y / ((w * dx) @ dx))


class Power:
    """value = a * r^b; a in value units per (reading units)^b, b dimensionless."""

    name = "power"
    formula = "value = a · r^b   (r > 0)"
    typical = "many: photoresistor, flow sensor, rangefinder"
    options: Mapping[str, Any] = MappingProxyType({})
    foldback = True

    def check_options(self, options: Options) -> dict[str, Any]:
        return check_known_options(self.name, options, self.options)

    def param_names(self, options: Options) -> tuple[str, ...]:
        return ("a", "b")

    def evaluate(self, params: Array, reading: Array, options: Options) -> Array:
        """a r^b; NaN for r <= 0, outside the family's domain."""
        a, b = params
        inside = reading > 0
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            out: Array = np.where(inside, a * np.where(inside, reading, 1.0) ** b, np.nan)
        return out

    def jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        """[r^b, a r^b ln r]; NaN rows for r <= 0."""
        a, b = params
        inside = reading > 0
        r = np.where(inside, reading, 1.0)
        with np.errstate(over="ignore", invalid="ignore"):
            rb = r**b
            jac = np.stack([rb, a * rb * np.log(r)], axis=-1)
        return np.where(inside[..., None], jac, np.nan)

    def slope(self, params: Array, reading: Array, options: Options) -> Array:
        """d value / d r = a b r^(b-1); NaN for r <= 0."""
        a, b = params
        inside = reading > 0
        r = np.where(inside, reading, 1.0)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            out: Array = np.where(inside, a * b * r ** (b - 1.0), np.nan)
        return out

    def solve(self, reading: Array, value: Array, weight: Array, options: Options) -> Solution:
        check_positive(self.name, reading)
        log_r = np.log(reading)
        log_c = float(log_r.mean())
        centred = log_r - log_c
        e_folds = float(np.ptp(log_r))
        if e_folds == 0:
            raise BadInput("power: all readings are equal: the exponent cannot be determined")

        def projected(b: Array) -> tuple[Array, Array]:
            """Cost and a_c (a = a_c / r_c^b) for each trial exponent, closed form."""
            with np.errstate(over="ignore", invalid="ignore"):
                x = np.exp(np.atleast_1d(b)[:, None] * centred)
                a_c = ((x * value) @ weight) / ((x * x) @ weight)
                resid = value - a_c[:, None] * x
                cost = (resid * resid) @ weight
            return np.where(np.isfinite(cost), cost, HUGE), a_c

        trials = loglog_slope(log_r, value, weight) + SCAN / e_folds
        costs = projected(trials)[0]
        best = int(np.argmin(costs))
        if costs[best] >= HUGE:
            raise SingularFit("power: no finite fit a * r^b exists for these points")
        lo, hi = trials[max(best - 1, 0)], trials[min(best + 1, trials.size - 1)]
        found = minimize_scalar(
            lambda b: float(projected(np.array([b]))[0][0]),
            bounds=(lo, hi),
            method="bounded",
            options={"xatol": 1e-12 / e_folds},
        )
        b_start = float(found.x)
        a_start = float(projected(np.array([b_start]))[1][0]) * float(np.exp(-b_start * log_c))
        start = np.array([a_start, b_start])

        params = polish(self, start, reading, value, weight, options)
        if not np.all(np.isfinite(params)) or params[0] == 0:
            raise SingularFit("power: no finite, non-zero fit a * r^b exists for these points")
        cov = unscaled_covariance(self.jacobian(params, reading, options), weight)
        return Solution(params=np.asarray(params, dtype=float), cov_unscaled=cov)


FAMILY = Power()
