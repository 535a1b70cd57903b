"""Time the engine against plain scipy on the same synthetic points, in one run.

Run from the project root: ``.venv/bin/python -m tests.bench``. Each case is timed with
``time.perf_counter``; a repeat runs the call ``loops`` times, and the best repeat counts (the least
disturbed by the rest of the machine); the repeats of ours and of the baseline alternate, so that
both sample the same spells of load, and each starts after ``gc.collect()``, so that neither pays
for the other's garbage (the collector stays on: each pays for its own). The same points go to
both sides, and the parameters are checked to agree (relative 1e-6) before any time is reported;
a mismatch exits with status 1.

The fleet case of the batch engine (``shared.batch``): ``fit_many("inverse_offset")`` over 10,000
synthetic units against a loop of ``curve_fit`` over the same points, both computing the
covariance; the goal is at least 10x the loop's speed, judged by the median over the alternating
pairs of runs of baseline / ours (robust to a machine that slows down or speeds up between
pairs); reported, not enforced: timings depend on the machine. It also reports how closely
``fit_many`` reproduces ``fit`` one by one (on the first units) and the covariance ``curve_fit``
returns.
"""

from __future__ import annotations

import gc
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

from shared import ENGINE_VERSION, Fit, fit, fit_many

Array = NDArray[np.float64]
AGREE_REL = 1e-6
N_POINTS = 15
N_UNITS = 500
DISTANCES_MM = np.linspace(100.0, 800.0, N_POINTS)
# the nominal (datasheet) curve of the invented rangefinder: a reasonable start for curve_fit
NOMINAL = (50000.0, -100.0, -20.0)  # k, r0, v0 of value_mm = k / (counts + r0) + v0

# the batch case: a fleet of an invented 12-bit rangefinder, ~2700 counts at 100 mm, ~470 at 800
N_FLEET = 10_000
N_FLEET_CHECKED = 500  # the first units, also fitted one by one with fit()
FLEET_NOMINAL = (300000.0, -100.0, -20.0)  # its datasheet curve: curve_fit's start
FLEET_TOL = 1e-10  # curve_fit's ftol, xtol, gtol there (see batch_fleet_case)
ADC_NOISE = 2.0  # counts
SPEEDUP_GOAL = 10.0


def inverse_offset(r: Array, k: float, r0: float, v0: float) -> Array:
    """The same model as shared's inverse_offset family, for curve_fit."""
    return k / (r + r0) + v0


def inverse_offset_jac(r: Array, k: float, r0: float, v0: float) -> Array:
    """Its analytic Jacobian (d value / d (k, r0, v0)), for curve_fit."""
    x = 1.0 / (r + r0)
    return np.stack([x, -k * x * x, np.ones_like(r)], axis=-1)


def rangefinder_unit(rng: np.random.Generator) -> tuple[Array, Array]:
    """One unit: its own constants near 52000/(counts - 95) - 18, 0.5 mm reference noise."""
    k = 52000.0 * (1.0 + 0.05 * rng.standard_normal())
    r0 = -95.0 + 5.0 * rng.standard_normal()
    v0 = -18.0 + 3.0 * rng.standard_normal()
    counts = -r0 + k / (DISTANCES_MM - v0)
    return counts, DISTANCES_MM + rng.normal(0.0, 0.5, N_POINTS)


def adc_unit(rng: np.random.Generator) -> tuple[Array, Array]:
    """One unit of the fleet case: invented constants near 310000/(counts - 95) - 18, each with a
    3 % unit-to-unit spread; the 15 reference distances exact, the readings with ADC noise."""
    k = 310000.0 * (1.0 + 0.03 * rng.standard_normal())
    r0 = -95.0 * (1.0 + 0.03 * rng.standard_normal())
    v0 = -18.0 * (1.0 + 0.03 * rng.standard_normal())
    counts = -r0 + k / (DISTANCES_MM - v0) + rng.normal(0.0, ADC_NOISE, N_POINTS)
    return counts, DISTANCES_MM.copy()


def mean_ms(call: Callable[[], object], loops: int) -> float:
    """Mean time of one call (ms) over ``loops`` calls, from a collected heap."""
    gc.collect()  # neither side pays for the garbage the other left behind
    start = time.perf_counter()
    for _ in range(loops):
        call()
    return (time.perf_counter() - start) / loops * 1e3


def timed_ms(case: Case) -> tuple[list[float], list[float]]:
    """``case.repeats`` times of ours and of the baseline (ms per call), alternating."""
    ours, base = [], []
    for _ in range(case.repeats):
        ours.append(mean_ms(case.ours, case.loops))
        base.append(mean_ms(case.baseline, case.loops))
    return ours, base


def max_rel(ours: Array, theirs: Array) -> float:
    return float(np.max(np.abs(ours - theirs) / np.abs(theirs)))


def params_of(fits: list[Fit]) -> Array:
    return np.array([list(f.params.values()) for f in fits])


def max_cov_diff(ours: Array, theirs: Array) -> float:
    """Largest |difference| of stacked covariance matrices in units of u_i u_j (of ``theirs``)."""
    u = np.sqrt(np.einsum("uii->ui", theirs))
    return float(np.max(np.abs(ours - theirs) / (u[:, :, None] * u[:, None, :])))


@dataclass
class Case:
    name: str
    ours: Callable[[], object]
    baseline: Callable[[], object]
    agreement: float  # largest relative parameter difference
    loops: int
    repeats: int
    notes: tuple[str, ...] = ()  # further agreement figures, printed under the verdict


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


def batch_fleet_case(rng: np.random.Generator) -> list[Case]:
    """fit_many over N_FLEET units against curve_fit loops; agreement with fit and curve_fit.

    The baseline that must reach the same parameters is curve_fit with the analytic Jacobian and
    ftol = xtol = gtol = FLEET_TOL: with the finite-difference Jacobian and default tolerances
    (the second, informative line) MINPACK stops once it can no longer see the sum of squares
    fall, a few 1e-6 short of the minimum on some of these units.
    """
    units = [adc_unit(rng) for _ in range(N_FLEET)]

    def converged() -> list[tuple[Array, Array]]:
        return [
            curve_fit(
                inverse_offset,
                r,
                v,
                p0=FLEET_NOMINAL,
                jac=inverse_offset_jac,
                ftol=FLEET_TOL,
                xtol=FLEET_TOL,
                gtol=FLEET_TOL,
            )
            for r, v in units
        ]

    def default() -> list[tuple[Array, Array]]:
        return [curve_fit(inverse_offset, r, v, p0=FLEET_NOMINAL) for r, v in units]

    fits = fit_many("inverse_offset", units)
    ours = params_of(fits)
    reference = converged()
    ref = np.array([p for p, _ in reference])
    ref_cov = np.array([c for _, c in reference])
    loose = np.array([p for p, _ in default()])

    n = N_FLEET_CHECKED
    single = [fit("inverse_offset", r, v) for r, v in units[:n]]
    p_single = params_of(single)
    u_single = np.array([list(f.stderr.values()) for f in single])
    rse = np.array([f.rse for f in single])
    residuals = np.array([f.residuals for f in fits[:n]])
    residuals_single = np.array([f.residuals for f in single])
    cov = np.array([f.covariance for f in fits])
    cov_single = np.array([f.covariance for f in single])
    fields_exact = all(
        (a.dof, a.used.tolist(), a.excluded, a.valid_range, a.monotone)
        == (b.dof, b.used.tolist(), b.excluded, b.valid_range, b.monotone)
        for a, b in zip(fits[:n], single, strict=True)
    )
    notes = (
        f"  covariance vs curve_fit's pcov: max |difference| / (u_i u_j) "
        f"{max_cov_diff(cov, ref_cov):.1e}",
        f"  vs fit() one by one (first {n} units): parameters max relative difference "
        f"{max_rel(ours[:n], p_single):.1e}, max |difference| / standard uncertainty "
        f"{np.max(np.abs(ours[:n] - p_single) / u_single):.1e};",
        f"    covariance max |difference| / (u_i u_j) {max_cov_diff(cov[:n], cov_single):.1e}; "
        f"rse and scale max relative "
        f"{max_rel(np.array([f.rse for f in fits[:n]]), rse):.1e}; residuals max |difference| "
        f"/ rse {np.max(np.abs(residuals - residuals_single) / rse[:, None]):.1e};",
        f"    dof, used, excluded, valid_range, monotone: {'same' if fields_exact else 'DIFFER'}",
    )
    name = f'fit_many("inverse_offset"), {N_FLEET:,} units'
    return [
        Case(
            name,
            lambda: fit_many("inverse_offset", units),
            converged,
            max_rel(ours, ref),
            loops=1,
            repeats=5,
            notes=notes,
        ),
        Case(
            "  same, vs curve_fit defaults (informative)",
            lambda: fit_many("inverse_offset", units),
            default,
            max_rel(ours, loose),
            loops=1,
            repeats=3,
        ),
    ]


def main() -> int:
    rng = np.random.default_rng(20240601)
    cases = [line_case(rng), inverse_offset_case(rng), fleet_case(rng)]
    fleet, informative = batch_fleet_case(np.random.default_rng(20240602))
    cases.append(fleet)
    from tests.bench.flags_bench import flags_case  # builds a 200-unit database (~1 min)

    cases.append(flags_case())
    print(
        f"sensorledger engine {ENGINE_VERSION} benchmark - Python {platform.python_version()}, "
        f"numpy {np.__version__}, scipy {scipy.__version__}\n"
        "baselines: line -> scipy.stats.linregress; inverse_offset -> scipy.optimize.curve_fit\n"
        "  (method 'lm', finite-difference Jacobian, default tolerances) on the same model\n"
        f"  value = k/(r + r0) + v0 started from the nominal curve p0 = {NOMINAL}\n"
        f"{N_FLEET:,}-unit case: invented 12-bit rangefinders, constants 3 % apart, "
        f"{N_POINTS} exact distances,\n"
        f"  readings with {ADC_NOISE:g} counts ADC noise (fixed seed); baseline a loop of "
        f"curve_fit from p0 = {FLEET_NOMINAL}\n"
        f"  with the analytic Jacobian and ftol = xtol = gtol = {FLEET_TOL:g}, so that it "
        "converges\n"
        "ours also computes the covariance, fold-back detection and the monotonicity check;\n"
        "  curve_fit its covariance (pcov).\n"
        "flags case: recompute_flags for the saved unit (and the type's fleet outliers) against\n"
        "  the whole type's recompute, on a 200-unit SQLite file (tests/bench/flags_bench.py)\n"
        "time per call, best of a few repeats (time.perf_counter); ratio = ours / baseline,\n"
        "speed-up = baseline / ours\n"
    )
    header = (
        f"{'case':<40} | {'ours (ms)':>10} | {'baseline (ms)':>13} | {'ratio':>6} | {'speed-up':>8}"
    )
    print(header)
    print("-" * len(header))
    paired: list[float] = []
    for case in [*cases, informative]:
        ours_ms, base_ms = timed_ms(case)
        ours, base = min(ours_ms), min(base_ms)
        if case is fleet:
            paired = sorted(b / o for o, b in zip(ours_ms, base_ms, strict=True))
        print(
            f"{case.name:<40} | {ours:>10.3f} | {base:>13.3f} | {ours / base:>6.2f} | "
            f"{base / ours:>7.1f}x"
        )
    speedup = paired[len(paired) // 2]
    met = "met" if speedup >= SPEEDUP_GOAL else "NOT met"
    print(
        f"\n{fleet.name}: speed-ups of the alternating pairs of runs, sorted: "
        f"{', '.join(f'{x:.1f}' for x in paired)}; median {speedup:.1f}x "
        f"(goal {SPEEDUP_GOAL:g}x: {met})\n"
    )
    ok = True
    for case in cases:
        same = case.agreement <= AGREE_REL
        ok &= same
        verdict = "same results" if same else "MISMATCH"
        print(
            f"{case.name:<40}: {verdict} (max relative difference {case.agreement:.1e}, "
            f"limit {AGREE_REL:.0e})"
        )
        for note in case.notes:
            print(note)
    print(
        f"{'curve_fit defaults (informative)':<40}: max relative difference "
        f"{informative.agreement:.1e} (stops short of the minimum; not checked)"
    )
    from tests.bench.reading_bench import run as run_reading  # 10,000 units, noise in reading

    ok &= run_reading()
    from tests.bench.pages_bench import run_pages  # serves the app on 10,000 units (~1.5 min)

    ok &= run_pages()
    from tests.bench.history_bench import report as history_report  # ~10 min at 10,000 units

    print("\n" + "\n".join(history_report()))
    from tests.bench.save_bench import report as save_report  # seeds 2 x 10,100 units (~1 min)

    ok &= save_report()
    from tests.bench.standards_bench import report as standards_report  # 1,000 units (~10 s)

    ok &= standards_report()
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
