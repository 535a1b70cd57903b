"""power_offset: value = a * (r + r0)^b, with r + r0 > 0 over the readings. A generalised
inverse law (infrared rangefinders: b near -1), or a power law whose zero is offset.

Parameters: a (value units per (reading units)^b), r0 (reading units), b (dimensionless).

Two parameters, r0 and b, enter non-linearly and a linearly, so the fit is a variable projection
over (r0, b): for each trial pair a is solved exactly. Write d = r_min + r0 > 0 (the distance of
the pole r = -r0 below the lowest reading). A coarse grid of log-spaced d (1e-5 to 1e3 reading
spans) times, for each d, trial exponents around the straight-line fit of log|value| against
log(r + r0) (+-16 e-folds of (r + r0)^b across the readings) finds the basin; Levenberg–Marquardt
on the projected residual in (log d, b) refines it, and a final polish of (a, r0, b) with the
analytic Jacobian gives the estimate the covariance is taken at. Working in log d keeps
r + r0 > 0 throughout the search; the polish is kept only when it does too. A best d beyond
either end of the grid is a limit of the family, not an estimate, and raises SingularFit: below
it the pole sits on the lowest reading; above it r0 runs to infinity, where the curve cannot be
told from an exponential or a straight line.
"""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

import numpy as np
from scipy.optimize import least_squares

from shared.errors import BadInput, SingularFit
from shared.families.base import (
    Array,
    Options,
    Solution,
    check_known_options,
    unscaled_covariance,
)

D_SCAN = np.logspace(-5.0, 3.0, 81)  # (r_min + r0) / (r_max - r_min)
B_SCAN = np.linspace(-16.0, 16.0, 65)  # (b - b_loglog) * ln((r_max + r0) / (r_min + r0))
R0_AT_INFINITY = (
    "power_offset: the points do not determine r0 (it runs to infinity, where the curve is "
    "indistinguishable from an exponential or a straight line)"
)


class PowerOffset:
    """value = a (r + r0)^b."""

    name = "power_offset"
    formula = "value = a · (r + r0)^b   (r + r0 > 0)"
    typical = "generalised inverse law (IR rangefinder)"
    options: Mapping[str, Any] = MappingProxyType({})
    foldback = True

    def check_options(self, options: Options) -> dict[str, Any]:
        return check_known_options(self.name, options, self.options)

    def param_names(self, options: Options) -> tuple[str, ...]:
        return ("a", "r0", "b")

    def evaluate(self, params: Array, reading: Array, options: Options) -> Array:
        """a (r + r0)^b; NaN where r + r0 <= 0, outside the family's domain."""
        a, r0, b = params
        inside = reading + r0 > 0
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            out: Array = np.where(inside, a * np.where(inside, reading + r0, 1.0) ** b, np.nan)
        return out

    def jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        """[(r + r0)^b, a b (r + r0)^(b-1), a (r + r0)^b ln(r + r0)]; NaN rows off the domain."""
        a, r0, b = params
        inside = reading + r0 > 0
        s = np.where(inside, reading + r0, 1.0)
        with np.errstate(over="ignore", invalid="ignore"):
            sb = s**b
            jac = np.stack([sb, a * b * sb / s, a * sb * np.log(s)], axis=-1)
        return np.where(inside[..., None], jac, np.nan)

    def slope(self, params: Array, reading: Array, options: Options) -> Array:
        """d value / d r = a b (r + r0)^(b-1); NaN where r + r0 <= 0."""
        a, r0, b = params
        inside = reading + r0 > 0
        s = np.where(inside, reading + r0, 1.0)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            out: Array = np.where(inside, a * b * s ** (b - 1.0), np.nan)
        return out

    def solve(self, reading: Array, value: Array, weight: Array, options: Options) -> Solution:
        r_min = float(reading.min())
        span = float(np.ptp(reading))
        if span == 0:
            raise BadInput("power_offset: all readings are equal: the curve cannot be determined")
        sw = np.sqrt(weight)
        above = reading - r_min  # r + r0 = above + d

        def basis(log_d: Array, b: Array) -> tuple[Array, Array]:
            """(r + r0)^b / (r_c + r0)^b for trials of matching shape (..., n), and log(r_c + r0).

            r_c is the reading at the weighted mean of log(r + r0), so the basis stays near 1.
            """
            log_s = np.log(above + np.exp(log_d)[..., None])
            log_c = (log_s @ weight) / weight.sum()
            return np.exp(b[..., None] * (log_s - log_c[..., None])), log_c

        def projected(log_d: Array, b: Array) -> tuple[Array, Array]:
            """Weighted residuals and a for trials (log d, b) of matching shape, closed form."""
            with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
                x, log_c = basis(log_d, b)
                a_c = ((x * value) @ weight) / ((x * x) @ weight)
                resid = (value - a_c[..., None] * x) * sw
                return resid, a_c * np.exp(-b * log_c)

        # coarse grid: for each d, exponents around the log-log slope at that d
        log_d = np.log(D_SCAN * span)
        log_s = np.log(above[None, :] + np.exp(log_d)[:, None])
        e_folds = np.ptp(log_s, axis=1)
        nz = value != 0
        if np.count_nonzero(nz) >= 2:
            ly, wz = np.log(np.abs(value[nz])), weight[nz]
            dx = log_s[:, nz] - ((log_s[:, nz] @ wz) / wz.sum())[:, None]
            slope = ((dx * wz) @ ly) / ((dx * dx) @ wz)
            slope = np.where(np.isfinite(slope), slope, 0.0)
        else:
            slope = np.zeros_like(log_d)
        grid_b = slope[:, None] + B_SCAN[None, :] / e_folds[:, None]
        grid_d = np.broadcast_to(log_d[:, None], grid_b.shape)
        resid_grid = projected(grid_d, grid_b)[0]
        costs = np.einsum("ijk,ijk->ij", resid_grid, resid_grid)
        costs = np.where(np.isfinite(costs), costs, np.inf)
        i, j = np.unravel_index(int(np.argmin(costs)), costs.shape)
        if not np.isfinite(costs[i, j]):
            raise SingularFit("power_offset: no finite fit exists for these points")
        if i == log_d.size - 1:
            raise SingularFit(R0_AT_INFINITY)

        # refine in (log d, b) on the projected problem, then polish every parameter
        def projected_resid(q: Array) -> Array:
            resid = projected(np.array([q[0]]), np.array([q[1]]))[0][0]
            return np.where(np.isfinite(resid), resid, 1e150)

        refined = least_squares(
            projected_resid,
            np.array([log_d[i], grid_b[i, j]]),
            method="lm",
            x_scale=np.array([1.0, 1.0 / e_folds[i]]),
            xtol=1e-14,
            ftol=1e-14,
            gtol=1e-14,
        )
        q = refined.x if refined.cost <= 0.5 * costs[i, j] else np.array([log_d[i], grid_b[i, j]])
        if q[0] > log_d[-1]:
            raise SingularFit(R0_AT_INFINITY)
        if q[0] < log_d[0]:
            raise SingularFit(
                "power_offset: the best fit puts the pole r = -r0 at the lowest reading "
                f"({r_min:.6g}); the points do not determine r0 there"
            )
        a_start = float(projected(np.array([q[0]]), np.array([q[1]]))[1][0])
        if not np.isfinite(a_start):  # (r + r0)^b overflows: b and r0 ran off together
            raise SingularFit(R0_AT_INFINITY)
        start = np.array([a_start, float(np.exp(q[0])) - r_min, float(q[1])])

        def resid(p: Array) -> Array:
            with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
                out: Array = (self.evaluate(p, reading, options) - value) * sw
            return np.where(np.isfinite(out), out, 1e150)

        def jac(p: Array) -> Array:
            with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
                out = self.jacobian(p, reading, options) * sw[:, None]
            return np.where(np.isfinite(out), out, 0.0)

        polished = least_squares(
            resid, start, jac=jac, method="lm", x_scale="jac", xtol=1e-15, ftol=1e-15, gtol=1e-15
        )
        start_cost = 0.5 * float(resid(start) @ resid(start))
        inside = bool(np.all(reading + polished.x[1] > 0))
        params = polished.x if inside and polished.cost <= start_cost else start
        if not np.all(np.isfinite(params)) or params[0] == 0:
            raise SingularFit("power_offset: no finite, non-zero fit exists for these points")
        if np.any(reading + params[1] <= 0):
            raise SingularFit(
                "power_offset: the fitted pole r = -r0 lies at or inside the readings"
            )
        cov = unscaled_covariance(self.jacobian(params, reading, options), weight)
        return Solution(params=np.asarray(params, dtype=float), cov_unscaled=cov)


FAMILY = PowerOffset()
