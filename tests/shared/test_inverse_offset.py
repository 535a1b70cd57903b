"""inverse_offset on synthetic rangefinders with a known truth, fold-back, and interval coverage.

The truth is invented (tests/shared/synthetic.py): distance_mm = 52000 / (counts - 95) - 18.
Every random draw uses a fixed seed, so each test is deterministic.
"""

from __future__ import annotations

import numpy as np
import pytest

from shared import fit, fit_many
from tests.shared.synthetic import (
    DISTANCES_MM,
    PEAK_MM,
    TRUTH,
    line_points,
    peaked_counts,
    rangefinder_counts,
    rangefinder_points,
)


# -- recovering the truth ----------------------------------------------------------------------
def test_noise_free_points_give_the_truth() -> None:
    counts = rangefinder_counts(DISTANCES_MM)
    f = fit("inverse_offset", counts, DISTANCES_MM)
    assert f.param_names == ("k", "r0", "v0")
    for name, true in TRUTH.items():
        assert f.params[name] == pytest.approx(true, rel=1e-8), name
    assert f.excluded == () and f.monotone


def test_noisy_points_recover_the_truth_within_three_stderr() -> None:
    rng = np.random.default_rng(2024)
    counts, mm = rangefinder_points(rng, np.repeat(rangefinder_counts(DISTANCES_MM), 2), 0.5)
    f = fit("inverse_offset", counts, mm)
    for name, true in TRUTH.items():
        assert abs(f.params[name] - true) < 3 * f.stderr[name], (name, f.params[name], true)
    # the residual scatter estimates the noise we added (0.5 mm; dof = 25)
    assert 0.35 < f.rse < 0.7
    assert f.valid_range == (counts.min(), counts.max())
    assert f.excluded == () and f.used.all() and f.monotone


# -- fold-back ---------------------------------------------------------------------------------
MAIN_MM = np.r_[PEAK_MM, 60.0, 80.0, DISTANCES_MM]  # the turnover level and beyond


def _peaked_session(below: tuple[float, ...], seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Two readings per reference distance on the peaked unit, with 0.5 count noise."""
    rng = np.random.default_rng(seed)
    distances = np.repeat(np.r_[below, MAIN_MM], 2)
    order = rng.permutation(distances.size)  # points arrive in no particular order
    distances = distances[order]
    return peaked_counts(distances) + rng.normal(0.0, 0.5, distances.size), distances


@pytest.mark.parametrize("below", [(20.0,), (20.0, 30.0), (15.0, 25.0, 35.0)])
def test_points_below_the_turnover_are_excluded_as_fold_back(below: tuple[float, ...]) -> None:
    counts, mm = _peaked_session(below, seed=int(sum(below)))
    f = fit("inverse_offset", counts, mm)
    expected = np.flatnonzero(mm < PEAK_MM)
    assert [i for i, _ in f.excluded] == expected.tolist()
    for _, reason in f.excluded:
        assert "fold-back" in reason
    assert f.used.tolist() == (mm >= PEAK_MM).tolist()
    # the valid range ends at the turnover: its high end is the peak reading, its low end the
    # reading at the farthest distance
    assert f.valid_range == (counts[mm >= PEAK_MM].min(), counts[mm == PEAK_MM].max())
    assert f.monotone


def test_line_does_not_look_for_fold_back() -> None:
    counts, mm = _peaked_session((20.0, 30.0), seed=1)
    assert fit("line", counts, mm).excluded == ()


def test_noise_at_the_flat_end_is_not_fold_back() -> None:
    distances = np.r_[DISTANCES_MM, 900.0, 1000.0, 1200.0, 1500.0]
    counts = rangefinder_counts(distances) + np.random.default_rng(88).normal(0.0, 3.0, 18)
    # the far end is flat (1200 mm -> 137.7 counts, 1500 mm -> 129.3): with 3 counts of ADC
    # noise on every reading, the last one 6.6 counts above the one before is a reversal of
    # about 1.6 standard deviations of a difference: not significant (shared.foldback's test)
    counts[-1] = counts[-2] + 6.6
    assert np.diff(counts)[-1] > 0  # the readings really do turn back
    f = fit("inverse_offset", counts, distances)
    assert f.excluded == () and f.used.all()


FAR_MM = np.r_[DISTANCES_MM, 900.0, 1000.0, 1100.0, 1200.0, 1300.0, 1400.0, 1500.0]
FLAT_SEEDS = range(10)


def _flat_end_session(seed: int) -> tuple[np.ndarray, np.ndarray]:
    """A monotone unit out to 1500 mm, where 100 mm moves the reading by only 2-4 counts;
    two readings per distance with 4 counts of noise."""
    rng = np.random.default_rng(seed)
    distances = np.repeat(FAR_MM, 2)
    return rangefinder_counts(distances) + rng.normal(0.0, 4.0, distances.size), distances


@pytest.mark.parametrize("seed", FLAT_SEEDS)
def test_noisy_monotone_sensor_keeps_every_point(seed: int) -> None:
    counts, distances = _flat_end_session(seed)
    f = fit("inverse_offset", counts, distances)
    assert f.excluded == () and f.used.all()


def test_noisy_monotone_sessions_do_reverse_at_the_flat_end() -> None:
    """The sessions above are a real test: most have non-monotone mean readings."""
    reversed_sessions = 0
    for seed in FLAT_SEEDS:
        counts, _ = _flat_end_session(seed)
        means = counts.reshape(-1, 2).mean(axis=1)  # ordered by distance
        reversed_sessions += bool(np.any(np.diff(means) > 0))
    assert reversed_sessions >= len(FLAT_SEEDS) // 2


# -- coverage of the prediction interval --------------------------------------------------------
def test_line_prediction_interval_covers_95_percent() -> None:
    """1000 calibrations (10 points each, noise 0.3) and one new observation each at r = 7.3.

    Tolerance: with true coverage 0.95 the observed fraction of 1000 has standard deviation
    sqrt(0.95 * 0.05 / 1000) = 0.0069, so 95 % +/- 2 % is about +/- 2.9 sd (a correct interval
    falls outside on about 0.4 % of seeds; the seed is fixed, so the test is deterministic).
    """
    rng = np.random.default_rng(12345)
    c0, c1, noise, at = 5.0, 1.5, 0.3, 7.3
    units = [line_points(rng, 10, c0, c1, noise) for _ in range(1000)]
    fits = fit_many("line", units)
    new_obs = c0 + c1 * at + rng.normal(0.0, noise, len(fits))
    intervals = [f.value_interval(at) for f in fits]
    covered = np.mean(
        [iv.lower[0] <= y <= iv.upper[0] for iv, y in zip(intervals, new_obs, strict=True)]
    )
    assert 0.93 <= covered <= 0.97, covered
    # the curve band is a confidence interval for the true value, same tolerance
    bands = [f.curve_band(at) for f in fits]
    covered_true = np.mean([b.lower[0] <= c0 + c1 * at <= b.upper[0] for b in bands])
    assert 0.93 <= covered_true <= 0.97, covered_true
