"""Batched line and polynomial fits (see ``shared.batch``): fit()'s own solver on stacked arrays.

QR of the column-equilibrated design in the centred, scaled Chebyshev basis, the double-double
refinement of the raw coefficients and compensated Horner evaluation (the pieces of
``shared.families._monomial``), each step for all units of a group at once.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from shared.batch_common import EPS, Index, Mask, Solved, basic_ok, grid_rows, monotone_rows
from shared.families._monomial import (
    REFINE_STEPS,
    MonomialFamily,
    _accurate_sum,
    _binomials,
    _chebyshev_monomials,
    _fast_two_sum,
    _power_terms,
    _split,
    _two_prod,
    _two_sum,
)
from shared.families.base import Array, Family


def solve_monomial(fam: Family, opts: Mapping[str, Any], r: Array, v: Array) -> Solved:
    assert isinstance(fam, MonomialFamily)
    powers = fam.powers(opts)
    degree = fam.degree(opts)
    p = len(powers)
    units = len(r)
    ok = basic_ok(r, p)
    if not ok.any():  # too few points (fit() raises TooFewPoints) or no spread in the readings
        return Solved(ok, np.zeros((units, p)), np.zeros((units, p, p)), np.zeros_like(r), ok)
    through_zero = bool(opts.get("through_zero", False))

    lo, hi = r.min(axis=1), r.max(axis=1)
    centre = (lo + hi) / 2.0
    half = (hi - lo) / 2.0
    half = np.where(half == 0, 1.0, half)
    x = (r - centre[:, None]) / half[:, None]
    design: Array
    if through_zero:
        s = np.abs(r).max(axis=1)
        s = np.where(s == 0, 1.0, s)
        cheb = np.polynomial.chebyshev.chebvander(x, degree - 1)
        design = np.asarray((r / s[:, None])[:, :, None] * cheb, dtype=np.float64)
        to_raw = _chebyshev_to_raw(degree - 1, centre, half) / s[:, None, None]
    else:
        design = np.asarray(np.polynomial.chebyshev.chebvander(x, degree), dtype=np.float64)
        to_raw = _chebyshev_to_raw(degree, centre, half)

    # weighted_lstsq with unit weights: QR of the column-equilibrated design, stacked
    with np.errstate(invalid="ignore", divide="ignore"):
        norms = np.sqrt(np.sum(design * design, axis=1))  # (units, p)
        ok &= np.all((norms > 0) & np.isfinite(norms), axis=1)
        norms = np.where(ok[:, None], norms, 1.0)
        q, rr = np.linalg.qr(design / norms[:, None, :])
        diag = np.abs(np.diagonal(rr, axis1=1, axis2=2))
        ok &= diag.min(axis=1) > 1e-13 * diag.max(axis=1)
        rr = np.where(ok[:, None, None], rr, np.eye(p))
        qtv = np.matmul(np.swapaxes(q, 1, 2), v[:, :, None])
        coef = np.linalg.solve(rr, qtv)[:, :, 0] / norms
        r_inv = np.linalg.solve(rr, np.broadcast_to(np.eye(p), rr.shape)) / norms[:, :, None]
        cov = np.matmul(r_inv, np.swapaxes(r_inv, 1, 2))

    with np.errstate(over="ignore", invalid="ignore"):
        start = np.matmul(to_raw, coef[:, :, None])[:, :, 0]
        params = _refine(start, r, v, powers, to_raw, cov, ok)
        raw = np.zeros((units, degree + 1))
        raw[:, powers] = params
        fitted = _polyval(raw, r)
        curve = _polyval(raw, grid_rows(r))
    residuals = v - fitted
    ok &= np.isfinite(fitted).all(axis=1) & np.isfinite(curve).all(axis=1)
    ok &= np.isfinite(params).all(axis=1)
    cov_raw = np.matmul(np.matmul(to_raw, cov), np.swapaxes(to_raw, 1, 2))
    return Solved(ok, params, cov_raw, residuals, monotone_rows(curve))


def _chebyshev_to_raw(degree: int, centre: Array, half: Array) -> Array:
    """``chebyshev_to_raw`` for each unit: (units, degree+1, degree+1)."""
    binom, expo = _binomials(degree)
    scaled = binom * (-centre)[:, None, None] ** expo / half[:, None, None] ** np.arange(degree + 1)
    return np.asarray(scaled @ _chebyshev_monomials(degree), dtype=np.float64)


def _horner(coef: Array, reading: Array) -> tuple[Array, Array]:
    """``horner_compensated`` with a coefficient row per unit: coef (units, d+1), r (units, m)."""
    r_split = _split(reading)
    value = np.repeat(coef[:, -1:], reading.shape[1], axis=1)
    correction = np.zeros_like(reading)
    for j in range(coef.shape[1] - 2, -1, -1):
        a = coef[:, j : j + 1]
        prod, e_prod = _two_prod(value, reading, r_split)
        value = prod + a
        bb = value - prod
        correction = correction * reading + (e_prod + ((prod - (value - bb)) + (a - bb)))
    return value, correction


def _polyval(coef: Array, reading: Array) -> Array:
    """``polyval_accurate`` row by row (non-finite where fit() would fall back to plain Horner)."""
    value, correction = _horner(coef, reading)
    return value + correction


def _column_sums(hi: Array, lo: Array) -> tuple[Array, Array]:
    """``_accurate_sum`` over axis 1 of (units, m, k) arrays: (units, k) double-doubles."""
    units, m, k = hi.shape
    s_hi, s_lo = _accurate_sum(
        np.swapaxes(hi, 0, 1).reshape(m, units * k), np.swapaxes(lo, 0, 1).reshape(m, units * k)
    )
    return s_hi.reshape(units, k), s_lo.reshape(units, k)


def _raw_gradient(
    reading: Array,
    reading_split: tuple[Array, Array],
    resid_hi: Array,
    resid_lo: Array,
    powers: list[int],
) -> tuple[Array, Array]:
    """``_raw_gradient`` with unit weights, for (units, n) arrays: (units, len(powers))."""
    wr_hi, wr_lo = _fast_two_sum(resid_hi, resid_lo)  # unit weights: w r is r, exactly
    return _column_sums(*_power_terms(reading, reading_split, wr_hi, wr_lo, powers))


def _refine(
    params: Array,
    reading: Array,
    value: Array,
    powers: list[int],
    to_raw: Array,
    cov: Array,
    ok: Mask,
) -> Array:
    """``refine`` (unit weights) for every unit at once, each unit stopping on its own terms."""
    units = params.shape[0]
    reading_split = _split(reading)
    raw = np.zeros((units, max(powers) + 1))
    best, best_sse = params.copy(), np.full(units, np.inf)
    last = np.full(units, np.inf)
    result = params.copy()
    active = ok.copy()
    for attempt in range(REFINE_STEPS + 1):
        raw[:, powers] = params
        p_hi, p_lo = _horner(raw, reading)
        r_hi, r_lo = _two_sum(value, -p_hi)
        r_lo = r_lo - p_lo
        sse = np.sum((r_hi + r_lo) ** 2, axis=1)
        worse = active & ~(sse <= best_sse * (1 + 1e-9))
        result[worse] = best[worse]
        active &= ~worse
        best[active], best_sse[active] = params[active], sse[active]
        if attempt == REFINE_STEPS or not active.any():
            break
        g_hi, g_lo = _raw_gradient(reading, reading_split, r_hi, r_lo, powers)
        t_hi, t_lo = _two_prod(to_raw, g_hi[:, :, None], _split(g_hi[:, :, None]))
        gb_hi, gb_lo = _column_sums(t_hi, t_lo + to_raw * g_lo[:, :, None])
        step = np.matmul(cov, (gb_hi + gb_lo)[:, :, None])[:, :, 0]
        size = np.abs(step).max(axis=1)
        stalled = active & ~(size < 0.5 * last)
        result[stalled] = best[stalled]
        active &= ~stalled
        change = np.matmul(to_raw, step[:, :, None])[:, :, 0]
        params = np.where(active[:, None], params + change, params)
        last = np.where(active, size, last)
        done = active & np.all(np.abs(change) <= 2 * EPS * np.abs(params), axis=1)
        result[done] = params[done]
        active &= ~done
    result[active] = best[active]
    return result


# -- noise in the reading -----------------------------------------------------------------------
def values_monomial(fam: Family, opts: Mapping[str, Any], params: Array, r: Array) -> Array:
    """The curve at ``r`` (units, m) for raw parameters (units, p), as fit() evaluates it."""
    assert isinstance(fam, MonomialFamily)
    raw = np.zeros((len(params), fam.degree(opts) + 1))
    raw[:, fam.powers(opts)] = params
    with np.errstate(over="ignore", invalid="ignore"):
        return _polyval(raw, r)


def reading_monomial(fam: Family, opts: Mapping[str, Any], r: Array, v: Array) -> Solved:
    """The effective-variance fit (``shared.batch_reading``) of line / polynomial units.

    The parameters iterated are the coefficients in the unit's centred, scaled Chebyshev basis
    (the design X and its derivative X' are fixed, f = X a and f' = X' a), started from the
    value-noise solution; the raw coefficients and their covariance follow through ``to_raw``.
    """
    from shared.batch_reading import Curvature, effective_variance

    assert isinstance(fam, MonomialFamily)
    first = solve_monomial(fam, opts, r, v)
    units, n = r.shape
    degree = fam.degree(opts)
    through_zero = bool(opts.get("through_zero", False))
    lo, hi = r.min(axis=1), r.max(axis=1)
    centre = (lo + hi) / 2.0
    half = np.where(hi == lo, 1.0, (hi - lo) / 2.0)
    x = (r - centre[:, None]) / half[:, None]
    cheb_degree = degree - 1 if through_zero else degree
    vander = np.polynomial.chebyshev.chebvander(x, cheb_degree)
    deriv_map = np.zeros((cheb_degree + 1, cheb_degree + 1))
    for j in range(1, cheb_degree + 1):
        unit = np.zeros(j + 1)
        unit[j] = 1.0
        d = np.polynomial.chebyshev.chebder(unit)
        deriv_map[: d.size, j] = d
    dvander = np.matmul(vander, deriv_map) / half[:, None, None]  # d T_j(x) / dr
    if through_zero:
        s = np.abs(r).max(axis=1)
        s = np.where(s == 0, 1.0, s)
        design = (r / s[:, None])[:, :, None] * vander
        slope_design = vander / s[:, None, None] + (r / s[:, None])[:, :, None] * dvander
        to_raw = _chebyshev_to_raw(cheb_degree, centre, half) / s[:, None, None]
    else:
        design, slope_design = vander, dvander
        to_raw = _chebyshev_to_raw(cheb_degree, centre, half)
    ok = first.ok.copy()
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        safe = np.where(ok[:, None, None], to_raw, np.eye(to_raw.shape[1]))
        start = np.linalg.solve(safe, first.params[:, :, None])[:, :, 0]

    def model(a: Array, rows: Index) -> tuple[Array, Array, Array, Array, Curvature]:
        d, sd = design[rows], slope_design[rows]
        # f and f' are linear in a: no second derivatives
        return np.einsum("unp,up->un", d, a), d, np.einsum("unp,up->un", sd, a), sd, None

    def admissible(a: Array, rows: Index) -> Mask:
        return np.ones(len(a), dtype=bool)

    scale = np.maximum(np.abs(r).max(axis=1), 1e-300)
    a, cov_a, converged = effective_variance(model, admissible, v, scale, start, ok)
    ok &= converged
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        params = np.matmul(to_raw, a[:, :, None])[:, :, 0]
        cov = np.matmul(np.matmul(to_raw, cov_a), np.swapaxes(to_raw, 1, 2))
        fitted = values_monomial(fam, opts, params, r)
        raw = np.zeros((units, degree + 1))
        raw[:, fam.powers(opts)] = params
        deriv = raw[:, 1:] * np.arange(1, degree + 1)
        slope = _polyval(deriv, r) if degree > 1 else np.repeat(deriv, n, axis=1)
        curve = _polyval(raw, grid_rows(r))
        weights = 1.0 / slope**2
    ok &= np.isfinite(params).all(axis=1) & np.isfinite(fitted).all(axis=1)
    ok &= np.isfinite(curve).all(axis=1) & np.isfinite(weights).all(axis=1)
    ok &= np.isfinite(cov).all(axis=(1, 2))
    return Solved(ok, params, cov, v - fitted, monotone_rows(curve), weights)
