"""Synthetic calibration points with a known truth (invented constants, not a real sensor).

The rangefinder: an infrared triangulation unit whose ADC counts fall with distance as
``distance_mm = K / (counts + R0) + V0``, i.e. ``counts = -R0 + K / (distance_mm - V0)``.
A real unit's response also turns over close to the sensor (the reading peaks near a minimum
range and falls below it); ``peaked_counts`` models that with a smooth peak at ``PEAK_MM``.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]

# truth of the monotone rangefinder: value_mm = 52000 / (counts - 95) - 18
K, R0, V0 = 52000.0, -95.0, -18.0
TRUTH = {"k": K, "r0": R0, "v0": V0}

# distances (mm) at which a monotone unit is calibrated: 100 mm .. 800 mm
DISTANCES_MM = np.array([100, 120, 150, 180, 220, 260, 300, 350, 400, 450, 500, 600, 700, 800.0])

# the peaked unit: counts = 95 + K (d + 18) / ((d + 18)^2 + S^2); peak where d + 18 = S
PEAK_S = 60.0
PEAK_MM = PEAK_S + V0  # 42 mm


def rangefinder_counts(distance_mm: Array) -> Array:
    """Noise-free counts of the monotone unit at ``distance_mm``."""
    return -R0 + K / (np.asarray(distance_mm, dtype=float) - V0)


def rangefinder_value(counts: Array) -> Array:
    """The true distance (mm) for ``counts`` on the monotone unit."""
    return K / (np.asarray(counts, dtype=float) + R0) + V0


def peaked_counts(distance_mm: Array) -> Array:
    """Noise-free counts of a unit whose reading peaks at ``PEAK_MM`` and falls closer in."""
    x = np.asarray(distance_mm, dtype=float) - V0
    return -R0 + K * x / (x**2 + PEAK_S**2)


def rangefinder_points(
    rng: np.random.Generator, counts: Array, noise_mm: float
) -> tuple[Array, Array]:
    """Readings ``counts`` and reference values = true distance + N(0, noise_mm)."""
    counts = np.asarray(counts, dtype=float)
    return counts, rangefinder_value(counts) + rng.normal(0.0, noise_mm, counts.size)


def line_points(
    rng: np.random.Generator, n: int, c0: float, c1: float, noise: float
) -> tuple[Array, Array]:
    """Readings 0..n-1 and values c0 + c1 r + N(0, noise)."""
    r = np.arange(n, dtype=float)
    return r, c0 + c1 * r + rng.normal(0.0, noise, n)
