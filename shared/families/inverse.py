"""inverse: value = k / r + v0. Infrared rangefinders in their far region, any 1/r response.

Linear in its parameters (k, v0), so it is solved in closed form: weighted least squares on the
basis [s / r, 1] with s = min |r| (the first column then lies in (0, 1]), mapped back exactly to
k = s * coefficient. The curve has a pole at r = 0, so every reading must lie on one side of it:
readings of both signs, or a reading of 0, are rejected.
"""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

import numpy as np

from shared.errors import BadInput
from shared.families.base import (
    Array,
    Options,
    Solution,
    check_known_options,
    weighted_lstsq,
)


def check_one_side_of_zero(family: str, reading: Array) -> None:
    """BadInput unless every reading is non-zero and all of them share one sign."""
    if np.any(reading == 0):
        raise BadInput(
            f"{family}: a reading is 0, where the curve k / r has its pole; every reading must "
            "be non-zero and all of one sign"
        )
    if reading.min() < 0 < reading.max():
        raise BadInput(
            f"{family}: the readings have both signs ({reading.min():.6g} .. {reading.max():.6g});"
            " the pole of k / r at r = 0 lies between them"
        )


class Inverse:
    """value = k / r + v0; k in value units x reading units, v0 in value units."""

    name = "inverse"
    formula = "value = k / r + v0"
    typical = "IR rangefinder, far region"
    options: Mapping[str, Any] = MappingProxyType({})
    foldback = True

    def check_options(self, options: Options) -> dict[str, Any]:
        return check_known_options(self.name, options, self.options)

    def param_names(self, options: Options) -> tuple[str, ...]:
        return ("k", "v0")

    def evaluate(self, params: Array, reading: Array, options: Options) -> Array:
        """k / r + v0; NaN at the pole r = 0."""
        k, v0 = params
        inv = self._inverse(reading)
        out: Array = k * inv + v0
        return out

    def jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        """[1 / r, 1]; NaN at the pole r = 0."""
        inv = self._inverse(reading)
        return np.stack([inv, np.where(np.isnan(inv), np.nan, 1.0)], axis=-1)

    def slope(self, params: Array, reading: Array, options: Options) -> Array:
        """d value / d r = -k / r^2; NaN at the pole r = 0."""
        inv = self._inverse(reading)
        out: Array = -params[0] * inv**2
        return out

    @staticmethod
    def _inverse(reading: Array) -> Array:
        nonzero = reading != 0
        return np.where(nonzero, 1.0 / np.where(nonzero, reading, 1.0), np.nan)

    def solve(self, reading: Array, value: Array, weight: Array, options: Options) -> Solution:
        check_one_side_of_zero(self.name, reading)
        scale = float(np.abs(reading).min())
        design = np.stack([scale / reading, np.ones_like(reading)], axis=-1)
        coef, cov = weighted_lstsq(design, value, weight)
        to_raw = np.diag([scale, 1.0])
        return Solution(params=to_raw @ coef, cov_unscaled=to_raw @ cov @ to_raw)


FAMILY = Inverse()
