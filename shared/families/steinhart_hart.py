"""steinhart_hart: 1/T = A + B ln R + C (ln R)^3. NTC thermistors.

Reading R in ohm (> 0), T in kelvin; the value is in degrees Celsius, t = T - 273.15 (ITS-90
convention, exactly 273.15). A in 1/K, B in 1/K, C in 1/K (ln R is taken of R in ohm).

The law is linear in (A, B, C) for y = 1/T, so the start is the weighted linear least squares of
y on (1, ln R, (ln R)^3), each point weighted by its value-space weight times T^4 (a value error
dt moves y by -dt / T^2). That start is exact for noise-free points; for noisy ones it minimises a
slightly different sum than fit() reports, so a Levenberg–Marquardt polish of the value residuals
(degC) with the given weights and the analytic Jacobian follows. Reference: Steinhart and Hart,
Deep-Sea Research 15 (1968) 497.
"""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

import numpy as np
from numpy.typing import NDArray

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

KELVIN = 273.15  # T [K] = t [degC] + 273.15


def check_resistance(family: str, reading: Array) -> None:
    """BadInput unless every resistance is > 0 ohm (ln R must exist)."""
    bad = reading[reading <= 0]
    if bad.size:
        raise BadInput(
            f"{family}: every resistance must be > 0 ohm (ln R is not defined otherwise); got "
            f"R = {', '.join(f'{r:.6g}' for r in bad[:10])}{' ...' if bad.size > 10 else ''}"
        )


def check_above_absolute_zero(family: str, value: Array) -> None:
    """BadInput unless every temperature is above -273.15 degC (1/T must exist)."""
    bad = value[value <= -KELVIN]
    if bad.size:
        raise BadInput(
            f"{family}: every temperature must be above -273.15 degC; got "
            f"t = {', '.join(f'{t:.6g}' for t in bad[:10])}{' ...' if bad.size > 10 else ''}"
        )


def _log_r(reading: Array) -> tuple[NDArray[np.bool_], Array]:
    """(inside, ln R) with ln 1 = 0 standing in where R <= 0 (those entries become NaN later)."""
    inside = np.asarray(reading > 0)
    log_r: Array = np.log(np.where(inside, reading, 1.0))
    return inside, log_r


class SteinhartHart:
    """t = 1 / (A + B ln R + C (ln R)^3) - 273.15, in degC; R in ohm."""

    name = "steinhart_hart"
    formula = "1/T = A + B·ln R + C·(ln R)^3,  T = t + 273.15 K  (R > 0 ohm)"
    typical = "NTC thermistor"
    options: Mapping[str, Any] = MappingProxyType({})
    foldback = False

    def check_options(self, options: Options) -> dict[str, Any]:
        return check_known_options(self.name, options, self.options)

    def param_names(self, options: Options) -> tuple[str, ...]:
        return ("A", "B", "C")

    def _kelvin(self, params: Array, reading: Array) -> tuple[NDArray[np.bool_], Array, Array]:
        """(inside, ln R, T in kelvin); T is NaN for R <= 0."""
        a, b, c = params
        inside, log_r = _log_r(reading)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            t_k = np.where(inside, 1.0 / (a + b * log_r + c * log_r**3), np.nan)
        return inside, log_r, t_k

    def evaluate(self, params: Array, reading: Array, options: Options) -> Array:
        """Temperature in degC; NaN for R <= 0."""
        out: Array = self._kelvin(params, reading)[2] - KELVIN
        return out

    def jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        """d t / d (A, B, C) = -T^2 (1, ln R, (ln R)^3); NaN rows for R <= 0."""
        _, log_r, t_k = self._kelvin(params, reading)
        t2 = -(t_k**2)
        return np.stack([t2, t2 * log_r, t2 * log_r**3], axis=-1)

    def slope(self, params: Array, reading: Array, options: Options) -> Array:
        """d t / d R = -T^2 (B + 3 C (ln R)^2) / R, degC per ohm; NaN for R <= 0."""
        _, b, c = params
        inside, log_r, t_k = self._kelvin(params, reading)
        out: Array = -(t_k**2) * (b + 3.0 * c * log_r**2) / np.where(inside, reading, 1.0)
        return out

    def solve(self, reading: Array, value: Array, weight: Array, options: Options) -> Solution:
        check_resistance(self.name, reading)
        check_above_absolute_zero(self.name, value)
        log_r = np.log(reading)
        t_k = value + KELVIN
        design = np.stack([np.ones_like(log_r), log_r, log_r**3], axis=-1)
        start, _ = weighted_lstsq(design, 1.0 / t_k, weight * t_k**4)

        params = polish(self, start, reading, value, weight, options)
        t_fit = self._kelvin(params, reading)[2]
        if not np.all(np.isfinite(t_fit) & (t_fit > 0)):
            raise SingularFit(
                "steinhart_hart: the fitted 1/T reaches zero or below inside the readings"
            )
        cov = unscaled_covariance(self.jacobian(params, reading, options), weight)
        return Solution(params=np.asarray(params, dtype=float), cov_unscaled=cov)


FAMILY = SteinhartHart()
