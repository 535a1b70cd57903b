"""Synthetic calibration points for inverse, power, power_offset and exp_rise (invented constants,
not a real sensor). Each truth is written out here as its own formula, independent of the engine.

Rangefinders (distance in mm from ADC counts, counts falling with distance):
- inverse:       distance_mm = 60000 / counts - 20
- power:         distance_mm = 1.6e5 * counts^-1.15
- power_offset:  distance_mm = 3.0e4 * (counts - 40)^-1.3
A real unit's reading also turns over close to the sensor; ``turned_over`` multiplies the counts
by d^6 / (d^6 + 30^6) (d in mm), which makes them peak near 41 mm and fall closer in.

Saturating sensor (exp_rise): value = 250 * (1 - exp(-0.004 r)) [+ 12], readings 20 .. 900.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]

# distances (mm) at which a monotone rangefinder is calibrated: 100 mm .. 800 mm
DISTANCES_MM = np.array([100, 120, 150, 180, 220, 260, 300, 350, 400, 450, 500, 600, 700, 800.0])

INVERSE_TRUTH = {"k": 60000.0, "v0": -20.0}
POWER_TRUTH = {"a": 1.6e5, "b": -1.15}
POWER_OFFSET_TRUTH = {"a": 3.0e4, "r0": -40.0, "b": -1.3}
EXP_RISE_TRUTH = {"a": 250.0, "b": 0.004}
EXP_RISE_OFFSET_TRUTH = {"a": 250.0, "b": 0.004, "c": 12.0}
EXP_READINGS = np.linspace(20.0, 900.0, 12)

# the turnover: counts scaled by d^TURN_Q / (d^TURN_Q + TURN_S^TURN_Q), peak near 41 mm
TURN_S, TURN_Q = 30.0, 6


def inverse_counts(distance_mm: Array) -> Array:
    """Noise-free counts of the inverse-law unit at ``distance_mm``."""
    k, v0 = INVERSE_TRUTH["k"], INVERSE_TRUTH["v0"]
    return k / (np.asarray(distance_mm, dtype=float) - v0)


def inverse_distance(counts: Array) -> Array:
    k, v0 = INVERSE_TRUTH["k"], INVERSE_TRUTH["v0"]
    return k / np.asarray(counts, dtype=float) + v0


def power_counts(distance_mm: Array) -> Array:
    """Noise-free counts of the power-law unit at ``distance_mm``."""
    a, b = POWER_TRUTH["a"], POWER_TRUTH["b"]
    return (np.asarray(distance_mm, dtype=float) / a) ** (1.0 / b)


def power_distance(counts: Array) -> Array:
    a, b = POWER_TRUTH["a"], POWER_TRUTH["b"]
    return a * np.asarray(counts, dtype=float) ** b


def power_offset_counts(distance_mm: Array) -> Array:
    """Noise-free counts of the offset power-law unit at ``distance_mm``."""
    a, r0, b = POWER_OFFSET_TRUTH["a"], POWER_OFFSET_TRUTH["r0"], POWER_OFFSET_TRUTH["b"]
    return (np.asarray(distance_mm, dtype=float) / a) ** (1.0 / b) - r0


def power_offset_distance(counts: Array) -> Array:
    a, r0, b = POWER_OFFSET_TRUTH["a"], POWER_OFFSET_TRUTH["r0"], POWER_OFFSET_TRUTH["b"]
    return a * (np.asarray(counts, dtype=float) + r0) ** b


def exp_rise_value(reading: Array, offset: bool = False) -> Array:
    """True value of the saturating sensor (with the offset c when ``offset``)."""
    a, b = EXP_RISE_TRUTH["a"], EXP_RISE_TRUTH["b"]
    out = a * (1.0 - np.exp(-b * np.asarray(reading, dtype=float)))
    return out + EXP_RISE_OFFSET_TRUTH["c"] if offset else out


def turned_over(counts: Array, distance_mm: Array) -> Array:
    """``counts`` of a unit whose reading peaks near 41 mm and falls closer in."""
    d = np.asarray(distance_mm, dtype=float)
    return np.asarray(counts, dtype=float) * d**TURN_Q / (d**TURN_Q + TURN_S**TURN_Q)
