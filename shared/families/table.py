"""table: a monotone piecewise-linear curve through the points. The model-free fallback.

Knots r_0 < r_1 < ... < r_{K-1} are the distinct used readings, in increasing order; the
parameters v0 .. v{K-1} are the values at the knots (value units), and between knots the value is
interpolated linearly (``numpy.interp``; outside the knots it stays at the end values, but the
valid range of a fit is the span of the knots anyway). The curve is linear in its parameters
(v = sum_k v_k h_k(r), h_k the hat functions), so the weighted least squares is closed form: each
v_k is the weighted mean of the values measured at r_k, and repeats at a reading are averaged by
the least squares itself.

The knots come from the data: fit() sets the option ``knots`` (a list of floats, so the Fit and
its JSON carry them) through ``bind_options``, after the exclusions are known. Given explicitly,
``knots`` must equal the distinct used readings (so refitting with a Fit's own options works).

With no repeated readings the table has as many parameters as points and no residual is left to
estimate the uncertainty from (``interpolates = True``): fit() then needs stated uncertainties
(u_value / u_reading), and reports dof 0. With repeats the covariance comes from the scatter
around the knot means as usual.

A lookup table for firmware must be monotone, so knot values that are not (after the averaging)
are an error naming the readings where the direction reverses.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from itertools import pairwise
from numbers import Real
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


def _knots(options: Options) -> Array:
    knots = options.get("knots")
    if knots is None:
        raise BadInput("table: the knots are not set (fit() sets them from the points)")
    return np.asarray(knots, dtype=float)


def hat_basis(knots: Array, reading: Array) -> Array:
    """h_k(r) for every reading (rows) and knot (columns): the Jacobian of the interpolation.

    Outside the knots the first (last) hat is 1, as ``numpy.interp`` holds the end values.
    """
    r = np.asarray(reading, dtype=float)
    out = np.zeros((*r.shape, knots.size))
    if knots.size == 1:
        out[...] = 1.0
        return out
    seg = np.clip(np.searchsorted(knots, r, side="right") - 1, 0, knots.size - 2)
    frac = np.clip((r - knots[seg]) / (knots[seg + 1] - knots[seg]), 0.0, 1.0)
    np.put_along_axis(out, seg[..., None], (1.0 - frac)[..., None], axis=-1)
    np.put_along_axis(out, seg[..., None] + 1, frac[..., None], axis=-1)
    return out


class Table:
    """value = the linear interpolation of (knot reading, v_k); knots in ``options["knots"]``."""

    name = "table"
    formula = "value = linear interpolation between (r_k, v_k), r_k the distinct readings"
    typical = "any monotone sensor (model-free fallback)"
    options: Mapping[str, Any] = MappingProxyType({"knots": None})
    foldback = False
    interpolates = True

    def check_options(self, options: Options) -> dict[str, Any]:
        opts = check_known_options(self.name, options, self.options)
        knots = opts["knots"]
        if knots is None:
            return opts
        if isinstance(knots, str | bytes) or not hasattr(knots, "__iter__"):
            raise BadInput(f"table: knots must be a list of readings, not {knots!r}")
        items = list(knots)
        if not all(isinstance(k, Real) and not isinstance(k, bool) for k in items) or not all(
            math.isfinite(float(k)) for k in items
        ):
            raise BadInput("table: knots must be finite numbers")
        values = [float(k) for k in items]
        if any(b <= a for a, b in pairwise(values)):
            raise BadInput("table: knots must be strictly increasing")
        opts["knots"] = values
        return opts

    def bind_options(self, reading: Array, value: Array, options: Options) -> dict[str, Any]:
        """Set ``knots`` to the distinct used readings, in increasing order."""
        knots = [float(k) for k in np.unique(reading)]
        given = options.get("knots")
        if given is not None and list(given) != knots:
            raise BadInput(
                "table: the knots are the distinct readings of the used points "
                f"({len(knots)} of them); the knots given ({len(given)}) differ: leave them out"
            )
        return {**options, "knots": knots}

    def param_names(self, options: Options) -> tuple[str, ...]:
        """v0 .. v{K-1}, one value per knot (none before fit() has set the knots)."""
        knots = options.get("knots")
        return tuple(f"v{k}" for k in range(0 if knots is None else len(knots)))

    def evaluate(self, params: Array, reading: Array, options: Options) -> Array:
        out: Array = np.interp(np.asarray(reading, dtype=float), _knots(options), params)
        return out

    def jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        """d value / d v_k = h_k(r), the hat functions."""
        return hat_basis(_knots(options), reading)

    def slope(self, params: Array, reading: Array, options: Options) -> Array:
        """d value / d r: the segment's slope; at an inner knot the mean of the two segments'
        (what a central difference gives); 0 outside the knots, where the table is held flat."""
        knots = _knots(options)
        r = np.asarray(reading, dtype=float)
        if knots.size < 2:
            return np.zeros(r.shape)
        seg_slope = np.diff(params) / np.diff(knots)
        seg = np.clip(np.searchsorted(knots, r, side="right") - 1, 0, knots.size - 2)
        out = seg_slope[seg]
        at = np.searchsorted(knots, r)
        inner = (at > 0) & (at < knots.size - 1)
        on_inner_knot = inner & (knots[np.minimum(at, knots.size - 1)] == r)
        idx = np.minimum(at, knots.size - 2)
        out = np.where(on_inner_knot, 0.5 * (seg_slope[idx - 1] + seg_slope[idx]), out)
        result: Array = np.where((r < knots[0]) | (r > knots[-1]), 0.0, out)
        return result

    def solve(self, reading: Array, value: Array, weight: Array, options: Options) -> Solution:
        knots = _knots(options)
        coef, cov = weighted_lstsq(hat_basis(knots, reading), value, weight)
        steps = np.diff(coef)
        rising = float(coef[-1] - coef[0]) >= 0
        wrong = np.flatnonzero(steps < 0 if rising else steps > 0)
        if wrong.size:
            where = "; ".join(
                f"{coef[i]:.6g} at r = {knots[i]:.6g} -> "
                f"{coef[i + 1]:.6g} at r = {knots[i + 1]:.6g}"
                for i in wrong[:5]
            )
            raise BadInput(
                f"table: the values are not monotone in the reading (the curve "
                f"{'rises' if rising else 'falls'} overall but turns back: {where}"
                f"{' ...' if wrong.size > 5 else ''}); a lookup table must be monotone"
            )
        return Solution(params=coef, cov_unscaled=cov)


FAMILY = Table()
