"""Batched inverse_offset fits (see ``shared.batch`` for what they promise).

fit()'s variable-projection scan over r0 (the same grid) in closed form for units x points x scan
points at once: first in single precision with an error bound, then the candidates in double
precision, which gives exactly the best point of a full double-precision scan. Then the root of
the projected cost's derivative by secant steps from the parabola through the scan, and a batched
Newton check of (k, r0, v0) (Newton / Levenberg-Marquardt on 3 x 3 systems on stacked arrays).
The covariance is (J^T J)^-1 at the estimate, from the same sums (by SVD where near singular).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
from numpy.typing import NDArray

from shared.batch_common import Index, Mask, Solved, basic_ok
from shared.families.base import Array, Family
from shared.families.inverse_offset import SCAN

SCAN_CHUNK = 64  # units per block of the r0 scan (units x points x scan points, in cache)
SCAN_WINDOW = 5  # scan points around the single-precision candidates redone in double precision
SECANT_MAX = 12  # secant steps at most on d cost / dt before the Newton check takes over
SECANT_TOL = 1e-9  # ... until a step moves t = log(r_min + r0) by less than this
COV_DET_MIN = 1e-4  # det(J_s^T J_s) from which the covariance is the 3 x 3 inverse (else SVD)
LM_MAX_ITER = 40  # Levenberg-Marquardt iterations at most before a unit goes to fit()
LM_XTOL = 1e-13  # converged when a step moves the fitted values by less than this (relative)
LM_STALL = 1e-10  # ... or by less than this and not half the previous step's (rounding noise)
LM_TRUST = 1e-6  # an undamped step this small (relative) is taken: its gain is below the
# rounding of the residual sum of squares, which cannot judge it


def solve_inverse_offset(fam: Family, opts: Mapping[str, Any], r: Array, v: Array) -> Solved:
    units, n = r.shape
    ok = basic_ok(r, 3)
    if not ok.any():  # too few points (fit() raises TooFewPoints) or no spread in the readings
        return Solved(ok, np.zeros((units, 3)), np.zeros((units, 3, 3)), np.zeros_like(r), ok)
    r_min = r.min(axis=1)
    span = np.ptp(r, axis=1)
    span = np.where(span == 0, 1.0, span)
    v_mean = np.sum(v, axis=1) / n
    dv = v - v_mean[:, None]

    # 1. the scan of fit(): the projected cost at (r_min + r0) = SCAN * span, the best point
    logs = np.log(SCAN)
    best, cost, finite = _scan(r, dv, r_min, span)
    ok &= finite
    ok &= best < logs.size - 1  # fit(): "no curvature", SingularFit

    # 2. inside the bracket of the best scan point (fit: a bounded Brent search of the cost),
    # the root of d cost / dt, t = log(r_min + r0): from the vertex of the parabola through the
    # three scan costs around the best, a Newton step with the parabola's curvature, then secant
    lo = logs[np.maximum(best - 1, 0)]
    hi = logs[np.minimum(best + 1, logs.size - 1)]
    mid, h = np.clip(best, 1, logs.size - 2), logs[1] - logs[0]
    f0, f1, f2 = cost.T
    with np.errstate(divide="ignore", invalid="ignore"):
        curvature = (f0 - 2.0 * f1 + f2) / h**2
        vertex = logs[mid] + np.clip(0.5 * h * (f0 - f2) / (f0 - 2.0 * f1 + f2), -h, h)
    vertex = np.clip(np.where(np.isfinite(vertex), vertex, logs[mid]), lo, hi)
    t = _secant(r, dv, r_min, span, vertex, curvature, lo, hi, ok)
    r0_t = np.exp(t) * span - r_min
    _, k_t, shift, _ = _projected(r, dv, r0_t)
    start = np.stack([k_t, r0_t, shift + v_mean], axis=1)

    # 3. Newton / Levenberg-Marquardt on (k, r0, v0): a check that the start is the minimum
    # (or the iteration to it) and the covariance there
    params, converged, cov = _polish(r, v, start, ok)
    ok &= converged
    k, r0, v0 = params[:, 0:1], params[:, 1:2], params[:, 2:3]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ok &= np.all(r + r0 > 0, axis=1)  # fit(): "the fitted pole lies inside the readings"
        residuals = v - (k / (r + r0) + v0)
    ok &= np.isfinite(residuals).all(axis=1) & np.isfinite(cov).all(axis=(1, 2))
    # Monotone by construction: with r + r0 > 0 at every reading, fit()'s grid over the valid
    # range has grid + r0 > 0, and each step of k / (grid + r0) + v0 is a correctly rounded,
    # hence monotone, operation on a non-decreasing grid: the computed values never reverse.
    return Solved(ok, params, cov, residuals, np.ones(units, dtype=bool))


def _scan(r: Array, dv: Array, r_min: Array, span: Array) -> tuple[Index, Array, Mask]:
    """fit()'s scan: for each unit the best of the SCAN points, the projected costs at the three
    points around it (mid - 1, mid, mid + 1, mid = the best kept off the ends), and whether the
    costs are finite.

    Every point is first costed in single precision, with a bound on its error; only points
    that may be the best within that bound are candidates. The costs of SCAN_WINDOW points
    around the candidates are then computed in double precision (``_scan_costs``) and the best
    of those taken: the best of the whole grid in double precision is a candidate, so it is
    among them. A unit whose candidates (with their neighbours) do not fit in the window, or
    whose single-precision costs are not all finite, is scanned in double precision in full.
    """
    size, width = SCAN.size, min(SCAN_WINDOW, SCAN.size)
    units = len(r)
    grid = np.exp(np.log(SCAN))
    relative, bound = _scan_costs32(r, dv, r_min, span)
    with np.errstate(invalid="ignore"):
        reach = np.min(relative + bound, axis=1, keepdims=True)
        candidate = relative - bound <= reach
    lowest = np.argmax(candidate, axis=1)
    highest = size - 1 - np.argmax(candidate[:, ::-1], axis=1)
    first = np.clip(lowest - 1, 0, size - width)
    last = first + width - 1
    full = (highest > np.where(last < size - 1, last - 1, last)) | ~candidate.any(axis=1)
    full |= ~(np.isfinite(relative).all(axis=1) & np.isfinite(bound).all(axis=1))
    window = first[:, None] + np.arange(width)
    cost = _scan_costs(r, dv, grid[window] * span[:, None] - r_min[:, None])
    best = first + np.argmin(cost, axis=1)
    finite = np.asarray(np.isfinite(cost).all(axis=1))
    mid, rows = np.clip(best, 1, size - 2), np.arange(units)
    full |= (mid - 1 < first) | (mid + 1 > last)  # cannot be, unless the bound failed: redo
    at = np.clip(mid[:, None] + np.arange(-1, 2) - first[:, None], 0, width - 1)
    around = cost[rows[:, None], at]
    redo = np.flatnonzero(full)
    if redo.size:  # the whole grid in double precision
        whole = _scan_costs(r[redo], dv[redo], grid * span[redo, None] - r_min[redo, None])
        best[redo] = np.argmin(whole, axis=1)
        finite[redo] = np.isfinite(whole).all(axis=1)
        mid, rows = np.clip(best[redo], 1, size - 2), np.arange(redo.size)
        around[redo] = whole[rows[:, None], mid[:, None] + np.arange(-1, 2)]
    return best, around, finite


def _scan_costs32(
    r: Array, dv: Array, r_min: Array, span: Array
) -> tuple[NDArray[np.float32], NDArray[np.float32]]:
    """The scan's costs in single precision, relative to S_vv, and a bound on their error.

    y = w / (u + SCAN) with u = (r - r_min) / span in [0, 1] and w = (r_c - r) / span formed in
    double precision: no single-precision operation cancels, each y is within a few ulp. The
    relative cost is 1 - q, q = S_yv^2 / (S_vv S_yy,c); with gamma = (n + 4) eps_32, times 4
    for safety, and R = S_yy / S_yy,c >= 1, rounding moves q by at most
    2 gamma sqrt(R) + 4 gamma R <= 6 gamma R: the bound returned. NaN or infinite where the sums
    do not determine them (the caller then scans in double precision).
    """
    units, n = r.shape
    if not units:
        return np.empty((0, SCAN.size), np.float32), np.empty((0, SCAN.size), np.float32)
    u = ((r - r_min[:, None]) / span[:, None]).astype(np.float32)[:, :, None]
    w = ((np.mean(r, axis=1, keepdims=True) - r) / span[:, None]).astype(np.float32)[:, :, None]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        unit_dv = dv / np.sqrt(np.sum(dv * dv, axis=1, keepdims=True))
    sums = np.stack([np.ones_like(dv), unit_dv], axis=1).astype(np.float32)
    grid = np.exp(np.log(SCAN)).astype(np.float32)[None, None, :]
    size = min(SCAN_CHUNK, units)
    buf = np.empty((size, n, SCAN.size), dtype=np.float32)
    s_y, s_yv, s_yy = (np.empty((units, SCAN.size), dtype=np.float32) for _ in range(3))
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for first in range(0, units, size):
            part = slice(first, first + size)
            y = buf[: len(r[part])]
            np.add(u[part], grid, out=y)
            np.divide(w[part], y, out=y)
            s_y[part], s_yv[part] = np.moveaxis(np.matmul(sums[part], y), 1, 0)
            s_yy[part] = np.einsum("cns,cns->cs", y, y)
        s_y *= s_y  # in place from here on: S_y^2 / n, then S_yy,c; q, then 1 - q; R, the bound
        s_y /= np.float32(n)
        centred = np.subtract(s_yy, s_y, out=s_y)
        s_yv *= s_yv
        relative = np.divide(s_yv, centred, out=s_yv)
        np.subtract(np.float32(1.0), relative, out=relative)
        bound = np.divide(s_yy, centred, out=s_yy)
        bound *= np.float32(6 * 4 * (n + 4) * np.finfo(np.float32).eps)
    return relative, bound


def _scan_costs(r: Array, dv: Array, r0: Array) -> Array:
    """Projected cost (residual sum of squares with k, v0 solved) for units x trial r0.

    r, dv (centred values): (units, n); r0: (units, s). In x = 1/(r + r0) the model is linear;
    the cost is S_vv - S_xv^2 / S_xx with centred sums, computed from
    y = (r_c - r) / (r + r0) = (r_c + r0) (x - x_c), r_c the mean reading: y is x centred
    without cancellation (the factor cancels in the ratio). The arrays are laid out
    units x points x trial points, in blocks of a size that stays in cache.
    """
    units, n = r.shape
    out = np.empty(r0.shape)
    if not units:
        return out
    size = min(max(SCAN_CHUNK * SCAN.size // r0.shape[1], 1), units)
    buf = np.empty((size, n, r0.shape[1]))
    towards = (np.mean(r, axis=1, keepdims=True) - r)[:, :, None]
    sums = np.stack([np.ones_like(dv), dv], axis=1)  # (units, 2, n): S_y and S_yv by matmul
    s_vv = np.sum(dv * dv, axis=1)[:, None]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for first in range(0, units, size):
            part = slice(first, first + size)
            y = buf[: len(r[part])]
            np.add(r[part, :, None], r0[part, None, :], out=y)
            np.divide(towards[part], y, out=y)
            s_y, s_yv = np.moveaxis(np.matmul(sums[part], y), 1, 0)
            s_yy = np.einsum("cns,cns->cs", y, y) - s_y * s_y / n
            out[part] = s_vv[part] - s_yv * s_yv / s_yy
    return out


def _projected(r: Array, dv: Array, r0: Array) -> tuple[Array, Array, Array, Array]:
    """Projected cost, k, v0 - mean(v) and d cost / d r0 at one trial r0 per unit.

    r, dv (centred values): (units, n); r0: (units,). For fixed r0 the model is linear in
    (k, v0): with x = 1/(r + r0) centred, k = sum(dx dv) / sum(dx^2), as fit() solves it, and
    the cost is the sum of the squared residuals e = v - f, formed explicitly. With k and v0 at
    their optimum the derivative of the cost is its partial derivative in r0 alone:
    2 k sum(e x^2).
    """
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        x = 1.0 / (r + r0[:, None])
        x_mean = np.mean(x, axis=1)
        dx = x - x_mean[:, None]
        k = np.einsum("ij,ij->i", dx, dv) / np.einsum("ij,ij->i", dx, dx)
        resid = dv - k[:, None] * dx
        x *= x
        slope = 2.0 * k * np.einsum("ij,ij->i", resid, x)
        return np.einsum("ij,ij->i", resid, resid), k, -k * x_mean, slope


def _secant(
    r: Array,
    dv: Array,
    r_min: Array,
    span: Array,
    t0: Array,
    curvature: Array,
    lo: Array,
    hi: Array,
    ok: Mask,
) -> Array:
    """The root of d cost / dt in [lo, hi] (t = log((r_min + r0) / span)), for units in ``ok``.

    A first Newton step with the curvature the scan showed, then secant steps, each kept inside
    the bracket, until a step moves t by less than SECANT_TOL or SECANT_MAX steps were made.
    Only an accelerator: the Newton check in ``_polish`` decides whether the result is the
    minimum and iterates on from it when it is not.
    """
    t = t0.copy()
    act = np.flatnonzero(ok & np.isfinite(t0))

    def slope_t(units: Index, at: Array) -> Array:
        d = np.exp(at) * span[units]
        return _projected(r[units], dv[units], d - r_min[units])[3] * d

    t_prev = t[act]
    g_prev = slope_t(act, t_prev)
    with np.errstate(divide="ignore", invalid="ignore"):
        newton = t_prev - g_prev / curvature[act]
    fallback = t_prev - np.sign(g_prev) * 1e-3
    t_cur = np.where(np.isfinite(newton) & (curvature[act] > 0), newton, fallback)
    t_cur = np.clip(t_cur, lo[act], hi[act])
    t[act] = t_cur
    with np.errstate(divide="ignore", invalid="ignore"):
        for _ in range(SECANT_MAX):
            moving = np.abs(t_cur - t_prev) > SECANT_TOL
            act, t_prev, g_prev, t_cur = act[moving], t_prev[moving], g_prev[moving], t_cur[moving]
            if not act.size:
                break
            g_cur = slope_t(act, t_cur)
            t_next = t_cur - g_cur * (t_cur - t_prev) / (g_cur - g_prev)
            t_next = np.clip(np.where(np.isfinite(t_next), t_next, t_cur), lo[act], hi[act])
            t[act] = t_next
            t_prev, g_prev, t_cur = t_cur, g_cur, t_next
    return t


def _polish(r: Array, v: Array, start: Array, ok: Mask) -> tuple[Array, Mask, Array]:
    """Newton iteration on (k, r0, v0) for the units in ``ok``: estimate, convergence, covariance.

    Every quantity comes from one stacked product F F^T, F = [x, -k x^2, 1, e, x^2, x^3] per
    unit (x = 1/(r + r0), e the residuals): J^T J, J^T e, the sum of squares and the two sums
    the model's second derivatives need (d2/dk dr0 = -x^2, d2/dr0^2 = 2 k x^3). The 3 x 3
    systems, in column-scaled parameters, are solved by cofactors (``_inverse3``).

    A unit has converged when the Gauss-Newton step would move its fitted values by less than
    LM_XTOL of their spread (||J delta||), or by less than LM_STALL and not half as much as the
    step before (an ill-conditioned unit's floor: the steps are rounding noise, no longer
    shrinking): the point is the minimum to the rounding floor; the step is not taken and the
    covariance is (J^T J)^-1 there.

    Otherwise a step is taken: Newton (the Hessian J^T J + sum e d2f) where that is positive
    definite, else Gauss-Newton, and J^T J + lambda I (Levenberg-Marquardt) after a step that
    failed. It is kept when it keeps the pole below the readings (r + r0 > 0) and does not raise
    the sum of squares, or is undamped and smaller than LM_TRUST of the spread: near the minimum
    a step's gain (its size squared) is below the rounding of the sum, which then cannot judge
    it, while the linearisation is exact far beyond that. Units still moving after LM_MAX_ITER
    iterations are reported as not converged (covariance NaN).
    """
    units = len(start)
    params = start.copy()
    converged = np.zeros(units, dtype=bool)
    cov = np.full((units, 3, 3), np.nan)
    lam = np.zeros(units)
    last = np.full(units, np.inf)  # the previous iteration's Gauss-Newton step, ||J delta||
    spread = np.sqrt(np.sum((v - v.mean(axis=1, keepdims=True)) ** 2, axis=1))
    active = np.flatnonzero(ok & np.isfinite(start).all(axis=1))
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        cost = np.full(units, np.inf)
        for _ in range(LM_MAX_ITER):
            if not active.size:
                break
            sel: Index | slice = slice(None) if active.size == units else active  # views if all
            ra, va, pa = r[sel], v[sel], params[sel]
            k = pa[:, 0]
            f = np.empty((len(ra), 6, ra.shape[1]))  # rows x, -k x^2, 1, e, x^2, x^3
            x, x2 = f[:, 0], f[:, 4]
            np.divide(1.0, ra + pa[:, 1:2], out=x)
            np.multiply(x, x, out=x2)
            np.multiply(x2, -k[:, None], out=f[:, 1])
            f[:, 2] = 1.0
            np.subtract(k[:, None] * x + pa[:, 2:3], va, out=f[:, 3])
            np.multiply(x2, x, out=f[:, 5])
            m = np.matmul(f, np.swapaxes(f, 1, 2))
            norms = np.sqrt(np.diagonal(m, axis1=1, axis2=2)[:, :3])
            scale = norms[:, :, None] * norms[:, None, :]
            gram = m[:, :3, :3] / scale
            grad = m[:, :3, 3] / norms
            cost[sel] = np.where(np.isfinite(cost[sel]), cost[sel], m[:, 3, 3])
            inverse, det = _inverse3(gram)
            step = -np.einsum("uij,uj->ui", inverse, grad)
            moved = np.sqrt(np.abs(np.einsum("ui,ui->u", step, -grad)))  # ||J_s step||
            usable = np.isfinite(step).all(axis=1) & np.isfinite(m).all(axis=(1, 2))
            # at the rounding floor: the step is negligible, or no longer shrinking (it is noise)
            spread_a = spread[sel]
            stalled = (moved <= LM_STALL * spread_a) & (moved > 0.5 * last[sel])
            floor = usable & ((moved <= LM_XTOL * spread_a) | stalled)
            last[sel] = moved
            if floor.all():  # the common case: every unit at its minimum at once
                converged[sel] = True
                cov[sel] = _finish_cov(inverse, det, scale, r[sel], pa, norms)
                break
            if floor.any():
                done = active[floor]
                converged[done] = True
                cov[done] = _finish_cov(
                    inverse[floor], det[floor], scale[floor], r[done], params[done], norms[floor]
                )
            go = usable & ~floor
            if not go.any():
                break
            active, pa, ra, va, m, norms = active[go], pa[go], ra[go], va[go], m[go], norms[go]
            gram, grad, step, moved = gram[go], grad[go], step[go], moved[go]
            hess = gram.copy()
            cross = m[:, 3, 4] / (norms[:, 0] * norms[:, 1])
            hess[:, 0, 1] -= cross
            hess[:, 1, 0] -= cross
            hess[:, 1, 1] += 2.0 * pa[:, 0] * m[:, 3, 5] / norms[:, 1] ** 2
            h_inverse, h_det = _inverse3(hess)
            newton = (hess[:, 0, 0] > 0) & (_minor2(hess) > 0) & (h_det > 0)
            newton &= np.isfinite(h_inverse).all(axis=(1, 2))
            step = np.where(newton[:, None], -np.einsum("uij,uj->ui", h_inverse, grad), step)
            la = lam[active]
            damped = la > 0
            if damped.any():
                d_inverse, _ = _inverse3(gram[damped] + la[damped, None, None] * np.eye(3))
                step[damped] = -np.einsum("uij,uj->ui", d_inverse, grad[damped])
            trial = pa + step / norms
            new_cost = _sse(ra, va, trial)
            small = (moved <= LM_TRUST * spread[active]) & ~damped
            better = (
                ((new_cost <= cost[active]) | small)
                & np.all(ra + trial[:, 1:2] > 0, axis=1)
                & np.isfinite(trial).all(axis=1)
                & np.isfinite(new_cost)
            )
            params[active[better]] = trial[better]
            cost[active[better]] = new_cost[better]
            lam[active] = np.where(
                better, np.where(la < 1e-6, 0.0, la * 0.1), np.maximum(la * 10.0, 1e-3)
            )
    return params, converged, cov


def _finish_cov(
    inverse: Array, det: Array, scale: Array, r: Array, params: Array, norms: Array
) -> Array:
    """(J^T J)^-1 from the scaled Gram matrix's inverse, or by the SVD where it is near singular
    (det < COV_DET_MIN), as fit() computes it there."""
    core = inverse.copy()
    hard = np.flatnonzero(~(det >= COV_DET_MIN))
    if hard.size:
        core[hard] = _svd_core(r[hard], params[hard], norms[hard])
    return np.asarray(core / scale)


def _inverse3(m: Array) -> tuple[Array, Array]:
    """Inverse and determinant of stacked symmetric 3 x 3 matrices, by cofactors.

    For the unit-diagonal Gram matrices here, with det >= COV_DET_MIN (condition number below
    ~3e5), the error is a few times cond * eps relative: ~1e-13 for a typical unit.
    """
    a, b, c = m[:, 0, 0], m[:, 0, 1], m[:, 0, 2]
    d, e, f = m[:, 1, 1], m[:, 1, 2], m[:, 2, 2]
    c00, c01, c02 = d * f - e * e, c * e - b * f, b * e - c * d
    c11, c12, c22 = a * f - c * c, b * c - a * e, a * d - b * b
    det = a * c00 + b * c01 + c * c02
    rows = [[c00, c01, c02], [c01, c11, c12], [c02, c12, c22]]
    inverse = np.stack([np.stack(row, axis=-1) for row in rows], axis=1)
    return inverse / det[:, None, None], det


def _minor2(m: Array) -> Array:
    return np.asarray(m[:, 0, 0] * m[:, 1, 1] - m[:, 0, 1] * m[:, 1, 0])


def _svd_core(r: Array, params: Array, norms: Array) -> Array:
    """(J_s^T J_s)^-1 by the SVD of the column-scaled Jacobian, as ``unscaled_covariance``;
    NaN where its singular values span more than 1e12 (fit() raises SingularFit there)."""
    x = 1.0 / (r + params[:, 1:2])
    jac = np.stack([x, -params[:, 0:1] * x**2, np.ones_like(x)], axis=-1)
    _, s, vt = np.linalg.svd(jac / norms[:, None, :], full_matrices=False)
    w = np.swapaxes(vt, 1, 2) / s[:, None, :]
    regular = s.min(axis=1) > 1e-12 * s.max(axis=1)
    return np.where(regular[:, None, None], np.matmul(w, np.swapaxes(w, 1, 2)), np.nan)


def _sse(r: Array, v: Array, params: Array) -> Array:
    resid = params[:, 0:1] / (r + params[:, 1:2]) + params[:, 2:3] - v
    return np.asarray(np.sum(resid * resid, axis=1))


# -- noise in the reading -----------------------------------------------------------------------
def values_inverse_offset(fam: Family, opts: Mapping[str, Any], params: Array, r: Array) -> Array:
    """k / (r + r0) + v0 at ``r`` (units, m) for parameters (units, 3)."""
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        return np.asarray(params[:, 0:1] / (r + params[:, 1:2]) + params[:, 2:3])


def reading_inverse_offset(fam: Family, opts: Mapping[str, Any], r: Array, v: Array) -> Solved:
    """The effective-variance fit (``shared.batch_reading``) of inverse_offset units.

    The start is algebraic: (v - v0)(r + r0) = k is linear in (r0, v0, k + v0 r0) as
    v r = -r0 v + v0 r + c, solved by least squares for all units at once; where that start is
    unusable (a pole inside the readings), the fit the other way round (the readings as an
    inverse_offset function of the values, r = k / (v - v0) - r0, the same curve: the family is
    its own inverse), by the batched value-noise solver with the roles swapped.
    f' = -k x^2 and its derivatives (-x^2, 2 k x^3, 0), x = 1/(r + r0); steps that would put the
    pole r = -r0 at or above a reading are refused.
    """
    from shared.batch_reading import Curvature, effective_variance

    units, n = r.shape
    start = _algebraic_start(r, v)
    with np.errstate(invalid="ignore"):
        usable = np.isfinite(start).all(axis=1) & np.all(r + start[:, 1:2] > 0, axis=1)
    ok = np.ones(units, dtype=bool)
    rest = np.flatnonzero(~usable)
    if rest.size:  # the fit the other way round (the readings from the values), by the scan
        swapped = solve_inverse_offset(fam, opts, v[rest], r[rest])
        start[rest] = np.stack(
            [swapped.params[:, 0], -swapped.params[:, 2], -swapped.params[:, 1]], axis=1
        )
        with np.errstate(invalid="ignore"):
            ok[rest] = swapped.ok & np.all(r[rest] + start[rest, 1:2] > 0, axis=1)
    ok &= basic_ok(r, 3)
    buf_f = np.empty((units, n, 3))
    buf_g = np.empty((units, n, 3))

    def model(theta: Array, rows: Index) -> tuple[Array, Array, Array, Array, Curvature]:
        rr = r[rows]
        k = theta[:, 0:1]
        x = 1.0 / (rr + theta[:, 1:2])
        x2 = x * x
        jf, jg = buf_f[: len(rows)], buf_g[: len(rows)]
        jf[:, :, 0] = x
        np.multiply(-k, x2, out=jf[:, :, 1])
        jf[:, :, 2] = 1.0
        np.negative(x2, out=jg[:, :, 0])
        np.multiply(2.0 * k, x2 * x, out=jg[:, :, 1])
        jg[:, :, 2] = 0.0

        def curvature(c1: Array, c2: Array) -> Array:
            """d2f: (k, r0) -x^2, (r0, r0) 2k x^3; d2f': (k, r0) 2x^3, (r0, r0) -6k x^4."""
            x3 = x2 * x
            out = np.zeros((len(rows), 3, 3))
            out[:, 0, 1] = out[:, 1, 0] = np.einsum("un,un->u", -c1 + 2.0 * c2 * x, x2)
            out[:, 1, 1] = 2.0 * k[:, 0] * np.einsum("un,un->u", c1 - 3.0 * c2 * x, x3)
            return out

        return k * x + theta[:, 2:3], jf, jf[:, :, 1], jg, curvature

    def admissible(theta: Array, rows: Index) -> Mask:
        return np.asarray(np.all(r[rows] + theta[:, 1:2] > 0, axis=1))

    scale = np.maximum(np.abs(r).max(axis=1), 1e-300)
    params, cov, converged = effective_variance(model, admissible, v, scale, start, ok)
    ok &= converged
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        x = 1.0 / (r + params[:, 1:2])
        residuals = v - (params[:, 0:1] * x + params[:, 2:3])
        weights = 1.0 / (params[:, 0:1] * x * x) ** 2
        ok &= np.all(r + params[:, 1:2] > 0, axis=1)
    ok &= np.isfinite(residuals).all(axis=1) & np.isfinite(weights).all(axis=1)
    ok &= np.isfinite(cov).all(axis=(1, 2))
    # monotone by construction, as for the value-noise fit (no pole inside the valid range)
    return Solved(ok, params, cov, residuals, np.ones(units, dtype=bool), weights)


ALGEBRAIC_PASSES = 1  # reweighted passes of the algebraic start


def _algebraic_start(r: Array, v: Array) -> Array:
    """(k, r0, v0) from v r = -r0 v + v0 r + c, c = k + v0 r0, by least squares: first
    unweighted, then once more weighted by 1 / (v - v0)^2 with that v0, which makes each
    equation's error the reading's noise (its residual is (v - v0) times the reading's error):
    close to the effective-variance minimum, so that few Newton steps remain."""
    found = _algebraic(r, v, np.ones_like(r))
    for _ in range(ALGEBRAIC_PASSES):
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            w = 1.0 / (v - found[2][:, None]) ** 2
        usable = np.isfinite(w).all(axis=1) & np.all(w > 0, axis=1)
        found = _algebraic(r, v, np.where(usable[:, None], w, 1.0))
    return np.stack(found, axis=1)


def _algebraic(r: Array, v: Array, w: Array) -> tuple[Array, Array, Array]:
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        sw = w.sum(axis=1, keepdims=True)
        y = v * r
        mr, mv, my = ((w * x).sum(axis=1, keepdims=True) / sw for x in (r, v, y))
        rc, vc, yc = r - mr, v - mv, y - my
        g00 = (w * vc * vc).sum(axis=1)
        g01 = (w * vc * rc).sum(axis=1)
        g11 = (w * rc * rc).sum(axis=1)
        h0 = (w * vc * yc).sum(axis=1)
        h1 = (w * rc * yc).sum(axis=1)
        det = g00 * g11 - g01 * g01
        a = (g11 * h0 - g01 * h1) / det
        b = (g00 * h1 - g01 * h0) / det
        c = my[:, 0] - a * mv[:, 0] - b * mr[:, 0]
        r0, v0 = -a, b
        return c - v0 * r0, r0, v0
