"""A small fleet written straight through the services: users, two sensor types, units and
calibrations from synthetic points (invented constants plus a little noise)."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta

import numpy as np
from sqlalchemy.orm import Session

from server.accounts import service as accounts
from server.accounts.models import Role
from server.calibrations import service as calibrations
from server.calibrations.models import SessionKind
from server.calibrations.schemas import CalibrationCreate, PointIn
from server.db import make_engine, make_sessionmaker
from server.fleet import service as fleet
from server.fleet.models import NoiseIn, UnitStatus
from server.fleet.schemas import SensorTypeCreate, UnitCreate
from server.migrate import upgrade

TECHNICIAN = ("tess", "bench-pass-1")
VIEWER = ("vic", "look-only-1")
IR_TYPE = "IR rangefinder 10-80 cm"
POT_TYPE = "Rotary pot 270 deg"
JIG_U = 0.3  # mm, k = 2: the distance jig's expanded uncertainty (invented certificate)
# distances on the jig (mm); the first two lie below the IR sensor's turnover
DISTANCES = (40, 60, 80, 100, 125, 150, 175, 200, 250, 300, 350, 400, 500, 600, 700, 800)


@dataclass(frozen=True)
class Fleet:
    calibrated: str = "IR-0001"  # two calibrations, passes
    failing: str = "IR-0002"  # one old calibration, fails, overdue
    fresh: str = "IR-0003"  # never calibrated: the browser tests add calibrations here
    spare: str = "IR-0104"  # never calibrated, installed
    pot: str = "POT-0001"


def ir_readings(
    k: float,
    r0: float,
    v0: float,
    *,
    seed: int,
    noise: float = 0.6,
    bump: dict[int, float] | None = None,
) -> list[tuple[float, float]]:
    """(reference mm, reading counts) for value = k / (r + r0) + v0, folding back below 80 mm."""
    rng = np.random.default_rng(seed)
    d = np.array(DISTANCES, dtype=float)
    r = k / (d - v0) - r0
    r[0], r[1] = r[2] * 0.55, r[2] * 0.8
    for i, shift in (bump or {}).items():
        r[i] += shift
    r = np.round(r + rng.normal(0.0, noise, d.size))
    return list(zip(d.tolist(), r.tolist(), strict=True))


def paste_text(points: list[tuple[float, float]]) -> str:
    """The points as a technician pastes them from a spreadsheet (header, tab separated)."""
    return "reference_mm\treading\n" + "\n".join(f"{v:g}\t{r:g}" for v, r in points)


def _calibrate(
    session: Session,
    serial: str,
    points: list[tuple[float, float]],
    *,
    when: datetime,
    kind: SessionKind,
    reference: str,
    reference_expanded_u: float | None = None,
) -> None:
    unit = fleet.get_unit(session, serial)
    data = CalibrationCreate(
        performed_at=when,
        operator=TECHNICIAN[0],
        reference=reference,
        reference_expanded_u=reference_expanded_u,
        kind=kind,
        points=[PointIn(reference_value=v, reading=r) for v, r in points],
    )
    calibrations.run_calibration(session, unit, data, recorded_by=TECHNICIAN[0])


def seed(url: str) -> Fleet:
    """Create the database at ``url`` and fill it; returns the serials by role."""
    engine = make_engine(url)
    upgrade(engine)
    now = datetime.now(UTC).replace(second=0, microsecond=0)
    names = Fleet()
    with make_sessionmaker(engine)() as session:
        accounts.create_user(session, TECHNICIAN[0], Role.technician, password=TECHNICIAN[1])
        accounts.create_user(session, VIEWER[0], Role.viewer, password=VIEWER[1])
        fleet.create_sensor_type(
            session,
            SensorTypeCreate(
                name=IR_TYPE,
                quantity="distance",
                value_unit="mm",
                reading_unit="counts",
                reading_min=0,
                reading_max=4095,
                families=["inverse_offset"],
                tolerance_abs=3,
                tolerance_rel=2,
                drift_limit_abs=5,
                interval_days=180,
                noise_in=NoiseIn.reading,
                reading_resolution=1,
            ),
        )
        fleet.create_sensor_type(
            session,
            SensorTypeCreate(
                name=POT_TYPE,
                quantity="angle",
                value_unit="deg",
                reading_unit="counts",
                reading_min=0,
                reading_max=1023,
                families=["line", "polynomial"],
                family_options={"polynomial": {"degree": 2}},
                tolerance_abs=1.5,
                interval_days=365,
                noise_in=NoiseIn.reading,
                reading_resolution=1,
            ),
        )
        for serial, type_name in (
            (names.calibrated, IR_TYPE),
            (names.failing, IR_TYPE),
            (names.fresh, IR_TYPE),
            (names.spare, IR_TYPE),
            (names.pot, POT_TYPE),
        ):
            fleet.create_unit(
                session,
                UnitCreate(serial=serial, sensor_type=type_name, received_on=date(2025, 9, 1)),
            )
        spare = fleet.get_unit(session, names.spare)
        spare.status, spare.installed_in = UnitStatus.installed, "rover R2, front bumper"

        jig = "distance jig DJ-2 (cert. 2025-117)"
        _calibrate(
            session,
            names.calibrated,
            ir_readings(203_000, 31, 14, seed=11),
            when=now - timedelta(days=170),
            kind=SessionKind.incoming,
            reference=jig,
        )
        _calibrate(
            session,
            names.calibrated,
            ir_readings(200_000, 30, 15, seed=16),
            when=now - timedelta(days=3),
            kind=SessionKind.periodic,
            reference=jig,
            reference_expanded_u=JIG_U,
        )
        _calibrate(
            session,
            names.failing,
            ir_readings(198_000, 28, 16, seed=13, bump={5: -100.0}),
            when=now - timedelta(days=400),
            kind=SessionKind.incoming,
            reference=jig,
        )
        rng = np.random.default_rng(14)
        angles = np.linspace(0, 270, 10)
        pot = [(float(a), float(np.round(3.7 * a + 12 + rng.normal(0, 0.4)))) for a in angles]
        _calibrate(
            session,
            names.pot,
            pot,
            when=now - timedelta(days=30),
            kind=SessionKind.incoming,
            reference="dividing head DH-1",
            reference_expanded_u=0.1,
        )
        session.commit()
    engine.dispose()
    return names
