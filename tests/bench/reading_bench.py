"""Reading-noise bench: ``fit_many("inverse_offset", noise="reading")`` over a rangefinder fleet.

10,000 simulated infrared rangefinder units (invented constants, 3 % apart), 15 points each:
exact reference distances, readings with ADC noise of ADC_NOISE counts; one unit in ten was
also read at two distances past its fold-back peak (20 and 30 mm), which the engine excludes.
Ours: ``fit_many("inverse_offset", units, noise="reading")`` (fold-back detection, the
effective-variance fit, covariance, the Fit objects). Baseline, in the same run: a plain loop of
``scipy.optimize.curve_fit`` with default options over the points the engine keeps, from the
datasheet curve. Runs of the two alternate (after ``gc.collect()``); the speed-up is the median
over the pairs of baseline / ours (goal SPEEDUP_GOAL). Before timing, the first N_CHECKED units
are also fitted one by one with ``fit()``: the converted values over each unit's valid range
must agree to 1e-9 relative (exit status 1 otherwise).
Run alone: ``python -m tests.bench.reading_bench``.
"""

from __future__ import annotations

import gc
import sys
import time

import numpy as np
from numpy.typing import NDArray
from scipy.optimize import curve_fit

from shared import fit, fit_many

Array = NDArray[np.float64]
N_UNITS = 10_000
N_CHECKED = 300
MAIN_MM = np.array([60, 75, 100, 120, 150, 180, 220, 260, 300, 350, 400, 500, 600, 700, 800.0])
FOLDED_MM = np.r_[20.0, 30.0, MAIN_MM[2:]]  # 15 points, two of them past the peak
ADC_NOISE = 3.0  # counts
NOMINAL = (52000.0, -95.0, -18.0)  # the datasheet curve: curve_fit's start
PREDICTION_REL = 1e-9
SPEEDUP_GOAL = 10.0
PAIRS = 5


def inverse_offset(r: Array, k: float, r0: float, v0: float) -> Array:
    return k / (r + r0) + v0


def unit(rng: np.random.Generator, folded: bool) -> tuple[Array, Array]:
    """Counts = -r0 + k / (d - v0) + ADC noise at the MAIN_MM distances; a folded unit is read
    at 20 and 30 mm instead of 60 and 75 mm, past its peak (just short of 100 mm): there its
    counts fall again, 140 and 60 counts below the reading at 100 mm."""
    k = 52000.0 * (1.0 + 0.03 * rng.standard_normal())
    r0 = -95.0 * (1.0 + 0.03 * rng.standard_normal())
    v0 = -18.0 * (1.0 + 0.03 * rng.standard_normal())
    mm = FOLDED_MM if folded else MAIN_MM
    counts = -r0 + k / (mm - v0)
    if folded:
        counts[:2] = counts[2] - np.array([140.0, 60.0])
    return counts + rng.normal(0.0, ADC_NOISE, mm.size), mm.copy()


def fleet(seed: int = 20261205) -> list[tuple[Array, Array]]:
    rng = np.random.default_rng(seed)
    return [unit(rng, folded=(i % 10 == 9)) for i in range(N_UNITS)]


def run() -> bool:
    units = fleet()
    fits = fit_many("inverse_offset", units, noise="reading")
    kept = [(f.reading[f.used], f.value[f.used]) for f in fits]
    n_folded = sum(1 for f in fits if f.excluded)
    worst = 0.0
    for f, (r, v) in zip(fits[:N_CHECKED], units[:N_CHECKED], strict=True):
        one = fit("inverse_offset", r, v, noise="reading")
        grid = np.linspace(*one.valid_range, 101)
        want = one.to_value(grid)
        worst = max(worst, float(np.max(np.abs(f.to_value(grid) - want) / np.abs(want))))

    def ours() -> object:
        return fit_many("inverse_offset", units, noise="reading")

    def baseline() -> object:
        return [curve_fit(inverse_offset, r, v, p0=NOMINAL) for r, v in kept]

    pairs, cpu = [], []
    for _ in range(PAIRS):
        times, cpu_times = [], []
        for call in (ours, baseline):
            gc.collect()
            start, start_cpu = time.perf_counter(), time.process_time()
            call()
            times.append(time.perf_counter() - start)
            cpu_times.append(time.process_time() - start_cpu)
        pairs.append(times)
        cpu.append(cpu_times)
    cpu_ratio = sorted(b / o for o, b in cpu)[len(cpu) // 2]
    ours_s = sorted(t[0] for t in pairs)
    base_s = sorted(t[1] for t in pairs)
    ratios = sorted(b / o for o, b in pairs)
    speedup = ratios[len(ratios) // 2]
    same = worst <= PREDICTION_REL
    verdict = "met" if speedup >= SPEEDUP_GOAL else "NOT met"
    print(
        f'\nreading-noise bench: fit_many("inverse_offset", noise="reading") over {N_UNITS:,} '
        f"rangefinder units ({MAIN_MM.size} points, {ADC_NOISE:g} counts ADC noise, "
        f"{n_folded:,} units with two points past the fold-back peak, excluded)\n"
        f"  baseline: a loop of scipy.optimize.curve_fit, default options, p0 = {NOMINAL}, over "
        "the points the engine keeps; alternating runs\n"
        f"  ours best {ours_s[0] * 1e3:.0f} ms, median {ours_s[len(ours_s) // 2] * 1e3:.0f} ms; "
        f"baseline best {base_s[0] * 1e3:.0f} ms, median {base_s[len(base_s) // 2] * 1e3:.0f} ms\n"
        f"  speed-ups of the pairs: {', '.join(f'{x:.1f}' for x in ratios)}; median "
        f"{speedup:.1f}x (goal {SPEEDUP_GOAL:g}x: {verdict}); in CPU time (process_time, "
        f"less disturbed by other processes) median {cpu_ratio:.1f}x\n"
        f"  vs fit() one by one (first {N_CHECKED} units): converted values max relative "
        f"difference {worst:.1e} (limit {PREDICTION_REL:.0e}): "
        f"{'same results' if same else 'MISMATCH'}"
    )
    return same


if __name__ == "__main__":
    sys.exit(0 if run() else 1)
