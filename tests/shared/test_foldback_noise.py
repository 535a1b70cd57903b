"""Fold-back detection judged against the noise (shared.foldback), by simulation.

Simulations with fixed seeds; the rates are our own acceptance figures from the issue (no outside
source): at most 0.5 % of 2,000 units with no fold-back flagged, 100 % of 2,000 units with a real
turnover (two points past the peak) found. The units are invented:

* "value noise, no fold-back": 15 readings evenly spaced from 300 to 3,000 counts of a unit
  reading counts = 120000 / distance (40..400 mm), the reference distances with 2 mm of scatter.
  At the near end two reference distances are only 2.75 mm apart, so their readings often come
  out in reversed order (the former rule, a reversal over 5 % of the span, flagged 14.7 % of
  these same 2,000 units, measured with the code before this test was written).
* "reading noise, no fold-back": the same unit, exact distances, 3 counts of ADC noise.
* "real turnover": tests/shared/synthetic.py's peaked unit read at 20, 30 mm (past its peak at
  42 mm) and at 42 .. 700 mm, with 2 counts of ADC noise.
The measured rates are printed under "measured figures".
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest

from shared import fit, fit_many
from shared.foldback import ALPHA, find_foldback
from tests.shared.synthetic import DISTANCES_MM, PEAK_MM, peaked_counts

N_UNITS = 2000
FLAT_COUNTS = np.linspace(300.0, 3000.0, 15)
FLAT_MM = 120000.0 / FLAT_COUNTS
TURN_MM = np.r_[20.0, 30.0, PEAK_MM, 60.0, 80.0, DISTANCES_MM[:10]]  # 15 levels, 2 past the peak

Unit = tuple[np.ndarray, np.ndarray]


def value_noise(rng: np.random.Generator) -> Unit:
    return FLAT_COUNTS.copy(), FLAT_MM + rng.normal(0.0, 2.0, FLAT_MM.size)


def reading_noise(rng: np.random.Generator) -> Unit:
    return FLAT_COUNTS + rng.normal(0.0, 3.0, FLAT_COUNTS.size), FLAT_MM.copy()


def turnover(rng: np.random.Generator) -> Unit:
    return peaked_counts(TURN_MM) + rng.normal(0.0, 2.0, TURN_MM.size), TURN_MM.copy()


def simulate(make: Callable[[np.random.Generator], Unit], seed: int) -> list[Unit]:
    rng = np.random.default_rng(seed)
    return [make(rng) for _ in range(N_UNITS)]


@pytest.mark.parametrize(
    ("kind", "make", "seed"),
    [("value noise", value_noise, 2101), ("reading noise", reading_noise, 2102)],
)
def test_noise_alone_is_rarely_taken_for_fold_back(
    kind: str, make: Callable[[np.random.Generator], Unit], seed: int, figures
) -> None:
    units = simulate(make, seed)
    flagged = sum(find_foldback(r, v) is not None for r, v in units)
    rate = flagged / N_UNITS
    figures(
        f"fold-back false detections, {kind}, no fold-back: {flagged} of {N_UNITS:,} units "
        f"({rate:.2%}; limit 0.5 %; test level {ALPHA:g})"
    )
    assert rate <= 0.005


def test_a_real_turnover_is_always_found(figures) -> None:
    units = simulate(turnover, 2103)
    found = [find_foldback(r, v) for r, v in units]
    hits = sum(f is not None and f.excluded == (0, 1) for f in found)
    figures(f"fold-back found, real turnover (2 points past the peak): {hits} of {N_UNITS:,}")
    assert hits == N_UNITS


def test_fit_many_finds_the_same_fold_backs_as_fit() -> None:
    """The batched test (find_turnovers on all units at once) against fit() one by one."""
    units = simulate(value_noise, 2104)[:300] + simulate(turnover, 2105)[:300]
    many = fit_many("inverse_offset", units)
    for got, (r, v) in zip(many, units, strict=True):
        assert got.excluded == fit("inverse_offset", r, v).excluded


def test_the_reason_states_the_test() -> None:
    (r, v) = simulate(turnover, 2106)[0]
    f = fit("inverse_offset", r, v)
    (_, reason), _ = f.excluded
    assert reason.startswith("fold-back: reference value below the turnover at 42")
    assert "reversal significant against the scatter of the other points" in reason
    assert f"t(1 - {ALPHA:g}, " in reason and "one-sided" in reason
