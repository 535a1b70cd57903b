"""Detection of a fold-back (turnover) in a sensor's response, judged against the noise.

An infrared triangulation rangefinder's reading rises as the target comes closer, peaks near its
minimum range and falls again below it: one reading then maps to two distances. Points on the
short side of that peak cannot be fitted by a monotone curve; they are excluded with a reason.

Candidates (structure): average the readings at each reference value, order the levels by value
and take the extreme (largest, then smallest) mean reading. The levels beyond it on one side are a
candidate when (a) there is at least one, (b) they are fewer than the levels on the other (main)
side and (c) the readings move monotonically away from the extreme there.

The test (our own, stated here and in each exclusion's reason): a noisy pair of neighbouring
points can reverse too, so a candidate is taken only when its reversal is significant given the
scatter of the other points. The main side's level means (the extreme included) are fitted by a
weighted least-squares polynomial of degree ``min(4, levels - 2)`` in log|value| (in value when
a value is 0 or the values change sign; weights = readings per level), a smooth stand-in for any
monotone response; its residuals give s, the standard deviation of one reading, with
dof = levels - degree - 1. The reversal D = |mean at the farthest beyond level - mean at the
extreme| is significant when

    t = D / (s sqrt(1/n_far + 1/n_extreme)) > t_{1 - ALPHA}(dof)    (one-sided, ALPHA = 1e-4)

(n = readings per level). Under a monotone response D is at most noise, so a real turnover gives
a t far beyond that quantile (two points past the peak of a rangefinder read with a few counts of
ADC noise: t ~ 20), while noise alone rarely reaches it (a false exclusion in 0.10 % of 2,000
simulated units whose nearest reference values are closer than their scatter, where the former
rule, a reversal over 5 % of the reading span, excluded in 14.7 %; see
tests/shared/test_foldback_noise.py). Fewer than 3 main-side levels: no test, no fold-back.

``find_foldbacks`` does the same for many units at once (each unit one point per reference value);
``find_foldback`` for one unit runs that same code on its level means, so the two always agree.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy import stats

from shared.families.base import Array

ALPHA = 1e-4  # one-sided level of the reversal test
MAX_DEGREE = 4  # of the smooth curve through the main side
MIN_LEVELS = 5  # fewer reference values: no fold-back detection at all


@dataclass(frozen=True, slots=True)
class Foldback:
    """Where the response turns over and which input points lie on the wrong side."""

    turn_value: float
    turn_reading: float
    excluded: tuple[int, ...]
    reason: str


@dataclass(frozen=True, slots=True)
class Turnover:
    """For each unit (row): whether a significant turnover was found, at which level (index into
    the value-ordered levels), which side ('below'/'above' = levels before/after it), and t."""

    found: NDArray[np.bool_]
    level: NDArray[np.intp]
    below: NDArray[np.bool_]
    t: Array
    dof: NDArray[np.intp]


def find_turnovers(means: Array, values: Array, counts: Array) -> Turnover:
    """The significant turnover of each row of level means (ordered by value), or none.

    ``means``, ``values``, ``counts``: (units, levels), each row ordered by value, values
    distinct. Candidates in the order (largest, below), (largest, above), (smallest, below),
    (smallest, above); of the significant ones the one with most levels beyond is taken (the
    first such on a tie).
    """
    units, levels = means.shape
    rows = np.arange(units)
    best_size = np.zeros(units, dtype=np.intp)
    found = np.zeros(units, dtype=bool)
    level = np.zeros(units, dtype=np.intp)
    below_out = np.zeros(units, dtype=bool)
    t_out = np.zeros(units)
    dof_out = np.zeros(units, dtype=np.intp)
    if levels < MIN_LEVELS or units == 0:
        return Turnover(found, level, below_out, t_out, dof_out)
    positions = np.arange(levels)
    x_all = _abscissa(values)
    steps = np.diff(means, axis=1)
    for idx in (np.argmax(means, axis=1), np.argmin(means, axis=1)):
        for below in (True, False):
            size = idx if below else levels - 1 - idx
            main = levels - 1 - size
            ok = (size >= 1) & (size < main) & (main + 1 >= 3)
            beyond = (
                (positions[None, :] < idx[:, None])
                if below
                else (positions[None, :] > idx[:, None])
            )
            path = beyond | (positions[None, :] == idx[:, None])
            in_path = path[:, 1:] & path[:, :-1]
            rising = np.all(~in_path | (steps > 0), axis=1)
            falling = np.all(~in_path | (steps < 0), axis=1)
            ok &= rising | falling
            if not ok.any():
                continue
            far = np.zeros(units, dtype=np.intp) if below else np.full(units, levels - 1)
            reversal = np.abs(means[rows, far] - means[rows, idx])
            side = ~beyond  # the main side, the extreme included
            t, dof = _reversal_t(x_all, means, counts, side, reversal, far, idx, ok)
            with np.errstate(invalid="ignore"):
                significant = ok & (t > stats.t.isf(ALPHA, np.maximum(dof, 1)))
            take = significant & (size > best_size)
            found |= take
            best_size = np.where(take, size, best_size)
            level = np.where(take, idx, level)
            below_out = np.where(take, below, below_out)
            t_out = np.where(take, t, t_out)
            dof_out = np.where(take, dof, dof_out)
    return Turnover(found, level, below_out, t_out, dof_out)


def _abscissa(values: Array) -> Array:
    """log|value| for rows whose values are all non-zero of one sign, else the value; scaled to
    [-1, 1] per row (conditioning only)."""
    same_sign = np.all(values > 0, axis=1) | np.all(values < 0, axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        x = np.where(same_sign[:, None], np.log(np.abs(values)), values)
    lo, hi = x.min(axis=1, keepdims=True), x.max(axis=1, keepdims=True)
    half = np.where(hi > lo, (hi - lo) / 2.0, 1.0)
    return np.asarray((x - (hi + lo) / 2.0) / half)


def _reversal_t(
    x: Array,
    means: Array,
    counts: Array,
    side: NDArray[np.bool_],
    reversal: Array,
    far: NDArray[np.intp],
    idx: NDArray[np.intp],
    ok: NDArray[np.bool_],
) -> tuple[Array, NDArray[np.intp]]:
    """t of the reversal against the scatter about the main side's smooth curve, and its dof."""
    units = len(means)
    n_side = side.sum(axis=1)
    degree = np.clip(n_side - 2, 1, MAX_DEGREE)
    dof = n_side - degree - 1
    weight = np.where(side, counts, 0.0)
    t = np.full(units, np.nan)
    for d in np.unique(degree[ok]).tolist():
        sel = np.flatnonzero(ok & (degree == d))
        design = np.polynomial.legendre.legvander(x[sel], d)  # (u, L, d + 1)
        sw = np.sqrt(weight[sel])
        a = design * sw[:, :, None]
        b = means[sel] * sw
        q, r = np.linalg.qr(a)
        diag = np.abs(np.diagonal(r, axis1=1, axis2=2))
        regular = diag.min(axis=1) > 1e-12 * diag.max(axis=1)
        r = np.where(regular[:, None, None], r, np.eye(d + 1))
        coef = np.linalg.solve(r, np.einsum("uli,ul->ui", q, b)[:, :, None])[:, :, 0]
        resid = b - np.einsum("uli,ui->ul", a, coef)
        s = np.sqrt(np.einsum("ul,ul->u", resid, resid) / dof[sel])
        spread = s * np.sqrt(1.0 / counts[sel, far[sel]] + 1.0 / counts[sel, idx[sel]])
        with np.errstate(divide="ignore", invalid="ignore"):
            t_sel = np.where(regular, reversal[sel] / spread, np.nan)
        t[sel] = np.where(spread > 0, t_sel, np.where(reversal[sel] > 0, np.inf, 0.0))
    return t, dof.astype(np.intp)


def describe(turn_value: float, turn_reading: float, side: str, t: float, dof: int) -> str:
    """The exclusion's reason: where the turnover is and the test it passed."""
    return (
        f"fold-back: reference value {side} the turnover at {turn_value:.6g}, where the "
        f"reading peaks at {turn_reading:.6g}; one reading maps to two values there "
        f"(reversal significant against the scatter of the other points: t = {t:.3g} > "
        f"t(1 - {ALPHA:g}, {dof} dof), one-sided)"
    )


def find_foldback(reading: Array, value: Array) -> Foldback | None:
    """The fold-back of these points, or None when the response does not turn over
    significantly (see the module docstring for the test)."""
    levels, inverse = np.unique(value, return_inverse=True)
    if levels.size < MIN_LEVELS:
        return None
    counts = np.bincount(inverse).astype(float)
    mean = np.bincount(inverse, weights=reading) / counts
    if np.ptp(reading) == 0:
        return None
    turn = find_turnovers(mean[None, :], levels[None, :], counts[None, :])
    if not turn.found[0]:
        return None
    idx = int(turn.level[0])
    below = bool(turn.below[0])
    beyond = np.arange(0, idx) if below else np.arange(idx + 1, levels.size)
    excluded = tuple(int(i) for i in np.flatnonzero(np.isin(inverse, beyond)))
    side = "below" if below else "above"
    reason = describe(levels[idx], mean[idx], side, float(turn.t[0]), int(turn.dof[0]))
    return Foldback(float(levels[idx]), float(mean[idx]), excluded, reason)
