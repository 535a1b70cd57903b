"""inverse_offset: value = k / (r + r0) + v0. Infrared triangulation rangefinders.

Only r0 enters non-linearly, so it is found by variable projection: for each trial r0 the linear
parameters (k, v0) are solved exactly, and the residual sum of squares is minimised over r0 alone
(a log-spaced scan, then a bounded scalar search). A final Gauss–Newton polish of all three
parameters with the analytic Jacobian gives the estimate the covariance is taken at. The search
keeps r + r0 > 0 over the points, so the curve has no pole inside the calibrated range.
"""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

import numpy as np
from scipy.optimize import least_squares, minimize_scalar

from shared.errors import SingularFit
from shared.families.base import (
    Array,
    Options,
    Solution,
    check_known_options,
    unscaled_covariance,
)

SCAN = np.logspace(-4, 4, 81)  # (r_min + r0) as a multiple of the reading span


class InverseOffset:
    name = "inverse_offset"
    formula = "value = k / (r + r0) + v0"
    typical = "infrared rangefinder"
    options: Mapping[str, Any] = MappingProxyType({})
    foldback = True

    def check_options(self, options: Options) -> dict[str, Any]:
        return check_known_options(self.name, options, self.options)

    def param_names(self, options: Options) -> tuple[str, ...]:
        return ("k", "r0", "v0")

    def evaluate(self, params: Array, reading: Array, options: Options) -> Array:
        k, r0, v0 = params
        out: Array = k / (reading + r0) + v0
        return out

    def jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        k, r0, _ = params
        inv = 1.0 / (reading + r0)
        return np.stack([inv, -k * inv**2, np.ones_like(reading)], axis=-1)

    def slope(self, params: Array, reading: Array, options: Options) -> Array:
        """d value / d reading = -k / (r + r0)^2."""
        k, r0, _ = params
        inv = 1.0 / (np.asarray(reading, dtype=float) + r0)
        out: Array = -k * inv * inv
        return out

    def slope_jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        """d slope / d (k, r0, v0) = (-1/(r + r0)^2, 2k/(r + r0)^3, 0)."""
        k, r0, _ = params
        inv = 1.0 / (np.asarray(reading, dtype=float) + r0)
        return np.stack([-(inv**2), 2.0 * k * inv**3, np.zeros_like(inv)], axis=-1)

    def solve(self, reading: Array, value: Array, weight: Array, options: Options) -> Solution:
        r_min = float(reading.min())
        span = float(np.ptp(reading)) or abs(r_min) or 1.0
        sw = np.sqrt(weight)

        w_total = float(weight.sum())
        v_mean = float(weight @ value) / w_total
        dv = value - v_mean

        def projected(log_d: Array) -> tuple[Array, Array, Array]:
            """Cost, k, v0 for each trial (r_min + r0) = exp(log_d) * span, closed form."""
            r0 = np.exp(np.atleast_1d(log_d))[:, None] * span - r_min
            x = 1.0 / (reading + r0)
            dx = x - (x @ weight)[:, None] / w_total
            k = ((dx * dv) @ weight) / ((dx * dx) @ weight)
            resid = dv - k[:, None] * dx
            v0 = v_mean - k * (x @ weight) / w_total
            return (resid * resid) @ weight, k, v0

        logs = np.log(SCAN)
        costs = projected(logs)[0]
        best = int(np.argmin(costs))
        if best == len(logs) - 1:
            raise SingularFit(
                "inverse_offset: the points show no curvature (r0 runs to infinity); "
                "a line fits them as well"
            )
        lo, hi = logs[max(best - 1, 0)], logs[min(best + 1, len(logs) - 1)]
        found = minimize_scalar(
            lambda x: float(projected(x)[0][0]),
            bounds=(lo, hi),
            method="bounded",
            options={"xatol": 1e-10},
        )
        _, k_best, v0_best = projected(found.x)
        start = np.array([k_best[0], np.exp(found.x) * span - r_min, v0_best[0]])
        if not np.all(np.isfinite(start)):  # numbers so large that the start overflows
            raise SingularFit(
                "inverse_offset: no finite starting curve for these points (values or readings "
                "too large to fit in double precision)"
            )

        def resid(p: Array) -> Array:
            return (self.evaluate(p, reading, options) - value) * sw

        def jac(p: Array) -> Array:
            return self.jacobian(p, reading, options) * sw[:, None]

        polished = least_squares(
            resid, start, jac=jac, method="lm", x_scale="jac", xtol=1e-15, ftol=1e-15, gtol=1e-15
        )
        params = polished.x if polished.cost <= 0.5 * found.fun else start
        params = self._newton_finish(params, reading, value, weight)
        if np.any(reading + params[1] <= 0):
            raise SingularFit("inverse_offset: the fitted pole r = -r0 lies inside the readings")
        cov = unscaled_covariance(self.jacobian(params, reading, options), weight)
        return Solution(params=np.asarray(params, dtype=float), cov_unscaled=cov)

    def _newton_finish(self, params: Array, reading: Array, value: Array, weight: Array) -> Array:
        """A few full Newton steps (Hessian with the second-derivative term) from the LM result.

        Levenberg–Marquardt stops once it cannot see the cost fall; Newton lands on the minimum
        to rounding, which makes ``fit`` and the batched ``fit_many`` agree to ~1e-12.
        """
        p = np.asarray(params, dtype=float)
        cost = float(weight @ (self.evaluate(p, reading, {}) - value) ** 2)
        for _ in range(NEWTON_STEPS):
            k, r0, _ = p
            inv = 1.0 / (reading + r0)
            e = self.evaluate(p, reading, {}) - value
            jac = np.stack([inv, -k * inv**2, np.ones_like(reading)], axis=-1)
            gauss_newton = jac.T @ (jac * weight[:, None])
            we = weight * e
            # second derivatives of f: d2f/dk dr0 = -1/(r+r0)^2, d2f/dr0^2 = 2k/(r+r0)^3
            hess = gauss_newton.copy()
            hess[0, 1] += float(we @ (-(inv**2)))
            hess[1, 0] = hess[0, 1]
            hess[1, 1] += float(we @ (2.0 * k * inv**3))
            if np.min(np.linalg.eigvalsh(hess)) <= 0:  # not a minimum's curvature: Gauss-Newton
                hess = gauss_newton
            try:
                step = np.linalg.solve(hess, -(jac.T @ we))
            except np.linalg.LinAlgError:
                break
            trial = p + step
            if not np.all(np.isfinite(trial)) or np.any(reading + trial[1] <= 0):
                break
            trial_cost = float(weight @ (self.evaluate(trial, reading, {}) - value) ** 2)
            # near the minimum the cost changes below its rounding; only a clear rise rejects
            if trial_cost > cost * (1.0 + 1e-10):
                break
            p, cost = trial, min(cost, trial_cost)
            if np.max(np.abs(jac @ step)) <= 1e-13 * np.max(np.abs(value)):
                break
        return p


NEWTON_STEPS = 4
FAMILY = InverseOffset()
