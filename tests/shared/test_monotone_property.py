"""Property: a monotone family fitted to points from a monotone truth stays monotone over its
valid range, and Fit.monotone says so (checked here on a grid ten times finer than the engine's).

The truths are drawn by hypothesis from ranges of invented constants (common practice, no source)
with noise small against the curve's change between neighbouring points, so the data themselves
are monotone; the property is that the fitted curve never turns back between the points.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shared import fit

GRID = 5001


def _monotone_on_grid(f: Any) -> bool:
    lo, hi = f.valid_range
    steps = np.diff(f.to_value(np.linspace(lo, hi, GRID)))
    return bool(np.all(steps >= 0) or np.all(steps <= 0))


@st.composite
def monotone_case(draw: st.DrawFn) -> tuple[str, dict[str, Any], np.ndarray, np.ndarray]:
    family = draw(
        st.sampled_from(
            [
                "line",
                "inverse",
                "inverse_offset",
                "power",
                "exp_rise",
                "steinhart_hart",
                "beta",
                "callendar_van_dusen",
            ]
        )
    )
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    n = int(rng.integers(8, 20))
    if family == "line":
        r = np.linspace(0.0, 4095.0, n)
        v = rng.uniform(-50, 50) + rng.uniform(0.01, 1.0) * rng.choice([-1, 1]) * r
    elif family in ("inverse", "inverse_offset"):
        r = np.linspace(150.0, 3500.0, n)
        r0 = 0.0 if family == "inverse" else rng.uniform(-100.0, 100.0)
        v = rng.uniform(5e4, 5e5) / (r + r0) + rng.uniform(-30.0, 10.0)
    elif family == "power":
        r = np.linspace(1.0, 100.0, n)
        v = rng.uniform(0.5, 5.0) * r ** rng.uniform(-1.5, 1.5)
    elif family == "exp_rise":
        r = np.linspace(0.5, 40.0, n)
        v = rng.uniform(10.0, 100.0) * (1 - np.exp(-rng.uniform(0.03, 0.2) * r))
    elif family in ("steinhart_hart", "beta"):
        r = np.geomspace(500.0, 40000.0, n)
        v = 1.0 / (1 / 298.15 + np.log(r / 1e4) / rng.uniform(3000.0, 4500.0)) - 273.15
    else:  # callendar_van_dusen: reading R from temperature t (IEC 60751 A, B; invented R0)
        v = np.linspace(0.0, 500.0, n)
        r = rng.uniform(99.0, 101.0) * (1 + 3.9083e-3 * v - 5.775e-7 * v**2)
    steps = np.min(np.abs(np.diff(v)))
    noisy = v + rng.normal(0.0, 0.05 * steps, n)
    return family, {}, r, noisy


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(case=monotone_case())
def test_fits_of_monotone_truths_stay_monotone(case: tuple[str, dict[str, Any], Any, Any]) -> None:
    family, options, r, v = case
    f = fit(family, r, v, **options)
    assert f.monotone
    assert _monotone_on_grid(f)
