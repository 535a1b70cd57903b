"""Batched fits with the noise in the reading (``noise="reading"``), for ``shared.batch``.

fit() minimises the effective-variance objective sum e_i^2, e_i = (v_i - f(r_i)) / |f'(r_i)|:
each residual measured in reading units (see ``shared.fitting``). Here the same objective is
minimised for all units of a group at once, from each unit's value-noise solution, by
Newton steps (where the full Hessian J^T J + sum e d2e/dtheta2 is positive definite; Gauss-Newton
otherwise, Levenberg-Marquardt damping after a step that failed) on stacked p x p systems with
the analytic derivatives

    de/dtheta = -(J_f + e sign(f') J_f') / |f'|,

J_f = df/dtheta, J_f' = df'/dtheta and their second derivatives given by the family's
``EvModel``. (Gauss-Newton alone converges only linearly here: the residuals are not small
against the curvature of e, and took a dozen steps.) A unit has converged when
a Gauss-Newton step would move its normalised residuals by less than EV_XTOL of their root sum
of squares (the parameters are then within ~EV_XTOL of a standard uncertainty of the minimum,
and that last step, taken, brings them closer still),
by less than EV_FLOOR of the readings' scale (an exact fit's rounding floor), or by less than
EV_STALL and not half as much as the step before (the steps are rounding noise). Near the
minimum an undamped step smaller than EV_TRUST is taken even when the rounded sum of squares
cannot see it fall. The unscaled covariance is (J^T J)^-1 of the normalised
residuals at the estimate, as fit() takes it; a unit whose Jacobian is near singular there (the
singular values of the column-scaled Jacobian more than 1e12 apart, fit()'s rule), whose slope
is zero or not finite at a point, or that has not converged after EV_MAX_ITER steps is left
out (``ok`` False): fit() then fits it, or raises.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from shared.batch_common import Index, Mask
from shared.families.base import Array

EV_MAX_ITER = 60  # Levenberg-Marquardt steps at most
EV_XTOL = 1e-7  # converged: a Gauss-Newton step moves the normalised residuals by less than
# this fraction of their root sum of squares ...
EV_FLOOR = 1e-13  # ... or by less than this fraction of the readings' scale
EV_STALL = 1e-8  # ... or by less than this fraction and not half the previous step (rounding)
EV_TRUST = 1e-6  # an undamped step this small (relative) is taken: its gain is below the
# rounding of the sum of squares, which cannot judge it

# (c1, c2) -> sum_i c1_i d2f_i/dtheta2 + c2_i d2f'_i/dtheta2: (u, p, p); None where both are 0
Curvature = Callable[[Array, Array], Array] | None
# (theta, rows) -> f, J_f, f', J_f' at the rows' points: (u, n), (u, n, p), (u, n), (u, n, p),
# and the curvature contraction
EvModel = Callable[[Array, Index], tuple[Array, Array, Array, Array, Curvature]]
# theta -> True where the parameters are admissible (e.g. no pole inside the readings)
Admissible = Callable[[Array, Index], Mask]


def effective_variance(
    model: EvModel,
    admissible: Admissible,
    v: Array,
    reading_scale: Array,
    start: Array,
    ok: Mask,
) -> tuple[Array, Array, Mask]:
    """Minimise sum((v - f) / |f'|)^2 per unit: (theta, unscaled covariance, converged).

    ``v``: (units, n) values; ``reading_scale``: (units,) a size of the readings (for the exact-
    fit floor); ``start``: (units, p); ``ok``: the units to fit.
    """
    units, p = start.shape
    theta = start.copy()
    cov = np.full((units, p, p), np.nan)
    done = np.zeros(units, dtype=bool)
    lam = np.zeros(units)
    cost = np.full(units, np.inf)
    last = np.full(units, np.inf)
    active = np.flatnonzero(ok & np.isfinite(start).all(axis=1))
    eye = np.eye(p)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for _ in range(EV_MAX_ITER):
            if not active.size:
                break
            th = theta[active]
            e, cols, good, second = _normalised(model, th, v[active], active)
            c = _dot(e, e)
            cost[active] = np.where(np.isfinite(cost[active]), cost[active], c)
            # J^T J, J^T e and the column norms from the Jacobian's columns (p small: sums of
            # products of (units, n) arrays, much faster than stacked matrix products)
            raw = np.empty((len(active), p, p))
            for a in range(p):
                for b in range(a + 1):
                    raw[:, a, b] = raw[:, b, a] = _dot(cols[a], cols[b])
            norms = np.sqrt(np.diagonal(raw, axis1=1, axis2=2))
            good &= np.all(norms > 0, axis=1) & np.isfinite(norms).all(axis=1)
            norms = np.where(good[:, None], norms, 1.0)
            gram = raw / (norms[:, :, None] * norms[:, None, :])
            grad = np.stack([_dot(cols[a], e) for a in range(p)], axis=1) / norms
            safe = np.where(good[:, None, None], gram, eye)
            step = -_solve(safe, grad)
            moved = np.sqrt(np.abs(np.einsum("up,up->u", step, -grad)))  # ||J_s step||
            # Newton where the full Hessian (J^T J + sum e d2e) is positive definite
            hess = safe + second / (norms[:, :, None] * norms[:, None, :])
            hess = np.where(np.isfinite(hess), hess, eye)
            newton = _positive_definite(hess)
            if newton.any():
                step[newton] = -_solve(hess[newton], grad[newton])
            root = np.sqrt(c)
            stalled = (moved <= EV_STALL * root) & (moved > 0.5 * last[active])
            last[active] = moved
            floor = good & (
                (moved <= EV_XTOL * root) | (moved <= EV_FLOOR * reading_scale[active]) | stalled
            )
            if floor.any():
                fin = active[floor]
                done[fin] = True
                cov[fin] = _covariance(safe[floor], norms[floor])
                # the last (Newton) step is taken unjudged: below EV_XTOL, it halves the
                # distance to the minimum's rounding floor or better at no cost (the covariance
                # moves by far less than it can be known)
                last_step = th[floor] + step[floor] / norms[floor]
                take = admissible(last_step, fin) & np.isfinite(last_step).all(axis=1)
                theta[fin[take]] = last_step[take]
            go = good & ~floor
            dropped = ~good
            if dropped.any():
                active_bad = active[dropped]
                done[active_bad] = False
            active, th, step, grad, safe, norms, moved, root = (
                active[go],
                th[go],
                step[go],
                grad[go],
                safe[go],
                norms[go],
                moved[go],
                root[go],
            )
            if not active.size:
                break
            la = lam[active]
            damped = la > 0
            if damped.any():
                lm = safe[damped] + la[damped, None, None] * eye
                step[damped] = -np.linalg.solve(lm, grad[damped][:, :, None])[:, :, 0]
            trial = th + step / norms
            fine = admissible(trial, active) & np.isfinite(trial).all(axis=1)
            # a small undamped step is taken without costing it (the rounded cost cannot judge
            # it); its cost is taken afresh at the next iteration
            small = (moved <= EV_TRUST * root) & ~damped & fine
            new_cost = np.full(len(active), np.inf)
            judge = np.flatnonzero(~small & fine)
            if judge.size:
                rows = active[judge]
                e_t, _, ok_t, _ = _normalised(model, trial[judge], v[rows], rows, jacobian=False)
                new_cost[judge] = np.where(ok_t, np.einsum("un,un->u", e_t, e_t), np.inf)
            better = small | (fine & (new_cost <= cost[active]))
            theta[active[better]] = trial[better]
            cost[active[better]] = new_cost[better]
            lam[active] = np.where(
                better, np.where(la < 1e-6, 0.0, la * 0.1), np.maximum(la * 10.0, 1e-3)
            )
    return theta, cov, done


def _dot(a: Array, b: Array) -> Array:
    """Row-wise dot products of two (units, n) arrays."""
    return np.asarray(np.einsum("un,un->u", a, b))


def _normalised(
    model: EvModel, theta: Array, v: Array, rows: Index, *, jacobian: bool = True
) -> tuple[Array, list[Array], Mask, Array]:
    """e = (v - f) / |f'|, the columns of its Jacobian, ``good`` (f' non-zero and everything
    finite) and sum_i e_i d2e_i/dtheta2 (the Hessian's second-order part, halved).

    With u = v - f and w = |f'|: de = (du - e dw) / w and
    d2e = (d2u - e d2w - dw de^T - de dw^T) / w.
    """
    f, jf, g, jg, curvature = model(theta, rows)
    size = np.abs(g)
    e = (v - f) / size
    good = np.all(size > 0, axis=1) & np.isfinite(e).all(axis=1)
    if not jacobian:
        return e, [], good, e
    p = theta.shape[1]
    sign = np.sign(g)
    inv_size = 1.0 / size
    es = e * sign
    cols = [-(jf[:, :, k] + es * jg[:, :, k]) * inv_size for k in range(p)]
    good &= np.all([np.isfinite(col).all(axis=1) for col in cols], axis=0)
    weighted = [(e * inv_size) * sign * jg[:, :, k] for k in range(p)]  # a sign(f') d w / dtheta
    second = np.empty((len(theta), p, p))
    for a in range(p):
        for b in range(a + 1):
            m = _dot(weighted[a], cols[b]) + _dot(weighted[b], cols[a])
            second[:, a, b] = second[:, b, a] = -m
    if curvature is not None:
        second = second + curvature(-e * inv_size, -e * inv_size * e * sign)
    return e, cols, good, second


def _solve(m: Array, rhs: Array) -> Array:
    """Stacked small systems m x = rhs; 3 x 3 by cofactors (much faster than LAPACK per matrix
    for well-conditioned, column-scaled matrices like these), others by ``np.linalg.solve``."""
    if m.shape[1] != 3:
        return np.asarray(np.linalg.solve(m, rhs[:, :, None])[:, :, 0])
    a, b, c = m[:, 0, 0], m[:, 0, 1], m[:, 0, 2]
    d, e, f = m[:, 1, 1], m[:, 1, 2], m[:, 2, 2]
    b2, c2, e2 = m[:, 1, 0], m[:, 2, 0], m[:, 2, 1]
    # cofactors of a general 3 x 3 (the damped and Newton matrices are symmetric, but keep it
    # general): inverse = adjugate / det
    c00, c01, c02 = d * f - e * e2, -(b2 * f - e * c2), b2 * e2 - d * c2
    c10, c11, c12 = -(b * f - c * e2), a * f - c * c2, -(a * e2 - b * c2)
    c20, c21, c22 = b * e - c * d, -(a * e - c * b2), a * d - b * b2
    det = a * c00 + b * c01 + c * c02
    r0, r1, r2 = rhs[:, 0], rhs[:, 1], rhs[:, 2]
    return np.stack(
        [
            (c00 * r0 + c10 * r1 + c20 * r2) / det,
            (c01 * r0 + c11 * r1 + c21 * r2) / det,
            (c02 * r0 + c12 * r1 + c22 * r2) / det,
        ],
        axis=1,
    )


def _positive_definite(m: Array) -> Mask:
    """Stacked symmetric matrices, True where positive definite (Sylvester: every leading
    principal minor > 0, relative to the diagonal's product)."""
    p = m.shape[1]
    if p == 3:
        a, b, c = m[:, 0, 0], m[:, 0, 1], m[:, 0, 2]
        d, e, f = m[:, 1, 1], m[:, 1, 2], m[:, 2, 2]
        minor2 = a * d - b * b
        det = a * (d * f - e * e) - b * (b * f - c * e) + c * (b * e - c * d)
        return np.asarray(
            (a > 0) & (minor2 > 1e-12 * np.abs(a * d)) & (det > 1e-12 * np.abs(a * d * f))
        )
    ok = np.ones(len(m), dtype=bool)
    for k in range(1, p + 1):
        minor = np.linalg.det(m[:, :k, :k]) if k > 1 else m[:, 0, 0]
        scale = np.prod(np.abs(np.diagonal(m[:, :k, :k], axis1=1, axis2=2)), axis=1)
        ok &= minor > 1e-12 * scale
    return ok


def _covariance(gram: Array, norms: Array) -> Array:
    """(J^T J)^-1 from the scaled Gram matrix; NaN where the column-scaled Jacobian's singular
    values span more than 1e12 (fit() raises SingularFit there)."""
    eig = np.linalg.eigvalsh(gram)
    regular = eig[:, 0] > (1e-12) ** 2 * eig[:, -1]
    inverse = np.linalg.inv(np.where(regular[:, None, None], gram, np.eye(gram.shape[1])))
    core = inverse / (norms[:, :, None] * norms[:, None, :])
    return np.where(regular[:, None, None], core, np.nan)
