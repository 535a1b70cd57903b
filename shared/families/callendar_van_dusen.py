"""callendar_van_dusen: R = R0 (1 + A t + B t^2 [+ C (t - 100) t^3 for t < 0]). Platinum RTDs.

The law of IEC 60751 states the reading R (ohm) as a function of the value t (degC, ITS-90):

    R(t) = R0 (1 + A t + B t^2)                     for t >= 0 degC
    R(t) = R0 (1 + A t + B t^2 + C (t - 100) t^3)   for t < 0 degC

Parameters R0 (ohm), A (1/degC), B (1/degC^2), C (1/degC^4); IEC 60751 gives A = 3.9083e-3,
B = -5.775e-7, C = -4.183e-12 for the standard curve. C acts only below 0 degC, so it is fitted
only when some used point lies below 0 degC: the option ``below_zero`` is ``"auto"`` (default;
fit() resolves it from the used points to True or False, which is what the Fit records), True
(fit C; then at least one point must be below 0 degC) or False (the quadratic law at every t, no C).

The family is fitted in its natural direction (``direction = "reading_from_value"``): R is
linear in (R0, R0 A, R0 B, R0 C), so the weighted least squares in reading space (weights as
given, reading-space) is solved in closed form, followed by one step of iterative refinement of
its residuals (the polish: for a problem linear in the coefficients it recovers the digits the
first QR solve loses to rounding). Values are converted from readings exactly: the root of the
quadratic for t >= 0 (written so that B = 0 and B -> 0 are exact too) and Newton's method on the
full law below 0 degC, started from the quadratic root (a few steps to machine precision).
``jacobian`` (d t / d params) and ``slope`` (d t / d R) follow by implicit differentiation.
"""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

import numpy as np

from shared.errors import BadInput, SingularFit
from shared.families.base import (
    Array,
    Options,
    Solution,
    check_known_options,
    unscaled_covariance,
    weighted_lstsq,
)

NEWTON_MAX_ITER = 50
NEWTON_RTOL = 1e-15  # relative step below which Newton has converged (plus an absolute 1e-12 degC)
BELOW_ZERO = ("auto", True, False)


def _has_c(params: Array) -> bool:
    return len(params) == 4


def _poly(params: Array, t: Array) -> tuple[Array, Array]:
    """(R / R0, d(R / R0) / dt) at temperatures t (degC)."""
    a, b = params[1], params[2]
    ratio = 1.0 + a * t + b * t**2
    deriv = a + 2.0 * b * t
    if _has_c(params):
        c = params[3]
        below = t < 0
        ratio = ratio + np.where(below, c * (t - 100.0) * t**3, 0.0)
        deriv = deriv + np.where(below, c * (4.0 * t**3 - 300.0 * t**2), 0.0)
    return ratio, deriv


class CallendarVanDusen:
    """R = R0 (1 + A t + B t^2 [+ C (t - 100) t^3 below 0 degC]); t in degC, R in ohm."""

    name = "callendar_van_dusen"
    formula = "R = R0·(1 + A·t + B·t² [+ C·(t − 100)·t³ for t < 0 °C])"
    typical = "platinum RTD (Pt100, Pt1000)"
    options: Mapping[str, Any] = MappingProxyType({"below_zero": "auto"})
    foldback = False
    direction = "reading_from_value"

    def check_options(self, options: Options) -> dict[str, Any]:
        opts = check_known_options(self.name, options, self.options)
        choice = opts["below_zero"]
        if not any(choice is ok or (isinstance(choice, str) and choice == ok) for ok in BELOW_ZERO):
            raise BadInput(
                f"callendar_van_dusen: below_zero must be 'auto', True or False, not {choice!r}"
            )
        return opts

    def bind_options(self, reading: Array, value: Array, options: Options) -> dict[str, Any]:
        """Resolve ``below_zero="auto"``: fit C iff some used point lies below 0 degC."""
        opts = dict(options)
        if opts["below_zero"] == "auto":
            opts["below_zero"] = bool(np.any(np.asarray(value) < 0))
        return opts

    def param_names(self, options: Options) -> tuple[str, ...]:
        """(R0, A, B, C), or (R0, A, B) when below_zero is False (unresolved "auto": all four)."""
        return ("R0", "A", "B") if options["below_zero"] is False else ("R0", "A", "B", "C")

    # -- the natural direction: reading from value ------------------------------------------------
    def reading_of(self, params: Array, value: Array, options: Options) -> Array:
        """R (ohm) at temperature ``value`` (degC): the law itself."""
        out: Array = params[0] * _poly(params, np.asarray(value, dtype=float))[0]
        return out

    def reading_slope(self, params: Array, value: Array) -> Array:
        """d R / d t (ohm per degC) at temperature ``value`` (degC)."""
        out: Array = params[0] * _poly(params, np.asarray(value, dtype=float))[1]
        return out

    def reading_jacobian(self, params: Array, value: Array) -> Array:
        """d R / d params at temperature ``value`` (degC), shape (n, k)."""
        t = np.asarray(value, dtype=float)
        r0 = params[0]
        cols = [_poly(params, t)[0], r0 * t, r0 * t**2]
        if _has_c(params):
            cols.append(np.where(t < 0, r0 * (t - 100.0) * t**3, 0.0))
        return np.stack(cols, axis=-1)

    # -- value from reading, exactly --------------------------------------------------------------
    def evaluate(self, params: Array, reading: Array, options: Options) -> Array:
        """t (degC) with R(t) = reading; NaN where no such t exists on the rising branch."""
        r0, a, b = params[0], params[1], params[2]
        shape = np.shape(reading)
        x = np.atleast_1d(np.asarray(reading, dtype=float)) / r0 - 1.0
        # the root of B t^2 + A t - x = 0 that is 0 at x = 0, free of cancellation
        with np.errstate(divide="ignore", invalid="ignore"):
            disc = np.sqrt(a * a + 4.0 * b * x)
            t: Array = 2.0 * x / (a + np.copysign(disc, a))
        below = np.flatnonzero(np.isfinite(t) & (t < 0))
        if not _has_c(params) or below.size == 0:
            return t.reshape(shape)
        target = x[below] + 1.0
        tb = t[below]
        converged = np.zeros(tb.shape, dtype=bool)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            for _ in range(NEWTON_MAX_ITER):
                ratio, deriv = _poly(params, tb)
                step = (ratio - target) / deriv
                tb = tb - step
                converged = np.abs(step) <= NEWTON_RTOL * np.abs(tb) + 1e-12
                if np.all(converged | ~np.isfinite(tb)):
                    break
        t[below] = np.where(converged & np.isfinite(tb), tb, np.nan)
        return t.reshape(shape)

    def slope(self, params: Array, reading: Array, options: Options) -> Array:
        """d t / d R = 1 / (d R / d t) at t = evaluate(R), degC per ohm."""
        out: Array = 1.0 / self.reading_slope(params, self.evaluate(params, reading, options))
        return out

    def jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        """d t / d params = -(d R / d params) / (d R / d t) at t = evaluate(R) (implicit)."""
        t = self.evaluate(params, reading, options)
        out: Array = -self.reading_jacobian(params, t) / self.reading_slope(params, t)[..., None]
        return out

    def solve(self, reading: Array, value: Array, weight: Array, options: Options) -> Solution:
        """Weighted least squares of R on t (reading space; ``weight`` is per reading)."""
        t = value
        choice = options["below_zero"]
        with_c = bool(np.any(t < 0)) if choice == "auto" else choice is True
        if with_c and not np.any(t < 0):
            raise SingularFit(
                "callendar_van_dusen: below_zero=True, but no point lies below 0 degC, so C "
                "(which acts only there) cannot be determined; use below_zero='auto' or False"
            )
        cols = [np.ones_like(t), t, t**2]
        if with_c:
            cols.append(np.where(t < 0, (t - 100.0) * t**3, 0.0))
        design = np.stack(cols, axis=-1)
        coef, _ = weighted_lstsq(design, reading, weight)
        coef = coef + weighted_lstsq(design, reading - design @ coef, weight)[0]  # refinement
        if not coef[0] > 0:
            raise SingularFit(f"callendar_van_dusen: the fitted R0 = {coef[0]:.6g} ohm is not > 0")
        params = np.concatenate([coef[:1], coef[1:] / coef[0]])
        cov = unscaled_covariance(self.reading_jacobian(params, t), weight)
        return Solution(params=params, cov_unscaled=cov)


FAMILY = CallendarVanDusen()
