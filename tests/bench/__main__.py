"""Time the engine against plain scipy on the same synthetic points, in one run.

Run from the project root: ``.venv/bin/python -m tests.bench``. Each case is timed with
``time.perf_counter``; a repeat runs the call ``loops`` times, and the best repeat counts (the least
disturbed by the rest of the machine). The same points go to both sides, and the parameters are
checked to agree (relative 1e-6) before any time is reported; a mismatch exits with status 1.
"""

from __future__ import annotations

import platform
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import scipy
from numpy.typing import NDArray
from scipy import stats
from scipy.optimize import curve_fit

from shared import ENGINE_VERSION, fit, fit_many

Array = NDArray[np.float64]
AGREE_REL = 1e-6
N_POINTS = 15
N_UNITS = 500
DISTANCES_MM = np.linspace(100.0, 800.0, N_POINTS)
# the nominal (datasheet) curve of the invented rangefinder: a reasonable start for curve_fit
NOMINAL = (50000.0, -100.0, -20.0)  # k, r0, v0 of value_mm = k / (counts + r0) + v0


def inverse_offset(r: Array, k: float, r0: float, v0: float) -> Array:
    """The same model as shared's inverse_offset family, for curve_fit."""
    return k / (r + r0) + v0


def rangefinder_unit(rng: np.random.Generator) -> tuple[Array, Array]:
    """One unit: its own constants near 52000/(counts - 95) - 18, 0.5 mm reference noise."""
    k = 52000.0 * (1.0 + 0.05 * rng.standard_normal())
    r0 = -95.0 + 5.0 * rng.standard_normal()
    v0 = -18.0 + 3.0 * rng.standard_normal()
    counts = -r0 + k / (DISTANCES_MM - v0)
    return counts, DISTANCES_MM + rng.normal(0.0, 0.5, N_POINTS)


def best_ms(call: Callable[[], object], loops: int, repeats: int) -> float:
    """Best over ``repeats`` of the mean time of one call (ms), each repeat ``loops`` calls."""
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        for _ in range(loops):
            call()
        best = min(best, (time.perf_counter() - start) / loops)
    return best * 1e3


def max_rel(ours: Array, theirs: Array) -> float:
    return float(np.max(np.abs(ours - theirs) / np.abs(theirs)))


@dataclass
class Case:
    name: str
    ours: Callable[[], object]
    baseline: Callable[[], object]
    agreement: float  # largest relative parameter difference
    loops: int
    repeats: int


def line_case(rng: np.random.Generator) -> Case:
    r = np.linspace(0.0, 4095.0, N_POINTS)
    v = 12.5 + 0.0244 * r + rng.normal(0.0, 0.3, N_POINTS)
    got = fit("line", r, v)
    ref = stats.linregress(r, v)
    agreement = max_rel(
        np.array([got.params["c0"], got.params["c1"]]), np.array([ref.intercept, ref.slope])
    )
    return Case(
        f'fit("line"), {N_POINTS} points',
        lambda: fit("line", r, v),
        lambda: stats.linregress(r, v),
        agreement,
        loops=300,
        repeats=5,
    )


def inverse_offset_case(rng: np.random.Generator) -> Case:
    r, v = rangefinder_unit(rng)
    got = fit("inverse_offset", r, v)
    ref, _ = curve_fit(inverse_offset, r, v, p0=NOMINAL)
    return Case(
        f'fit("inverse_offset"), {N_POINTS} points',
        lambda: fit("inverse_offset", r, v),
        lambda: curve_fit(inverse_offset, r, v, p0=NOMINAL),
        max_rel(np.array(list(got.params.values())), ref),
        loops=40,
        repeats=5,
    )


def fleet_case(rng: np.random.Generator) -> Case:
    units = [rangefinder_unit(rng) for _ in range(N_UNITS)]

    def baseline() -> list[Array]:
        return [curve_fit(inverse_offset, r, v, p0=NOMINAL)[0] for r, v in units]

    ours = np.array([list(f.params.values()) for f in fit_many("inverse_offset", units)])
    return Case(
        f'fit_many("inverse_offset"), {N_UNITS} units',
        lambda: fit_many("inverse_offset", units),
        baseline,
        max_rel(ours, np.array(baseline())),
        loops=1,
        repeats=3,
    )


def main() -> int:
    rng = np.random.default_rng(20240601)
    cases = [line_case(rng), inverse_offset_case(rng), fleet_case(rng)]
    print(
        f"sensorledger engine {ENGINE_VERSION} benchmark - Python {platform.python_version()}, "
        f"numpy {np.__version__}, scipy {scipy.__version__}\n"
        "baselines: line -> scipy.stats.linregress; inverse_offset -> scipy.optimize.curve_fit\n"
        "  (method 'lm', finite-difference Jacobian, default tolerances) on the same model\n"
        f"  value = k/(r + r0) + v0 started from the nominal curve p0 = {NOMINAL}\n"
        "ours also computes the covariance, fold-back detection and the monotonicity check.\n"
        "time per call, best of a few repeats (time.perf_counter); ratio = ours / baseline\n"
    )
    header = f"{'case':<38} | {'ours (ms)':>10} | {'baseline (ms)':>13} | {'ratio':>6}"
    print(header)
    print("-" * len(header))
    for case in cases:
        ours = best_ms(case.ours, case.loops, case.repeats)
        base = best_ms(case.baseline, case.loops, case.repeats)
        print(f"{case.name:<38} | {ours:>10.3f} | {base:>13.3f} | {ours / base:>6.2f}")
    print()
    ok = True
    for case in cases:
        same = case.agreement <= AGREE_REL
        ok &= same
        verdict = "same parameters" if same else "MISMATCH"
        print(
            f"{case.name:<38}: {verdict} (max relative difference {case.agreement:.1e}, "
            f"limit {AGREE_REL:.0e})"
        )
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
