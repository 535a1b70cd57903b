"""Detection of a fold-back (turnover) in a sensor's response.

An infrared triangulation rangefinder's reading rises as the target comes closer, peaks near its
minimum range and falls again below it: one reading then maps to two distances. Points on the
short side of that peak cannot be fitted by a monotone curve; they are excluded with a reason.

Heuristic (stated, not from a standard): average the readings at each reference value, order by
value, and find the extreme reading. The points beyond it are fold-back when (a) at least one
reference level lies beyond it, (b) they are fewer than the levels on the main side, (c) the
readings move monotonically away from the extreme there, and (d) the reversal exceeds 5 % of the
reading span, which keeps noise at a flat end from being taken for a turnover.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from shared.families.base import Array

MIN_REVERSAL = 0.05


@dataclass(frozen=True, slots=True)
class Foldback:
    """Where the response turns over and which input points lie on the wrong side."""

    turn_value: float
    turn_reading: float
    excluded: tuple[int, ...]
    reason: str


def find_foldback(reading: Array, value: Array) -> Foldback | None:
    """The fold-back of these points, or None when the response does not turn over."""
    levels, inverse = np.unique(value, return_inverse=True)
    if levels.size < 5:
        return None
    mean = np.bincount(inverse, weights=reading) / np.bincount(inverse)
    span = float(np.ptp(reading))
    if span == 0:
        return None
    candidates = []
    for idx in (int(np.argmax(mean)), int(np.argmin(mean))):
        for beyond in (np.arange(0, idx), np.arange(idx + 1, levels.size)):
            main = levels.size - 1 - beyond.size
            if beyond.size < 1 or beyond.size >= main:
                continue
            path = mean[np.r_[beyond, idx]] if beyond[0] < idx else mean[np.r_[idx, beyond]]
            steps = np.diff(path)
            if not (np.all(steps > 0) or np.all(steps < 0)):
                continue
            if abs(path[-1] - path[0]) < MIN_REVERSAL * span:
                continue
            candidates.append((idx, beyond))
    if not candidates:
        return None
    idx, beyond = max(candidates, key=lambda c: c[1].size)
    excluded = tuple(int(i) for i in np.flatnonzero(np.isin(inverse, beyond)))
    side = "below" if beyond[0] < idx else "above"
    reason = (
        f"fold-back: reference value {side} the turnover at {levels[idx]:.6g}, where the "
        f"reading peaks at {mean[idx]:.6g}; one reading maps to two values there"
    )
    return Foldback(float(levels[idx]), float(mean[idx]), excluded, reason)
