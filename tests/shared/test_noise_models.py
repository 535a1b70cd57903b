"""Where the noise is: reading noise on a steep inverse curve, checked by simulation.

Assumptions of the simulator (our own, stated): the rangefinder of tests/shared/synthetic.py
(value_mm = 52000 / (counts - 95) - 18, invented constants), calibrated at 14 exactly known
distances from 100 mm to 800 mm; all the noise is in the ADC reading, Gaussian with sd 3 counts.
At 800 mm the curve is about 14 mm per count, at 100 mm about 0.2 mm per count, so one average
noise level in value units is wrong at both ends.

Claims, each with a fixed seed and a tolerance of 3 binomial standard deviations around 95 %
(N = 400 simulated calibrations: +/- 3.3 %):
* noise="reading" (effective-variance weights, iterated): the 95 % prediction interval of a new
  reading covers the true distance at the steep far end and at the flat near end;
* the unweighted value-direction fit (noise="value") under-covers at the steep end (below 90 %)
  and over-covers at the flat end (above 99 %): the difference the weighting makes.
"""

from __future__ import annotations

import numpy as np
import pytest

from shared import fit
from tests.shared.synthetic import DISTANCES_MM, rangefinder_counts

NOISE_COUNTS = 3.0
N_SIM = 400
STEEP_MM, FLAT_MM = 750.0, 120.0
TOL = 3 * np.sqrt(0.95 * 0.05 / N_SIM)


def _coverage(seed: int, **fit_kwargs: object) -> tuple[float, float]:
    rng = np.random.default_rng(seed)
    true_counts = rangefinder_counts(DISTANCES_MM)
    probe_counts = rangefinder_counts(np.array([STEEP_MM, FLAT_MM]))
    hits = np.zeros(2)
    for _ in range(N_SIM):
        readings = true_counts + rng.normal(0.0, NOISE_COUNTS, true_counts.size)
        f = fit("inverse_offset", readings, DISTANCES_MM, **fit_kwargs)
        new = probe_counts + rng.normal(0.0, NOISE_COUNTS, 2)
        band = f.value_interval(new, level=0.95)
        hits += (band.lower <= [STEEP_MM, FLAT_MM]) & (band.upper >= [STEEP_MM, FLAT_MM])
    steep, flat = hits / N_SIM
    print(f"coverage {fit_kwargs}: steep end {steep:.3f}, flat end {flat:.3f}")
    return steep, flat


def test_reading_noise_weighting_gives_honest_intervals_at_both_ends() -> None:
    steep, flat = _coverage(2024, noise="reading")
    assert steep == pytest.approx(0.95, abs=TOL)
    assert flat == pytest.approx(0.95, abs=TOL)


def test_unweighted_value_fit_understates_the_steep_end() -> None:
    steep, flat = _coverage(2024, noise="value")
    assert steep < 0.90
    assert flat > 0.99


def test_known_reading_uncertainty_is_absolute_and_covers() -> None:
    steep, flat = _coverage(77, u_reading=NOISE_COUNTS)
    assert steep == pytest.approx(0.95, abs=TOL)
    assert flat == pytest.approx(0.95, abs=TOL)


def test_reading_noise_fit_reports_its_noise_in_reading_units() -> None:
    rng = np.random.default_rng(5)
    counts = rangefinder_counts(np.repeat(DISTANCES_MM, 3))
    f = fit(
        "inverse_offset",
        counts + rng.normal(0, NOISE_COUNTS, counts.size),
        np.repeat(DISTANCES_MM, 3),
        noise="reading",
    )
    assert f.noise == "reading" and f.sigma_source == "residuals"
    assert f.noise_value_sd == 0.0
    # 42 points, 39 dof: the estimate of a 3-count sd lies within about +/- 35 % (chi-square).
    assert f.noise_reading_sd == pytest.approx(NOISE_COUNTS, rel=0.35)
    slope = f.slope([160.0, 600.0])
    assert abs(slope[0]) > 10 * abs(slope[1])
    u_new = f.new_reading_u([160.0, 600.0])
    np.testing.assert_allclose(u_new, np.abs(slope) * f.noise_reading_sd, rtol=1e-12)
