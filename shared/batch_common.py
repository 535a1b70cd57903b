"""Pieces the batched solvers share (``shared.batch``, ``shared.batch_monomial``,
``shared.batch_inverse_offset``, ``shared.batch_reading``): the result of a batched solve and the
row-by-row checks fit() makes on every unit."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from shared.families.base import Array
from shared.fitting import MONOTONE_GRID

Mask = NDArray[np.bool_]
Index = NDArray[np.intp]
EPS = float(np.finfo(np.float64).eps)


@dataclass(frozen=True, slots=True)
class Solved:
    """Batched results for the units of one group that the batch path could finish (``ok``)."""

    ok: Mask
    params: Array  # (units, p)
    cov_unscaled: Array  # (units, p, p)
    residuals: Array  # (units, n): value - f(reading)
    monotone: Mask
    weights: Array | None = None  # (units, n) least-squares weights; None: all 1


def monotone_rows(values: Array) -> Mask:
    """Row by row, as fit() judges it: every step of the curve on the grid >= 0, or every <= 0."""
    steps = np.diff(values, axis=1)
    return np.asarray(np.all(steps >= 0, axis=1) | np.all(steps <= 0, axis=1))


def grid_rows(r: Array) -> Array:
    """fit()'s monotonicity grid for each unit: MONOTONE_GRID points over its valid range."""
    return np.asarray(np.linspace(r.min(axis=1), r.max(axis=1), MONOTONE_GRID, axis=1))


def basic_ok(r: Array, n_params: int) -> Mask:
    """Enough points (parameters + 1) and readings that vary; otherwise fit() raises."""
    varies: Mask = np.ptp(r, axis=1) > 0
    return varies if r.shape[1] >= n_params + 1 else np.zeros_like(varies)
