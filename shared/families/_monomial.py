"""Shared machinery of the families that are polynomials in the reading (line, polynomial).

The least-squares problem is solved in a centred and scaled variable x = (r - c) / h, where the
Vandermonde columns are far better conditioned than in raw r; the coefficients and their covariance
are then mapped exactly (a linear map) to the raw monomial coefficients that firmware needs.
"""

from __future__ import annotations

from math import comb
from typing import Any

import numpy as np

from shared.families.base import Array, Options, Solution, weighted_lstsq


def centre_and_scale(reading: Array, through_zero: bool) -> tuple[float, float]:
    """The centre c and half-width h of the scaled variable (c = 0 when the curve must pass 0)."""
    lo, hi = float(reading.min()), float(reading.max())
    if through_zero:
        return 0.0, max(abs(lo), abs(hi)) or 1.0
    return (lo + hi) / 2.0, ((hi - lo) / 2.0) or 1.0


def to_raw(degree: int, centre: float, half: float, powers: list[int]) -> Array:
    """Matrix T with a_raw = T b_scaled, for the monomial powers used in the scaled fit."""
    t = np.zeros((degree + 1, len(powers)))
    for col, k in enumerate(powers):
        for j in range(k + 1):
            t[j, col] = comb(k, j) * (-centre) ** (k - j) / half**k
    return t


class MonomialFamily:
    """value = c0 + c1 r + ... + cd r^d (c0 absent when through_zero)."""

    foldback = False

    def __init__(self, name: str, formula: str, typical: str, options: dict[str, Any]) -> None:
        self.name = name
        self.formula = formula
        self.typical = typical
        self.options = options

    def degree(self, options: Options) -> int:
        return int(options.get("degree", 1))

    def powers(self, options: Options) -> list[int]:
        start = 1 if options.get("through_zero", False) else 0
        return list(range(start, self.degree(options) + 1))

    def param_names(self, options: Options) -> tuple[str, ...]:
        return tuple(f"c{k}" for k in self.powers(options))

    def evaluate(self, params: Array, reading: Array, options: Options) -> Array:
        coef = np.zeros(self.degree(options) + 1)
        coef[self.powers(options)] = params
        return np.asarray(np.polynomial.polynomial.polyval(reading, coef), dtype=np.float64)

    def jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        return np.stack([reading**k for k in self.powers(options)], axis=-1)

    def solve(self, reading: Array, value: Array, weight: Array, options: Options) -> Solution:
        powers = self.powers(options)
        centre, half = centre_and_scale(reading, bool(options.get("through_zero", False)))
        x = (reading - centre) / half
        design = np.stack([x**k for k in powers], axis=-1)
        coef, cov = weighted_lstsq(design, value, weight)
        t = to_raw(self.degree(options), centre, half, powers)[powers, :]
        return Solution(params=t @ coef, cov_unscaled=t @ cov @ t.T)
