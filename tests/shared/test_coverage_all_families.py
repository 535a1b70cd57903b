"""Honesty of the uncertainty, family by family, by simulation.

Claim: for every family, the 95 % prediction interval of a converted reading (Fit.value_interval)
covers the true value in 95 % +/- 1.5 % of synthetic calibrations (2,000 per family, fixed seed;
1.5 % is about three binomial standard deviations).

Simulator (our own; invented constants, not any real sensor): each family has a known true curve
value = f(reading); a calibration takes 12 readings spread over a span, the reference values are
the true values plus Gaussian noise of a stated size (noise in the value, the default model), and
the check reading is a fixed interior reading whose new observation carries the same noise. For
callendar_van_dusen, fitted in its natural direction, the noise is in the resistance instead and
the fit is told so (noise="reading").
"""

from __future__ import annotations

import zlib

import numpy as np
import pytest

from shared import fit

N_SIM = 2000
TOL = 0.015


def _poly(r: np.ndarray) -> np.ndarray:
    return 0.5 + 2.0 * r - 0.15 * r**2 + 0.004 * r**3


CASES = {
    # family: (options, readings, true curve, noise sd in value units, probe reading)
    "line": ({}, np.linspace(0.0, 10.0, 12), lambda r: 1.0 + 2.0 * r, 0.1, 7.3),
    "polynomial": ({"degree": 3}, np.linspace(0.0, 20.0, 12), _poly, 0.05, 13.0),
    "inverse": ({}, np.linspace(200.0, 3000.0, 12), lambda r: 9.0e4 / r + 12.0, 1.0, 900.0),
    "inverse_offset": (
        {},
        np.linspace(200.0, 3000.0, 12),
        lambda r: 9.0e4 / (r - 60.0) + 12.0,
        1.0,
        900.0,
    ),
    "power": ({}, np.linspace(1.0, 50.0, 12), lambda r: 3.0 * r**0.6, 0.05, 20.0),
    "power_offset": ({}, np.linspace(1.0, 50.0, 12), lambda r: 3.0 * (r + 4.0) ** 0.6, 0.02, 20.0),
    "rational": (
        {"degree": (1, 1)},
        np.linspace(0.0, 10.0, 12),
        lambda r: (1.0 + 3.0 * r) / (1.0 + 0.2 * r),
        0.02,
        6.0,
    ),
    "exp_rise": (
        {},
        np.linspace(0.5, 30.0, 12),
        lambda r: 80.0 * (1 - np.exp(-0.12 * r)),
        0.3,
        12.0,
    ),
    "steinhart_hart": (
        {},
        np.geomspace(700.0, 33000.0, 12),
        lambda r: (
            1.0 / (1.129148e-3 + 2.34125e-4 * np.log(r) + 8.76741e-8 * np.log(r) ** 3) - 273.15
        ),
        0.02,
        5000.0,
    ),
    "beta": (
        {},
        np.geomspace(700.0, 33000.0, 12),
        lambda r: 1.0 / (1.0 / 298.15 + np.log(r / 1.0e4) / 3950.0) - 273.15,
        0.02,
        5000.0,
    ),
}


def _coverage(family: str) -> float:
    options, readings, truth, sd, probe = CASES[family]
    rng = np.random.default_rng(zlib.crc32(family.encode()))
    true_values = truth(readings)
    true_probe = float(truth(np.array([probe]))[0])
    hits = 0
    for _ in range(N_SIM):
        f = fit(family, readings, true_values + rng.normal(0.0, sd, readings.size), **options)
        band = f.value_interval(probe)
        observed = true_probe + rng.normal(0.0, sd)  # a new observation at the probe reading
        hits += int(band.lower[0] <= observed <= band.upper[0])
    return hits / N_SIM


def _coverage_rtd() -> float:
    """Pt100-like RTD (IEC 60751 A, B; invented R0 = 100.2 ohm), noise 0.01 ohm in R."""
    r0, a, b = 100.2, 3.9083e-3, -5.775e-7
    temps = np.linspace(0.0, 400.0, 12)
    true_r = r0 * (1 + a * temps + b * temps**2)
    t_probe = 150.0
    r_probe = r0 * (1 + a * t_probe + b * t_probe**2)
    rng = np.random.default_rng(60751)
    hits = 0
    for _ in range(N_SIM):
        readings = true_r + rng.normal(0.0, 0.01, temps.size)
        f = fit("callendar_van_dusen", readings, temps, noise="reading")
        band = f.value_interval(r_probe + rng.normal(0.0, 0.01))
        hits += int(band.lower[0] <= t_probe <= band.upper[0])
    return hits / N_SIM


@pytest.mark.parametrize("family", sorted(CASES))
def test_prediction_interval_covers_95_percent(family: str, figures) -> None:
    covered = _coverage(family)
    figures(f"{family}: 95 % prediction interval covered {covered:.3f}")
    assert covered == pytest.approx(0.95, abs=TOL)


def test_rtd_prediction_interval_covers_95_percent_with_noise_in_resistance(figures) -> None:
    covered = _coverage_rtd()
    figures(f"callendar_van_dusen: 95 % prediction interval covered {covered:.3f}")
    assert covered == pytest.approx(0.95, abs=TOL)
