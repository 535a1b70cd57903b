"""beta: 1/T = 1/T0 + ln(R / R0) / B. NTC thermistors, the two-parameter law.

Reading R in ohm (> 0), T in kelvin; the value is in degrees Celsius, t = T - 273.15. Parameters:
R0 (ohm), the resistance at the reference temperature T0, and B (kelvin), the "beta" of the
thermistor. T0 is not fitted: it is the option ``t0_c`` (degC, default 25.0; T0 = t0_c + 273.15
exactly), so R0 means "the resistance at t0_c".

Start: 1/T is linear in ln R (1/T = a + b ln R with b = 1/B and a = 1/T0 - ln(R0)/B), solved by
weighted linear least squares with each point's value-space weight times T^4 (a value error dt
moves 1/T by -dt / T^2); that is exact for noise-free points, and the same as the two-point
formula B = ln(R1/R2) / (1/T1 - 1/T2) for two. A Levenberg–Marquardt polish of the value residuals
(degC) with the given weights and the analytic Jacobian follows.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from numbers import Real
from types import MappingProxyType
from typing import Any

import numpy as np

from shared.errors import BadInput, SingularFit
from shared.families.base import (
    Array,
    Options,
    Solution,
    check_known_options,
    polish,
    unscaled_covariance,
    weighted_lstsq,
)
from shared.families.steinhart_hart import (
    KELVIN,
    check_above_absolute_zero,
    check_resistance,
)


class Beta:
    """t = 1 / (1/T0 + ln(R / R0) / B) - 273.15, in degC; R and R0 in ohm, B in kelvin."""

    name = "beta"
    formula = "1/T = 1/T0 + ln(R/R0)/B,  T = t + 273.15 K,  T0 = t0_c + 273.15 K  (R > 0 ohm)"
    typical = "NTC thermistor (two-parameter)"
    options: Mapping[str, Any] = MappingProxyType({"t0_c": 25.0})
    foldback = False

    def check_options(self, options: Options) -> dict[str, Any]:
        opts = check_known_options(self.name, options, self.options)
        t0 = opts["t0_c"]
        if isinstance(t0, bool) or not isinstance(t0, Real) or not math.isfinite(float(t0)):
            raise BadInput(f"beta: t0_c must be a finite number of degC, not {t0!r}")
        if float(t0) <= -KELVIN:
            raise BadInput(f"beta: t0_c must be above -273.15 degC, not {t0!r}")
        opts["t0_c"] = float(t0)
        return opts

    def param_names(self, options: Options) -> tuple[str, ...]:
        return ("R0", "B")

    def _kelvin(self, params: Array, reading: Array, options: Options) -> tuple[Array, Array]:
        """(ln(R / R0), T in kelvin); T is NaN for R <= 0."""
        r0, b = params
        inside = reading > 0
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            log_ratio = np.log(np.where(inside, reading, 1.0) / r0)
            t_k = np.where(inside, 1.0 / (1.0 / (options["t0_c"] + KELVIN) + log_ratio / b), np.nan)
        return log_ratio, t_k

    def evaluate(self, params: Array, reading: Array, options: Options) -> Array:
        """Temperature in degC; NaN for R <= 0."""
        out: Array = self._kelvin(params, reading, options)[1] - KELVIN
        return out

    def jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        """d t / d (R0, B) = (T^2 / (B R0), T^2 ln(R/R0) / B^2); NaN rows for R <= 0."""
        r0, b = params
        log_ratio, t_k = self._kelvin(params, reading, options)
        t2 = t_k**2
        return np.stack([t2 / (b * r0), t2 * log_ratio / b**2], axis=-1)

    def slope(self, params: Array, reading: Array, options: Options) -> Array:
        """d t / d R = -T^2 / (B R), degC per ohm; NaN for R <= 0."""
        _, b = params
        t_k = self._kelvin(params, reading, options)[1]
        out: Array = -(t_k**2) / (b * np.where(reading > 0, reading, 1.0))
        return out

    def solve(self, reading: Array, value: Array, weight: Array, options: Options) -> Solution:
        check_resistance(self.name, reading)
        check_above_absolute_zero(self.name, value)
        inv_t0 = 1.0 / (options["t0_c"] + KELVIN)
        log_r = np.log(reading)
        log_c = float(log_r.mean())  # centred: ln R0 comes out without cancellation
        t_k = value + KELVIN
        design = np.stack([np.ones_like(log_r), log_r - log_c], axis=-1)
        (a, slope), _ = weighted_lstsq(design, 1.0 / t_k, weight * t_k**4)
        if not slope > 0 and not slope < 0:
            raise SingularFit("beta: 1/T does not change with ln R: B is not determined")
        b_start = 1.0 / slope
        start = np.array([math.exp(log_c + (inv_t0 - a) * b_start), b_start])
        if not np.all(np.isfinite(start)):
            raise SingularFit("beta: R0 at t0_c lies too far from the points to be represented")

        params = polish(self, start, reading, value, weight, options)
        t_fit = self._kelvin(params, reading, options)[1]
        if params[0] <= 0 or not np.all(np.isfinite(t_fit) & (t_fit > 0)):
            raise SingularFit("beta: no fit with R0 > 0 and 1/T > 0 over the readings exists")
        cov = unscaled_covariance(self.jacobian(params, reading, options), weight)
        return Solution(params=np.asarray(params, dtype=float), cov_unscaled=cov)


FAMILY = Beta()
