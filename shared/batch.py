"""fit_many's engine: one family fitted to many units at once, vectorised across the units.

``fit_many(family, datasets, **options)`` returns what ``[fit(family, r, v, **options) for r, v in
datasets]`` returns, computed as array operations over all the units that share a point count
instead of one Python-level solve per unit. The batch path covers the common case; everything else
goes to ``fit()`` unit by unit, so every result means the same thing either way. This module is
the driver (grouping, exclusions and fold-back, building the Fit objects); the solvers are
``shared.batch_monomial``, ``shared.batch_inverse_offset`` and, for noise in the reading,
``shared.batch_reading``.

Batched (noise="value" or "reading", any ``exclude``; no u_value / u_reading; a family without
option hooks):

* ``line`` and ``polynomial`` (any degree, through_zero or not), value noise: fit()'s own solver,
  each step on stacked arrays (QR in the centred, scaled Chebyshev basis, double-double
  refinement, compensated Horner): the parameters come out as fit()'s (bit for bit in our tests;
  the covariance within an ulp or two).
* ``inverse_offset``, value noise: fit()'s variable-projection scan over r0 (the same grid), then
  secant steps on the projected cost's derivative and a batched Newton / Levenberg-Marquardt
  check of (k, r0, v0) to the rounding floor (see ``shared.batch_inverse_offset``). MINPACK in
  fit() stops once it can no longer see the sum of squares fall: with rho = eps max|value| / rse,
  fit()'s parameters lie ~sqrt(rho) standard uncertainties from the minimum (~1e-6 u for
  realistic noise), and the results agree to that, not bit for bit.
* noise="reading" (line, polynomial, inverse_offset): the effective-variance objective fit()
  minimises, sum ((v - f) / f')^2, by a batched Levenberg-Marquardt from the value-noise solution
  (``shared.batch_reading``); fit() gets there by reweighted solves and scipy's
  ``least_squares`` with a finite-difference Jacobian, so the two agree to that Jacobian's
  accuracy (predictions to ~1e-12 relative in our tests), not bit for bit.
* exclusions, masked: a user's ``exclude`` and, for a family that can fold back, the points past
  a turnover are taken out of each unit, and the units are regrouped by the number of points they
  keep (the used points packed into dense rows): the solvers see only used points, as fit()'s
  solve does. Fold-back detection: ``shared.foldback.find_turnovers`` for all units with one
  point per reference value at once, ``find_foldback`` (the same test) for the others.
* residuals (at every point, excluded ones extrapolated), dof, rse, scale, weights, valid range
  and the monotonicity check on ``MONOTONE_GRID`` points with fit()'s formulas, batched; the Fit
  objects share read-only arrays, one row per unit.

Goes to ``fit`` unit by unit: any other family; a family with ``bind_options``,
``interpolates`` or fitted in the reading direction; u_value, u_reading; an ``exclude`` naming a
point a unit does not have; a unit whose points are not equal-length finite numbers, with too few
points or equal readings, or whose batched solve does not converge or meets a condition under
which ``fit`` raises (singular basis, no curvature, pole inside the readings, singular Jacobian,
zero slope under reading noise, non-finite values). A unit that makes ``fit`` raise makes
``fit_many`` raise the same error type, its message prefixed with the unit's index
("unit 7: ..."); when several would, the first one's.
"""

from __future__ import annotations

import gc
from collections.abc import Callable, Iterable, Mapping
from dataclasses import fields
from itertools import repeat, starmap
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from shared.batch_common import Index, Mask, Solved
from shared.batch_inverse_offset import (
    reading_inverse_offset,
    solve_inverse_offset,
    values_inverse_offset,
)
from shared.batch_monomial import reading_monomial, solve_monomial, values_monomial
from shared.errors import BadInput, CalibrationError
from shared.families import get_family
from shared.families._monomial import MonomialFamily
from shared.families.base import Array, Family
from shared.families.inverse_offset import InverseOffset
from shared.fitting import Fit, direction_of, fit
from shared.foldback import MIN_LEVELS, Foldback, describe, find_foldback, find_turnovers

FIT_KEYWORDS = ("noise", "u_value", "u_reading", "relative", "exclude")  # fit()'s own keywords


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
    found = _batch_solver(fam, options)
    if found is None:
        return out
    solver, values = found
    noise = str(options.get("noise", "value"))
    exclude = {int(i): why for i, why in (options.get("exclude") or {}).items()}
    for n, idx, r, v in _groups(units):
        if any(not 0 <= i < n for i in exclude):
            continue  # fit() raises BadInput for a point the unit does not have
        keep = np.ones(n, dtype=bool)
        keep[list(exclude)] = False
        used = np.repeat(keep[None, :], len(idx), axis=0)
        excluded: list[dict[int, str]] = [dict(exclude) for _ in range(len(idx))]
        if fam.foldback and keep.any():
            kept = np.flatnonzero(keep)
            for u, fold in _foldbacks(r[:, kept], v[:, kept]).items():
                for j in fold.excluded:
                    used[u, kept[j]] = False
                    excluded[u][int(kept[j])] = fold.reason
        counts = used.sum(axis=1)
        for m in np.unique(counts).tolist():
            rows = np.flatnonzero(counts == m)
            if m == n:
                ru, vu = r[rows], v[rows]
            else:
                mask = used[rows]
                ru, vu = r[rows][mask].reshape(-1, m), v[rows][mask].reshape(-1, m)
            if m == 0:
                continue
            solved = solver(fam, opts, ru, vu)
            _collect(
                out,
                fam,
                opts,
                noise,
                idx[rows],
                (r[rows], v[rows], used[rows], [excluded[u] for u in rows.tolist()]),
                ru,
                solved,
                values,
            )
    return out


def _fit_one(i: int, family: str, unit: Any, options: Mapping[str, Any]) -> Fit:
    reading, value = unit
    try:
        return fit(family, reading, value, **options)
    except CalibrationError as exc:
        raise type(exc)(f"unit {i}: {exc}") from exc


# -- which units the batch path takes ----------------------------------------------------------
Solver = Callable[[Family, Mapping[str, Any], Array, Array], Solved]
Values = Callable[[Family, Mapping[str, Any], Array, Array], Array]


def _batch_solver(fam: Family, options: Mapping[str, Any]) -> tuple[Solver, Values] | None:
    """The batched solver and curve evaluator for this family and these options, or None: all
    units go to fit()."""
    if options.get("u_value") is not None or options.get("u_reading") is not None:
        return None
    if getattr(fam, "bind_options", None) is not None or getattr(fam, "interpolates", False):
        return None
    if direction_of(fam) != "value_from_reading":
        return None
    reading = options.get("noise", "value") == "reading"
    if isinstance(fam, MonomialFamily):
        return (reading_monomial if reading else solve_monomial), values_monomial
    if isinstance(fam, InverseOffset):
        return (reading_inverse_offset if reading else solve_inverse_offset), values_inverse_offset
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
    noise: str,
    idx: Index,
    points: tuple[Array, Array, Mask, list[dict[int, str]]],
    ru: Array,
    solved: Solved,
    values: Values,
) -> None:
    """One Fit per unit the batch finished, as fit() builds it.

    ``points``: every point of these units (reading, value, used, excluded reasons); ``ru`` the
    used readings packed into rows, as the solver saw them. The arrays of all units are made
    read-only once; each Fit holds row views of them.
    """
    ok = np.flatnonzero(solved.ok)
    if not ok.size:
        return
    r, v, used_all, reasons = points
    n, m = r.shape[1], ru.shape[1]
    names = fam.param_names(opts)
    dof = m - len(names)
    r, v, used_all, ru = r[ok], v[ok], used_all[ok], ru[ok]
    params_arr = solved.params[ok]
    if m == n:
        resid = solved.residuals[ok]
        resid_used = resid
    else:
        resid = v - values(fam, opts, params_arr, r)
        resid_used = resid[used_all].reshape(-1, m)
    w_used = solved.weights[ok] if solved.weights is not None else None
    rse = np.sqrt(np.sum(resid_used**2, axis=1) / dof)
    # unit weights: scale == rse, as in fit()
    scale = rse if w_used is None else np.sqrt(np.sum(w_used * resid_used**2, axis=1) / dof)
    cov = _frozen_rows(solved.cov_unscaled[ok] * (scale**2)[:, None, None])
    count = len(ok)
    if m == n:
        used: Iterable[Any] = repeat(_frozen_rows(np.ones(n, dtype=bool), dtype=bool), count)
        excluded: Iterable[Any] = repeat((), count)
    else:
        used = list(_frozen_rows(used_all, dtype=bool))
        excluded = [tuple(sorted(reasons[i].items())) for i in ok.tolist()]
    if w_used is None and m == n:
        weights: Iterable[Any] = repeat(_frozen_rows(np.ones(n)), count)
    else:
        w_all = np.zeros((count, n))
        w_all[used_all] = (w_used if w_used is not None else np.ones_like(resid_used)).ravel()
        weights = list(_frozen_rows(w_all))
    params = [dict(zip(names, p, strict=False)) for p in params_arr.tolist()]
    scales = scale.tolist()
    zeros = repeat(0.0, count)
    noise_v, noise_r = (scales, zeros) if noise == "value" else (zeros, scales)
    args = zip(
        repeat(fam.name, count),
        map(dict, repeat(opts, count)),  # each Fit its own options, as from fit()
        params,
        list(cov),
        repeat(dof, count),
        rse.tolist(),
        scales,  # scale
        repeat("residuals", count),
        repeat(noise, count),
        noise_v,
        noise_r,
        list(_frozen_rows(r)),
        list(_frozen_rows(v)),
        used,
        weights,
        list(_frozen_rows(resid)),
        excluded,
        zip(ru.min(axis=1).tolist(), ru.max(axis=1).tolist(), strict=True),  # valid_range
        solved.monotone[ok].tolist(),
        strict=True,
    )
    # thousands of Fits, dicts and row views and no reference cycles among them: the cyclic
    # collector's passes meanwhile (triggered by the allocations) would only walk them
    enabled = gc.isenabled()
    gc.disable()
    try:
        for i, made in zip(idx[ok].tolist(), starmap(_fit_maker(), args), strict=True):
            out[i] = made
    finally:
        if enabled:
            gc.enable()


def _foldbacks(r: Array, v: Array) -> dict[int, Foldback]:
    """The units (row -> Foldback) in which ``find_foldback`` finds a turnover.

    Units whose reference values are all different (one point per level, the common case) are
    tested together by ``find_turnovers`` on their points ordered by value; the others one by one
    by ``find_foldback``, which runs the same test on their level means.
    """
    found: dict[int, Foldback] = {}
    units, n = r.shape
    if n < MIN_LEVELS or not units:
        return found
    order = np.argsort(v, axis=1, kind="stable")
    vs = np.take_along_axis(v, order, axis=1)
    rs = np.take_along_axis(r, order, axis=1)
    distinct = np.all(np.diff(vs, axis=1) > 0, axis=1)
    for i in np.flatnonzero(~distinct).tolist():
        fold = find_foldback(r[i], v[i])
        if fold is not None:
            found[i] = fold
    rows = np.flatnonzero(distinct & (np.ptp(r, axis=1) > 0))
    if not rows.size:
        return found
    turn = find_turnovers(rs[rows], vs[rows], np.ones((rows.size, n)))
    for j in np.flatnonzero(turn.found).tolist():
        i, idx, below = int(rows[j]), int(turn.level[j]), bool(turn.below[j])
        beyond = order[i, :idx] if below else order[i, idx + 1 :]
        reason = describe(
            float(vs[i, idx]),
            float(rs[i, idx]),
            "below" if below else "above",
            float(turn.t[j]),
            int(turn.dof[j]),
        )
        found[i] = Foldback(
            float(vs[i, idx]), float(rs[i, idx]), tuple(sorted(beyond.tolist())), reason
        )
    return found
