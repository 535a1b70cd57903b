"""Time a calibration save through the API with 100 units in the type against 10,000.

Both types live in one SQLite file (so both sides see the same database size) and are saved to
alternately through the same ``TestClient`` on the app (its job runner running, as in service:
the fleet comparisons a save queues run in the background meanwhile). The 10,000 units are
seeded with bulk inserts: one calibration each, its points and its ``FitRecord`` made from a few
real fits (``server.calibrations.service.fit_points``) shifted by a small constant per unit (the
points and the fit's additive constant together: residuals, covariance and decision unchanged),
with the unit's due date and the fleet columns (``fleet_session_id``, ``fleet_fit_id``,
``fleet_lo``, ``fleet_hi``, ``fleet_values``) as ``server.flags.fleet.keep_curve`` stores them
and the type's ``fleet_probes`` as the comparison chooses them. A few seeded units are checked
against ``keep_curve``/``store_due`` before any time is reported.

Reported: the save medians and their ratio (goal <= 1.5x and <= 100 ms), how long the 10,000-unit
type's fleet comparison takes to catch up after the last save, and the process's peak memory.
Cases: an invented potentiometer (line, noise in the value) and an invented rangefinder
(inverse_offset, noise in the reading). Run alone: ``python -m tests.bench.save_bench``.
"""

from __future__ import annotations

import copy
import resource
import shutil
import sys
import tempfile
import time
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np

SMALL, LARGE = 100, 10_000
N_BASES = 8  # real fits the seeded calibrations are made from
N_SAVES = 40  # timed saves per type (alternating), after WARM_UP each
WARM_UP = 3
RATIO_GOAL, MS_GOAL = 1.5, 100.0
CATCH_UP_LIMIT_S = 600.0
CHECKED = 5  # seeded units compared with keep_curve / store_due
SHIFT_SD = 0.05  # sd of the per-unit shift, relative to the span of the values


@dataclass(frozen=True)
class Kind:
    """A sensor type to bench: its body, how its points look, its fit's additive constant."""

    label: str
    body: dict[str, Any]
    constant: str  # the parameter that shifts every value by the same amount

    def points(self, rng: np.random.Generator, base: int) -> tuple[np.ndarray, np.ndarray]:
        """(reading, value) of one session of a unit made like base ``base``."""
        shape = np.random.default_rng(500 + base)
        if self.constant == "c0":  # potentiometer: value = slope r + offset
            r = np.arange(0.0, 1001.0, 100.0)
            slope = 0.27 * (1 + 0.02 * shape.standard_normal())
            v = slope * r + 0.2 * shape.standard_normal() + rng.normal(0.0, 0.03, r.size)
            return r, np.round(v, 4)
        # rangefinder: counts = -r0 + k / (d - v0), ADC noise in the counts
        d = np.linspace(100.0, 800.0, 15)
        k = 310000.0 * (1.0 + 0.03 * shape.standard_normal())
        r0 = -95.0 * (1.0 + 0.03 * shape.standard_normal())
        v0 = -18.0 * (1.0 + 0.03 * shape.standard_normal())
        counts = -r0 + k / (d - v0) + rng.normal(0.0, 2.0, d.size)
        return np.round(counts, 1), d


KINDS = (
    Kind(
        "potentiometer, line, noise in the value",
        {
            "quantity": "angle",
            "value_unit": "deg",
            "reading_unit": "counts",
            "reading_min": 0,
            "reading_max": 1023,
            "families": ["line"],
            "tolerance_abs": 1.0,
            "drift_limit_abs": 0.5,
            "interval_days": 365,
        },
        "c0",
    ),
    Kind(
        "rangefinder, inverse_offset, noise in the reading",
        {
            "quantity": "distance",
            "value_unit": "mm",
            "reading_unit": "counts",
            "reading_min": 0,
            "reading_max": 4095,
            "families": ["inverse_offset"],
            "tolerance_abs": 3.0,
            "tolerance_rel": 2.0,
            "drift_limit_abs": 5.0,
            "interval_days": 180,
            "noise_in": "reading",
        },
        "v0",
    ),
)


def peak_mb() -> float:
    """The process's peak resident memory so far (MB; Linux reports KB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _shifted(result: dict[str, Any], constant: str, shift: float) -> dict[str, Any]:
    """A stored fit whose values and additive constant are moved by ``shift``."""
    out = copy.deepcopy(result)
    out["params"][constant] += shift
    out["value"] = [v + shift for v in out["value"]]
    return out


def seed_type(session: Any, kind: Kind, name: str, n_units: int, when: datetime) -> Any:
    """A sensor type with ``n_units`` units, each with one calibration, in bulk."""
    from sqlalchemy import bindparam, insert, update

    from server.calibrations.models import CalibrationSession, FitRecord, Point
    from server.calibrations.schemas import PointIn
    from server.calibrations.service import fit_points, type_b_of
    from server.flags.fleet import curve_at
    from server.fleet import service as fleet
    from server.fleet.models import Unit
    from server.fleet.schemas import SensorTypeCreate
    from shared import Fit
    from shared.fleet import choose_probes

    st = fleet.create_sensor_type(session, SensorTypeCreate(name=name, **kind.body))
    rng = np.random.default_rng(20261204)
    bases = []
    for b in range(N_BASES):
        r, v = kind.points(rng, b)
        points = [
            PointIn(reference_value=float(x), reading=float(y)) for x, y in zip(v, r, strict=True)
        ]
        outcome = fit_points(st, points, None, type_b_of(st, None, 2.0, None, None))
        bases.append((r, v, outcome, outcome.fit.to_dict()))
    span = float(np.ptp(bases[0][1]))
    prefix = "".join(w[0] for w in name.split()).upper()
    serials = [f"{prefix}-{i:05d}" for i in range(n_units)]
    unit_ids = list(
        session.scalars(
            insert(Unit).returning(Unit.id, sort_by_parameter_order=True),
            [
                {"serial": s, "sensor_type_id": st.id, "status": "installed", "installed_in": "rig"}
                for s in serials
            ],
        )
    )
    session_ids = list(
        session.scalars(
            insert(CalibrationSession).returning(
                CalibrationSession.id, sort_by_parameter_order=True
            ),
            [
                {
                    "unit_id": uid,
                    "performed_at": when,
                    "operator": "seed",
                    "reference": "jig",
                    "reference_k": 2.0,
                    "kind": "periodic",
                    "recorded_by": "seed",
                }
                for uid in unit_ids
            ],
        )
    )
    shifts = rng.normal(0.0, SHIFT_SD * span / 100, n_units)
    which = rng.integers(0, N_BASES, n_units)
    results = [
        _shifted(bases[b][3], kind.constant, float(d)) for b, d in zip(which, shifts, strict=True)
    ]
    fit_ids = list(
        session.scalars(
            insert(FitRecord).returning(FitRecord.id, sort_by_parameter_order=True),
            [
                {
                    "session_id": sid,
                    "family": res["family"],
                    "options": res["options"],
                    "result": res,
                    "decision": bases[b][2].decision.to_dict(),
                    "ranking": bases[b][2].ranking,
                    "diagnostics": bases[b][2].diagnostics,
                    "passed": bases[b][2].decision.passed,
                    "is_current": True,
                    "engine_version": res["engine_version"],
                }
                for sid, res, b in zip(session_ids, results, which, strict=True)
            ],
        )
    )
    session.execute(
        insert(Point),
        [
            {
                "session_id": sid,
                "seq": i,
                "reference_value": float(value) + float(d),
                "reading": float(reading),
                "repeat_index": 0,
                "excluded": False,
            }
            for sid, b, d in zip(session_ids, which, shifts, strict=True)
            for i, (reading, value) in enumerate(zip(bases[b][0], bases[b][1], strict=True))
        ],
    )
    ranges = {s: tuple(results[i]["valid_range"]) for i, s in enumerate(serials)}
    probes_arr, _, _ = choose_probes(ranges)
    st.fleet_probes = [float(p) for p in probes_arr]
    table = Unit.__table__
    rows = []
    for uid, sid, fid, res in zip(unit_ids, session_ids, fit_ids, results, strict=True):
        curve = curve_at(Fit.from_dict(res), st.fleet_probes)  # as keep_curve computes it
        lo, hi = res["valid_range"]
        rows.append({"uid": uid, "sid": sid, "fid": fid, "lo": lo, "hi": hi, "values": curve})
    session.execute(
        update(table)
        .where(table.c.id == bindparam("uid"))
        .values(
            fleet_session_id=bindparam("sid"),
            fleet_fit_id=bindparam("fid"),
            fleet_lo=bindparam("lo"),
            fleet_hi=bindparam("hi"),
            fleet_values=bindparam("values"),
        ),
        rows,
    )
    session.flush()
    # the due date: one calibration each on the same day, so every unit's is the same
    first = fleet.get_unit(session, serials[0])
    found = fleet.store_due(first)
    assert found is not None
    session.execute(
        update(Unit)
        .where(Unit.sensor_type_id == st.id)
        .values(due_on=found.due, due_basis=found.basis)
    )
    session.flush()
    session.expire_all()
    return st, serials, bases, float(span)


def check_seeding(session: Any, st: Any, serials: list[str]) -> str:
    """Compare a few seeded units with what keep_curve and store_due give; a problem or ''."""
    from server.calibrations.models import latest_session
    from server.flags.fleet import curve_at
    from server.fleet.service import get_unit, unit_due
    from shared import Fit

    step = max(1, len(serials) // CHECKED)
    for serial in serials[::step][:CHECKED]:
        unit = get_unit(session, serial)
        last = latest_session(unit.sessions)
        if last is None or last.current_fit is None:
            return f"{serial}: no current calibration"
        fit = Fit.from_dict(last.current_fit.result)
        expected = (
            last.id,
            last.current_fit.id,
            *(float(v) for v in fit.valid_range),
            curve_at(fit, st.fleet_probes),
        )
        got = (unit.fleet_session_id, unit.fleet_fit_id, unit.fleet_lo, unit.fleet_hi)
        if (*got, unit.fleet_values) != expected:
            return f"{serial}: fleet columns {got} differ from keep_curve's {expected[:4]}"
        due = unit_due(unit)
        if due is None or (due.due, due.basis) != (unit.due_on, unit.due_basis):
            return f"{serial}: due date differs from store_due's"
        points = np.array([[p.reading, p.reference_value] for p in last.points])
        if not (np.array_equal(points[:, 0], fit.reading) and np.allclose(points[:, 1], fit.value)):
            return f"{serial}: points differ from the fit's"
    return ""


@dataclass
class Result:
    label: str
    small_ms: list[float]
    large_ms: list[float]
    catch_up_s: float
    fleet_job_s: float
    seed_s: float
    peak_seeded_mb: float
    peak_mb: float
    problem: str

    @property
    def ratio(self) -> float:
        return float(np.median(self.large_ms) / np.median(self.small_ms))


def run_kind(kind: Kind, folder: Path) -> Result:
    from fastapi.testclient import TestClient
    from sqlalchemy import select

    from server.accounts import service as accounts
    from server.accounts.models import Role
    from server.app import create_app
    from server.config import Settings
    from server.jobs.models import Job, JobKind, JobState

    url = f"sqlite:///{folder / (kind.constant + '.db')}"
    app = create_app(Settings(database_url=url))
    when = datetime.now(UTC).replace(microsecond=0) - timedelta(days=30)
    start = time.perf_counter()
    with app.state.sessionmaker() as s:
        user = accounts.create_user(s, "bench", Role.technician)
        token = accounts.create_token(s, user, "bench")
        small = seed_type(s, kind, f"small {kind.constant}", SMALL, when)
        large = seed_type(s, kind, f"large {kind.constant}", LARGE, when)
        s.commit()
        problem = check_seeding(s, small[0], small[1]) or check_seeding(s, large[0], large[1])
        large_id = large[0].id
    seed_s = time.perf_counter() - start
    seeded_mb = peak_mb()
    headers = {"Authorization": f"Bearer {token}"}
    rng = np.random.default_rng(7)

    def save(which: tuple[Any, ...], n: int) -> float:
        _, serials, _, span = which
        serial = serials[int(rng.integers(0, len(serials)))]
        r, v = kind.points(rng, int(rng.integers(0, N_BASES)))
        shift = float(rng.normal(0.0, SHIFT_SD * span / 100))
        body = {
            "performed_at": (when + timedelta(days=1, minutes=n)).isoformat(),
            "operator": "bench",
            "reference": "jig",
            "points": [
                {"reference_value": float(x) + shift, "reading": float(y)}
                for x, y in zip(v, r, strict=True)
            ],
        }
        t0 = time.perf_counter()
        reply = client.post(f"/api/v1/units/{serial}/calibrations", json=body, headers=headers)
        ms = (time.perf_counter() - t0) * 1e3
        if reply.status_code != 201:
            raise SystemExit(f"save answered {reply.status_code}: {reply.text[:500]}")
        return ms

    small_ms: list[float] = []
    large_ms: list[float] = []
    with TestClient(app) as client:
        for n in range(WARM_UP + N_SAVES):
            a, b = save(small, 2 * n), save(large, 2 * n + 1)
            if n >= WARM_UP:
                small_ms.append(a)
                large_ms.append(b)
        t0 = time.perf_counter()
        app.state.jobs.wait(CATCH_UP_LIMIT_S)
        catch_up = time.perf_counter() - t0
        with app.state.read_sessionmaker() as s:
            last = s.scalars(
                select(Job)
                .where(
                    Job.kind == JobKind.fleet,
                    Job.sensor_type_id == large_id,
                    Job.state == JobState.done,
                )
                .order_by(Job.id.desc())
            ).first()
            job_s = (
                (last.finished_at - last.started_at).total_seconds()
                if last is not None and last.started_at and last.finished_at
                else float("nan")
            )
    app.state.engine.dispose()
    return Result(
        kind.label, small_ms, large_ms, catch_up, job_s, seed_s, seeded_mb, peak_mb(), problem
    )


def report(kinds: tuple[Kind, ...] = KINDS) -> bool:
    """Run and print the save bench; False when a seeding check failed."""
    folder = Path(tempfile.mkdtemp(prefix="sensorledger-save-bench-"))
    try:
        results = [run_kind(kind, folder) for kind in kinds]
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    print(
        f"\nsave bench: POST /api/v1/units/{{serial}}/calibrations through TestClient, one "
        f"SQLite file holding a {SMALL}-unit and a {LARGE:,}-unit type of each kind;\n"
        f"  {N_SAVES} saves to each, alternating, after {WARM_UP} warm-up saves; the job runner "
        "runs the fleet comparisons they queue meanwhile\n"
        f"goal: median with {LARGE:,} units <= {RATIO_GOAL:g}x the median with {SMALL} and "
        f"<= {MS_GOAL:g} ms (reported, not enforced)\n"
    )
    header = (
        f"{'case':<62} | {f'{LARGE:,} (ms)':>11} | {f'{SMALL} (ms)':>9} | {'ratio':>6} | "
        f"{'p95 10k':>8} | {'p95 100':>8} | goal"
    )
    print(header)
    print("-" * len(header))
    ok = True
    for r in results:
        large, small = float(np.median(r.large_ms)), float(np.median(r.small_ms))
        met = "met" if r.ratio <= RATIO_GOAL and large <= MS_GOAL else "NOT met"
        print(
            f"{'save median, ' + r.label:<62} | {large:>11.1f} | {small:>9.1f} | "
            f"{r.ratio:>6.2f} | {np.percentile(r.large_ms, 95):>8.1f} | "
            f"{np.percentile(r.small_ms, 95):>8.1f} | {met}"
        )
    print()
    for r in results:
        ok &= not r.problem
        print(
            f"{r.label}: seeded {SMALL + LARGE:,} units in {r.seed_s:.1f} s "
            f"(check against keep_curve/store_due: {r.problem or 'same'}); fleet comparison of "
            f"the {LARGE:,}-unit type caught up {r.catch_up_s:.1f} s after the last save (its "
            f"last job took {r.fleet_job_s:.2f} s); peak memory {r.peak_seeded_mb:.0f} MB after "
            f"seeding, {r.peak_mb:.0f} MB at the end (process peak RSS)"
        )
    return ok


if __name__ == "__main__":
    sys.exit(0 if report() else 1)
