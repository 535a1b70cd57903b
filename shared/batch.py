"""fit_many's engine: one family fitted to many units at once, vectorised across the units.

``fit_many(family, datasets, **options)`` returns what ``[fit(family, r, v, **options) for r, v in
datasets]`` returns, computed as array operations over all the units that share a point count
instead of one Python-level solve per unit. The batch path covers the common case; everything else
goes to ``fit()`` unit by unit, so every result means the same thing either way.

Batched (noise="value", no u_value / u_reading / exclude, a family without option hooks):

* ``line`` and ``polynomial`` (any degree, through_zero or not): fit()'s own solver, each step on
  stacked arrays: QR of the column-equilibrated design in the centred, scaled Chebyshev basis, the
  double-double refinement of the raw coefficients, compensated Horner evaluation (the pieces of
  ``shared.families._monomial``). The refinement converges to the least-squares solution of the
  given doubles rounded to doubles, so the parameters come out as fit()'s (bit for bit in our
  tests; the covariance within an ulp or two).
* ``inverse_offset``: fit()'s variable-projection scan over r0 (the same grid) in closed form for
  units x points x scan points at once: first in single precision with an error bound, then the
  candidates in double precision, which gives exactly the best point of a full double-precision
  scan (fit() forms the residuals explicitly instead; the two could only disagree on a near tie).
  Then, instead of fit()'s bounded Brent search and MINPACK polish, the root of the projected
  cost's derivative by secant steps from the parabola through the scan, and a batched Newton
  check of (k, r0, v0): a unit is done when a Newton step would move its fitted values by less
  than 1e-13 of their spread (or the steps stall at the rounding floor), otherwise it is iterated
  (Newton / Levenberg-Marquardt, 3 x 3 systems on stacked arrays). The covariance is
  (J^T J)^-1 at the estimate, from the same sums (by SVD where near singular, as in fit()).
  Both paths reach the same least-squares minimum; this one to the rounding floor, while MINPACK
  stops once it can no longer see the sum of squares fall: with rho = eps max|value| / rse,
  fit()'s parameters lie ~sqrt(rho) standard uncertainties from the minimum (~1e-6 u for
  realistic noise), and the results agree to that, not bit for bit.
* fold-back detection: a vectorised test proves for most units that ``find_foldback`` finds no
  turnover (no extreme reading with levels beyond it and enough reversal); the others are checked
  with ``find_foldback`` itself, and a unit with a fold-back goes to ``fit``.
* residuals, dof, rse, scale, valid range and the monotonicity check on ``MONOTONE_GRID`` points
  with fit()'s formulas, batched (for inverse_offset the check holds by construction, see
  ``_solve_inverse_offset``); the Fit objects share read-only arrays, one row per unit.

Goes to ``fit`` unit by unit: any other family; a family with ``bind_options``,
``interpolates`` or fitted in the reading direction; noise="reading", u_value, u_reading or a
non-empty exclude; a unit whose points are not equal-length finite numbers, with too few points
or equal readings, with a fold-back, or whose batched solve does not converge or meets a
condition under which ``fit`` raises (singular basis, no curvature, pole inside the readings,
singular Jacobian, non-finite values). A unit that makes ``fit`` raise makes ``fit_many`` raise
the same error type, its message prefixed with the unit's index ("unit 7: ..."); when several
would, the first one's.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, fields
from itertools import repeat, starmap
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from shared.errors import BadInput, CalibrationError
from shared.families import get_family
from shared.families._monomial import (
    REFINE_STEPS,
    MonomialFamily,
    _accurate_sum,
    _binomials,
    _chebyshev_monomials,
    _dd_times,
    _fast_two_sum,
    _split,
    _two_prod,
    _two_sum,
)
from shared.families.base import Array, Family
from shared.families.inverse_offset import SCAN, InverseOffset
from shared.fitting import MONOTONE_GRID, Fit, direction_of, fit
from shared.foldback import MIN_REVERSAL, find_foldback

Mask = NDArray[np.bool_]
Index = NDArray[np.intp]

FIT_KEYWORDS = ("noise", "u_value", "u_reading", "relative", "exclude")  # fit()'s own keywords
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
_EPS = float(np.finfo(np.float64).eps)


@dataclass(frozen=True, slots=True)
class _Solved:
    """Batched results for the units of one group that the batch path could finish (``ok``)."""

    ok: Mask
    params: Array  # (units, p)
    cov_unscaled: Array  # (units, p, p)
    residuals: Array  # (units, n): value - f(reading)
    monotone: Mask


def fit_many(
    family: str, datasets: Iterable[tuple[ArrayLike, ArrayLike]], **options: Any
) -> list[Fit]:
    """Fit ``family`` to each unit's (reading, value) points: the results of ``fit`` one by one.

    ``options`` are ``fit``'s keywords (noise, u_value, u_reading, relative, exclude) and the
    family's options, applied to every unit. Raises like ``fit`` for the first unit it cannot
    fit, with the unit's index at the start of the message.
    """
    fam = get_family(family)
    fam_options = {k: val for k, val in options.items() if k not in FIT_KEYWORDS}
    opts = fam.check_options(fam_options)  # a bad name is an error even with no units
    noise = options.get("noise", "value")
    if noise not in ("value", "reading"):
        raise BadInput(f"noise must be 'value' or 'reading', not {noise!r}")
    units = list(datasets)
    out = _batched(fam, opts, units, options)
    for i, unit in enumerate(units):
        if out[i] is None:
            out[i] = _fit_one(i, family, unit, options)
    return [f for f in out if f is not None]


def fit_each(
    family: str, datasets: Iterable[tuple[ArrayLike, ArrayLike]], **options: Any
) -> list[Fit | CalibrationError]:
    """``fit_many``, except that a unit ``fit`` cannot fit gives its error in its place (the
    message as ``fit`` words it, without the unit's index) instead of raising: for callers that
    keep going past a unit, e.g. a ranking where some families fail on some units."""
    fam = get_family(family)
    opts = fam.check_options({k: val for k, val in options.items() if k not in FIT_KEYWORDS})
    if options.get("noise", "value") not in ("value", "reading"):
        raise BadInput(f"noise must be 'value' or 'reading', not {options.get('noise')!r}")
    units = list(datasets)
    found: list[Fit | CalibrationError | None] = list(_batched(fam, opts, units, options))
    for i, (reading, value) in enumerate(units):
        if found[i] is None:
            try:
                found[i] = fit(family, reading, value, **options)
            except CalibrationError as exc:
                found[i] = exc
    return [f for f in found if f is not None]


def _batched(
    fam: Family, opts: Mapping[str, Any], units: list[Any], options: Mapping[str, Any]
) -> list[Fit | None]:
    """The units the batch path fits (None for the others, left to ``fit``)."""
    out: list[Fit | None] = [None] * len(units)
    solver = _batch_solver(fam, options)
    if solver is not None:
        for _n, idx, r, v in _groups(units):
            solved = solver(fam, opts, r, v)
            _collect(out, fam, opts, idx, r, v, solved)
    return out


def _fit_one(i: int, family: str, unit: Any, options: Mapping[str, Any]) -> Fit:
    reading, value = unit
    try:
        return fit(family, reading, value, **options)
    except CalibrationError as exc:
        raise type(exc)(f"unit {i}: {exc}") from exc


# -- which units the batch path takes ----------------------------------------------------------
Solver = Callable[[Family, Mapping[str, Any], Array, Array], _Solved]


def _batch_solver(fam: Family, options: Mapping[str, Any]) -> Solver | None:
    """The batched solver for this family and these options, or None: all units go to fit()."""
    if options.get("noise", "value") != "value" or options.get("exclude"):
        return None
    if options.get("u_value") is not None or options.get("u_reading") is not None:
        return None
    if getattr(fam, "bind_options", None) is not None or getattr(fam, "interpolates", False):
        return None
    if direction_of(fam) != "value_from_reading":
        return None
    if isinstance(fam, MonomialFamily):
        return _solve_monomial
    if isinstance(fam, InverseOffset):
        return _solve_inverse_offset
    return None


def _groups(units: list[Any]) -> list[tuple[int, Index, Array, Array]]:
    """Units that read as finite, equal-length points, grouped by point count: (n, index, r, v).

    A unit that does not (ragged, not numbers, NaN) is left out: fit() reports it.
    """
    try:  # the common case: every unit the same length, one conversion for all
        stacked = np.asarray(units, dtype=np.float64)
    except (TypeError, ValueError):
        stacked = None
    if stacked is not None and stacked.ndim == 3 and stacked.shape[1] == 2:
        by_size = {stacked.shape[2]: (list(range(len(units))), stacked[:, 0], stacked[:, 1])}
    else:
        rows: dict[int, tuple[list[int], list[Array], list[Array]]] = {}
        for i, unit in enumerate(units):
            try:
                reading, value = unit
                r = np.asarray(reading, dtype=np.float64).ravel()
                v = np.asarray(value, dtype=np.float64).ravel()
            except (TypeError, ValueError):
                continue
            if r.shape != v.shape:
                continue
            entry = rows.setdefault(r.size, ([], [], []))
            entry[0].append(i)
            entry[1].append(r)
            entry[2].append(v)
        by_size = {
            n: (idx, np.array(rs).reshape(len(idx), n), np.array(vs).reshape(len(idx), n))
            for n, (idx, rs, vs) in rows.items()
        }
    groups = []
    for n, (idx, r, v) in sorted(by_size.items()):
        finite = np.isfinite(r).all(axis=1) & np.isfinite(v).all(axis=1)
        index = np.asarray(idx, dtype=np.intp)
        if not finite.all():
            index, r, v = index[finite], r[finite], v[finite]
        if n > 0 and index.size:
            groups.append((n, index, np.ascontiguousarray(r), np.ascontiguousarray(v)))
    return groups


# -- building the Fit objects ------------------------------------------------------------------
def _frozen_rows(a: ArrayLike, dtype: type = np.float64) -> NDArray[Any]:
    """A read-only copy; its rows (views) are read-only too and cannot be made writeable."""
    arr: NDArray[Any] = np.array(a, dtype=dtype)
    arr.setflags(write=False)
    return arr


# the Fit fields fit() sets, in declaration order: passed positionally, which saves a third of
# the cost of building 10,000 Fits; should Fit's fields change, the names are used instead
_FIT_FIELDS = (
    "family", "options", "params", "covariance", "dof", "rse", "scale", "sigma_source", "noise",
    "noise_value_sd", "noise_reading_sd", "reading", "value", "used", "weights", "residuals",
    "excluded", "valid_range", "monotone",
)  # fmt: skip


def _fit_maker() -> Callable[..., Fit]:
    if tuple(f.name for f in fields(Fit))[: len(_FIT_FIELDS)] == _FIT_FIELDS:
        return Fit
    return lambda *args: Fit(**dict(zip(_FIT_FIELDS, args, strict=True)))


def _collect(
    out: list[Fit | None],
    fam: Family,
    opts: Mapping[str, Any],
    idx: Index,
    r: Array,
    v: Array,
    solved: _Solved,
) -> None:
    """One Fit per unit the batch finished, as fit() builds it for a unit with no exclusions.

    The arrays of all units are made read-only once; each Fit holds row views of them.
    """
    ok = np.flatnonzero(solved.ok)
    if not ok.size:
        return
    n = r.shape[1]
    names = fam.param_names(opts)
    dof = n - len(names)
    resid = solved.residuals[ok]
    scale = np.sqrt(np.sum(resid**2, axis=1) / dof)  # unit weights: scale == rse, as in fit()
    cov = _frozen_rows(solved.cov_unscaled[ok] * (scale**2)[:, None, None])
    used = _frozen_rows(np.ones(n, dtype=bool), dtype=bool)
    weights = _frozen_rows(np.ones(n))
    count = len(ok)
    params = [dict(zip(names, p, strict=False)) for p in solved.params[ok].tolist()]
    scales = scale.tolist()
    args = zip(
        repeat(fam.name, count),
        map(dict, repeat(opts, count)),  # each Fit its own options, as from fit()
        params,
        list(cov),
        repeat(dof, count),
        scales,  # rse
        scales,  # scale
        repeat("residuals", count),
        repeat("value", count),
        scales,  # noise_value_sd
        repeat(0.0, count),  # noise_reading_sd
        list(_frozen_rows(r[ok])),
        list(_frozen_rows(v[ok])),
        repeat(used, count),
        repeat(weights, count),
        list(_frozen_rows(resid)),
        repeat((), count),  # excluded
        zip(r[ok].min(axis=1).tolist(), r[ok].max(axis=1).tolist(), strict=True),  # valid_range
        solved.monotone[ok].tolist(),
        strict=True,
    )
    for i, made in zip(idx[ok].tolist(), starmap(_fit_maker(), args), strict=True):
        out[i] = made


def _monotone(values: Array) -> Mask:
    """Row by row, as fit() judges it: every step of the curve on the grid >= 0, or every <= 0."""
    steps = np.diff(values, axis=1)
    return np.asarray(np.all(steps >= 0, axis=1) | np.all(steps <= 0, axis=1))


def _grid(r: Array) -> Array:
    """fit()'s monotonicity grid for each unit: MONOTONE_GRID points over its valid range."""
    return np.asarray(np.linspace(r.min(axis=1), r.max(axis=1), MONOTONE_GRID, axis=1))


def _basic_ok(r: Array, n_params: int) -> Mask:
    """Enough points (parameters + 1) and readings that vary; otherwise fit() raises."""
    varies: Mask = np.ptp(r, axis=1) > 0
    return varies if r.shape[1] >= n_params + 1 else np.zeros_like(varies)


# -- line and polynomial ------------------------------------------------------------------------
def _solve_monomial(fam: Family, opts: Mapping[str, Any], r: Array, v: Array) -> _Solved:
    assert isinstance(fam, MonomialFamily)
    powers = fam.powers(opts)
    degree = fam.degree(opts)
    p = len(powers)
    units = len(r)
    ok = _basic_ok(r, p)
    if not ok.any():  # too few points (fit() raises TooFewPoints) or no spread in the readings
        return _Solved(ok, np.zeros((units, p)), np.zeros((units, p, p)), np.zeros_like(r), ok)
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
        curve = _polyval(raw, _grid(r))
    residuals = v - fitted
    ok &= np.isfinite(fitted).all(axis=1) & np.isfinite(curve).all(axis=1)
    ok &= np.isfinite(params).all(axis=1)
    cov_raw = np.matmul(np.matmul(to_raw, cov), np.swapaxes(to_raw, 1, 2))
    return _Solved(ok, params, cov_raw, residuals, _monotone(curve))


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
    pow_hi, pow_lo = [np.ones_like(reading)], [np.zeros_like(reading)]
    for _ in range(max(powers)):
        prod, err = _two_prod(pow_hi[-1], reading, reading_split)
        hi, lo = _fast_two_sum(prod, err + pow_lo[-1] * reading)
        pow_hi.append(hi)
        pow_lo.append(lo)
    ones = np.ones_like(reading)
    wr_p, wr_e = _two_prod(resid_hi, ones, _split(ones))
    wr_hi, wr_lo = _fast_two_sum(wr_p, wr_e + resid_lo * ones)
    t_hi, t_lo = _dd_times(
        np.stack([pow_hi[k] for k in powers], axis=-1),
        np.stack([pow_lo[k] for k in powers], axis=-1),
        wr_hi[:, :, None],
        wr_lo[:, :, None],
    )
    return _column_sums(t_hi, t_lo)


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
        done = active & np.all(np.abs(change) <= 2 * _EPS * np.abs(params), axis=1)
        result[done] = params[done]
        active &= ~done
    result[active] = best[active]
    return result


# -- inverse_offset -----------------------------------------------------------------------------
def _solve_inverse_offset(fam: Family, opts: Mapping[str, Any], r: Array, v: Array) -> _Solved:
    units, n = r.shape
    ok = _basic_ok(r, 3)
    if not ok.any():  # too few points (fit() raises TooFewPoints) or no spread in the readings
        return _Solved(ok, np.zeros((units, 3)), np.zeros((units, 3, 3)), np.zeros_like(r), ok)
    ok &= _no_foldback(r, v)
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
    return _Solved(ok, params, cov, residuals, np.ones(units, dtype=bool))


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


def _no_foldback(r: Array, v: Array) -> Mask:
    """True where ``find_foldback`` finds no turnover; those that might have one are checked.

    The vectorised test covers units whose reference values are all different (each level one
    point, so a level's mean reading is the reading): a candidate needs the extreme reading to
    leave at least one level beyond it but fewer than on the main side, and a reversal of at least
    MIN_REVERSAL of the span (taken with a 1 % margin); with no candidate there is no fold-back.
    Every other unit is checked by ``find_foldback`` itself.
    """
    units, n = r.shape
    sure = np.ones(units, dtype=bool)
    if n >= 5:
        if np.array_equal(v, np.broadcast_to(v[0], v.shape)):  # the same reference values
            order0 = np.argsort(v[0], kind="stable")
            vs, rs = v[:, order0], r[:, order0]
        else:
            order = np.argsort(v, axis=1, kind="stable")
            vs = np.take_along_axis(v, order, axis=1)
            rs = np.take_along_axis(r, order, axis=1)
        sure = np.all(np.diff(vs, axis=1) > 0, axis=1)
        limit = 0.99 * MIN_REVERSAL * np.ptp(r, axis=1)
        rows = np.arange(units)
        for idx in (np.argmax(rs, axis=1), np.argmin(rs, axis=1)):
            peak = rs[rows, idx]
            below = (idx >= 1) & (idx < n - 1 - idx) & (np.abs(peak - rs[:, 0]) >= limit)
            above_size = n - 1 - idx
            above = (above_size >= 1) & (above_size < idx) & (np.abs(rs[:, -1] - peak) >= limit)
            sure &= ~below & ~above
    for i in np.flatnonzero(~sure).tolist():
        sure[i] = find_foldback(r[i], v[i]) is None
    return sure
