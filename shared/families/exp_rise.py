"""exp_rise: value = a * (1 - exp(-b r)) [+ c]. Saturating sensors (first-order rise, adsorption).

Parameters: a, the rise from r = 0 to saturation (value units); b > 0, the rate (per reading
unit, 1/b is the reading at which 63 % of the rise is reached); with ``offset=True`` also c, the
value at r = 0 (value units).

Only b enters non-linearly, so it is found by variable projection: for each trial b the linear
parameters (a, and c) are solved exactly, and the residual sum of squares is minimised over b
alone. The scan of b is log-spaced over ten decades around 1 / span (b * span from 1e-5 to 1e5,
twenty trials a decade), which brackets the minimum of the one-dimensional problem even where
the full two-parameter problem is hard (NIST StRD BoxBOD); a bounded scalar search refines the
best cell and a Levenberg–Marquardt polish of every parameter with the analytic Jacobian gives
the estimate the covariance is taken at. A minimum at the small end of the scan means the points
show no saturation (a straight line fits them as well); at the large end, that the rise is
complete before the first reading (the points are flat).
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

SCAN = np.logspace(-5.0, 5.0, 201)  # b * (r_max - r_min)
HUGE = 1e300  # the cost of a trial whose basis overflows (readings far below 0)
FLAT = 1e-9  # 1 - exp(-b r) varying less than this (relative) over the readings: no rise seen
RISE_COMPLETE = (
    "exp_rise: the rise is complete before the first reading (the rate b runs to infinity); "
    "the points are flat"
)


class ExpRise:
    """value = a (1 - exp(-b r)) [+ c]."""

    name = "exp_rise"
    formula = "value = a · (1 − exp(−b·r))   (offset: + c)"
    typical = "saturating sensor"
    options: Mapping[str, Any] = MappingProxyType({"offset": False})
    foldback = False

    def check_options(self, options: Options) -> dict[str, Any]:
        opts = check_known_options(self.name, options, self.options)
        if not isinstance(opts["offset"], bool):
            raise BadInput("exp_rise: offset must be true or false")
        return opts

    def param_names(self, options: Options) -> tuple[str, ...]:
        return ("a", "b", "c") if options.get("offset", False) else ("a", "b")

    def evaluate(self, params: Array, reading: Array, options: Options) -> Array:
        out: Array = -params[0] * np.expm1(-params[1] * reading)
        if options.get("offset", False):
            out = out + params[2]
        return out

    def jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        a, b = params[0], params[1]
        cols = [-np.expm1(-b * reading), a * reading * np.exp(-b * reading)]
        if options.get("offset", False):
            cols.append(np.ones_like(reading))
        return np.stack(cols, axis=-1)

    def slope(self, params: Array, reading: Array, options: Options) -> Array:
        """d value / d r = a b exp(-b r)."""
        out: Array = params[0] * params[1] * np.exp(-params[1] * reading)
        return out

    def solve(self, reading: Array, value: Array, weight: Array, options: Options) -> Solution:
        offset = bool(options.get("offset", False))
        span = float(np.ptp(reading))
        if span == 0:
            raise BadInput("exp_rise: all readings are equal: the rate cannot be determined")
        w_total = float(weight.sum())
        v_mean = float(weight @ value) / w_total

        def projected(log_b: Array) -> tuple[Array, Array, Array]:
            """Cost, a and c (0 without offset) for each trial b = exp(log_b), closed form."""
            b = np.exp(np.atleast_1d(log_b))
            with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
                x = -np.expm1(-b[:, None] * reading)
                if offset:
                    x_mean = (x @ weight) / w_total
                    dx = x - x_mean[:, None]
                    sxx = (dx * dx) @ weight  # 0 where x is constant: a is then arbitrary
                    a = np.where(sxx > 0, ((dx * (value - v_mean)) @ weight) / sxx, 0.0)
                    c = v_mean - a * x_mean
                else:
                    a = ((x * value) @ weight) / ((x * x) @ weight)
                    c = np.zeros_like(a)
                resid = value - a[:, None] * x - c[:, None]
                cost = (resid * resid) @ weight
            return np.where(np.isfinite(cost), cost, HUGE), a, c

        logs = np.log(SCAN / span)
        costs = projected(logs)[0]
        best = int(np.argmin(costs))
        if costs[best] >= HUGE:
            raise SingularFit("exp_rise: no finite fit exists for these readings")
        if best == 0:
            raise SingularFit(
                "exp_rise: the points show no saturation (the rate b runs to 0); "
                "a straight line fits them as well"
            )
        if best == logs.size - 1:
            raise SingularFit(RISE_COMPLETE)
        found = minimize_scalar(
            lambda x: float(projected(np.array([x]))[0][0]),
            bounds=(logs[best - 1], logs[best + 1]),
            method="bounded",
            options={"xatol": 1e-12},
        )
        _, a_best, c_best = projected(np.array([found.x]))
        start = np.array([a_best[0], np.exp(found.x), c_best[0]][: 3 if offset else 2])

        polished = polish(self, start, reading, value, weight, options)
        params = polished if polished[1] > 0 else start
        rise = -np.expm1(-params[1] * reading)
        if np.ptp(rise) <= FLAT * np.abs(rise).max():
            raise SingularFit(RISE_COMPLETE)
        cov = unscaled_covariance(self.jacobian(params, reading, options), weight)
        return Solution(params=np.asarray(params, dtype=float), cov_unscaled=cov)


FAMILY = ExpRise()
