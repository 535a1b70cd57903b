"""A simulated fleet of infrared rangefinders, calibrated twice, with a known truth.

Everything here is invented; no real sensor or product is described. Assumptions:

* Model. Each unit reads ADC counts that fall with distance as
  ``distance_mm = k / (counts + r0) + v0`` (the ``inverse_offset`` family), i.e.
  ``counts = -r0 + k / (distance_mm - v0)``. The central constants are those of
  ``tests/shared/synthetic.py`` (k = 52000, r0 = -95, v0 = -18: about 626 counts at 80 mm and
  159 counts at 800 mm).
* Unit to unit. k and r0 vary independently and normally, by ``K_SPREAD`` = 2 % and
  ``R0_SPREAD`` = 2 % (relative standard deviations); v0 is shared. Together with the
  calibration noise, the units' values at one reading then spread by about 3 % (standard
  deviation), so |robust z| >= 3 is about 9 % away from the centre.
* Defective units. ``N_DEFECTIVE`` = 6 units whose k is off the type's central k by 15 to 25 %
  (uniform, either sign; their r0 varies as every unit's): they read clearly unlike their
  siblings, at least about 5 standard deviations of the fleet's spread away.
* Calibration. Every session puts a unit at ``JIG_MM`` (13 distances, 80 .. 800 mm); the
  reference distances are exact. Each ADC sample carries normal noise of ``ADC_NOISE`` = 2
  counts and is rounded to a whole count (quantisation); a reading is the mean of
  ``SAMPLES`` samples, as bench firmware commonly averages (standard deviation about
  2 / sqrt(SAMPLES) counts). Each session is fitted with
  ``shared.fit("inverse_offset", counts, mm, noise="reading")``: the scatter is in the counts.
  Plain ``fit`` in a loop (``fit_many`` is being vectorised elsewhere; the results are the same).
* Drift. A second session for every unit, with new noise. ``N_DRIFTED`` = 30 of the normal
  units have drifted by ``DRIFT_FRACTION`` = 5 % of the span (800 - 80 mm = 720 mm, so 36 mm):
  half by an offset (v0 moves by +/- 36 mm), half by a gain change (k moves so that the value at
  800 mm moves by +/- 36 mm; the deviation is smaller closer in). The other units have not moved.

One seed (``SEED``) fixes every draw, so the fleet is the same on every run. ``simulate()`` is
cached, so the drift and fleet tests share one set of fits per test process.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from shared import Fit, fit
from tests.shared.synthetic import R0, V0, K

SEED = 20260517
N_NORMAL = 220
N_DEFECTIVE = 6
N_DRIFTED = 30
K_SPREAD = 0.02
R0_SPREAD = 0.02
DEFECT_RANGE = (0.15, 0.25)
ADC_NOISE = 2.0  # counts, standard deviation of one ADC sample
SAMPLES = 16  # ADC samples averaged into one calibration reading
JIG_MM = np.array([80, 100, 130, 160, 200, 250, 300, 360, 430, 500, 580, 680, 800.0])
SPAN_MM = float(JIG_MM.max() - JIG_MM.min())
DRIFT_FRACTION = 0.05
DRIFT_MM = DRIFT_FRACTION * SPAN_MM


@dataclass(frozen=True, slots=True)
class Unit:
    """One simulated unit: its true constants in both sessions and its two fits."""

    serial: str
    kind: str  # "normal", "defective" or "drifted"
    truth_1: tuple[float, float, float]  # (k, r0, v0) at the first calibration
    truth_2: tuple[float, float, float]  # ... at the second
    fit_1: Fit
    fit_2: Fit


def counts_at(truth: tuple[float, float, float], distance_mm: np.ndarray) -> np.ndarray:
    """Noise-free counts of a unit with constants ``truth`` at ``distance_mm``."""
    k, r0, v0 = truth
    return np.asarray(-r0 + k / (distance_mm - v0), dtype=float)


def calibrate(
    rng: np.random.Generator, truth: tuple[float, float, float], samples: int = SAMPLES
) -> Fit:
    """One session: at each jig distance the mean of ``samples`` noisy, rounded ADC samples;
    fitted with the scatter in the reading."""
    true = counts_at(truth, JIG_MM)
    draws = true[:, None] + rng.normal(0.0, ADC_NOISE, (JIG_MM.size, samples))
    counts = np.round(draws).mean(axis=1)
    return fit("inverse_offset", counts, JIG_MM, noise="reading")


def _drifted(
    rng: np.random.Generator, truth: tuple[float, float, float], i: int
) -> tuple[float, float, float]:
    k, r0, v0 = truth
    sign = 1.0 if rng.random() < 0.5 else -1.0
    if i % 2 == 0:  # offset drift: every distance reads DRIFT_MM more (or less)
        return k, r0, v0 + sign * DRIFT_MM
    # gain drift: value(r) - v0 scales by (1 + g); at 800 mm the value moves by DRIFT_MM
    g = sign * DRIFT_MM / (JIG_MM.max() - v0)
    return k * (1.0 + g), r0, v0


@lru_cache(maxsize=1)
def simulate() -> tuple[Unit, ...]:
    """The whole fleet, both sessions fitted (deterministic; cached)."""
    rng = np.random.default_rng(SEED)
    units: list[Unit] = []
    n = N_NORMAL + N_DEFECTIVE
    defective = set(rng.choice(n, N_DEFECTIVE, replace=False).tolist())
    normal_ids = [i for i in range(n) if i not in defective]
    drifted = set(rng.choice(normal_ids, N_DRIFTED, replace=False).tolist())
    n_drift = 0
    for i in range(n):
        k = K * (1.0 + K_SPREAD * rng.normal())
        r0 = R0 * (1.0 + R0_SPREAD * rng.normal())
        kind = "normal"
        if i in defective:
            kind = "defective"
            k = K * (1.0 + rng.choice([-1.0, 1.0]) * rng.uniform(*DEFECT_RANGE))
        truth_1 = (k, r0, V0)
        truth_2 = truth_1
        if i in drifted:
            kind = "drifted"
            truth_2 = _drifted(rng, truth_1, n_drift)
            n_drift += 1
        units.append(
            Unit(
                serial=f"IR-{i:04d}",
                kind=kind,
                truth_1=truth_1,
                truth_2=truth_2,
                fit_1=calibrate(rng, truth_1),
                fit_2=calibrate(rng, truth_2),
            )
        )
    return tuple(units)
