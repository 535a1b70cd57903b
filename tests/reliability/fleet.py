"""The reliability fleet: invented potentiometer-like units seeded into the database before the
servers start (see harness.py)."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

import numpy as np

from tests.reliability.harness import ADMIN, READINGS, T0, TECH
from tests.server import lines

# -- the fleet -----------------------------------------------------------------------------------


@dataclass(frozen=True)
class Fleet:
    type_name: str
    serials: tuple[str, ...]
    tech_token: str
    admin_token: str


def unit_shape(index: int) -> tuple[float, float]:
    """(slope, offset) of unit ``index``: 1 % and 0.1 deg apart; every 10th unit 1.5 deg off."""
    rng = np.random.default_rng(1000 + index)
    slope = 0.1 * (1.0 + 0.01 * rng.standard_normal())
    offset = 0.1 * rng.standard_normal() + (1.5 if index % 10 == 7 else 0.0)
    return float(slope), float(offset)


def points_of(index: int, seed: int) -> list[dict[str, float]]:
    """A session's points for unit ``index``: its line plus N(0, 0.02) deg (fixed seed)."""
    slope, offset = unit_shape(index)
    rng = np.random.default_rng(seed)
    values = slope * READINGS + offset + rng.normal(0.0, 0.02, READINGS.size)
    return [
        {"reference_value": round(float(v), 4), "reading": float(r)}
        for v, r in zip(values, READINGS, strict=True)
    ]


def pot_type(name: str, **changes: Any) -> dict[str, Any]:
    """The API tests' pot type (tests/server/lines.py) with a yearly interval."""
    return lines.pot_type(name, **{"interval_days": 365, **changes})


def seed_fleet(
    url: str,
    *,
    n_units: int,
    sessions_per_unit: int = 0,
    type_body: dict[str, Any] | None = None,
    serial_prefix: str = "REL",
) -> Fleet:
    """Migrate the database and add users with API tokens, a sensor type, its units and (with
    ``sessions_per_unit``) calibrations stored through the services, flags recomputed once."""
    from server.accounts import service as accounts
    from server.accounts.models import Role
    from server.calibrations import service as calibrations
    from server.calibrations.schemas import CalibrationCreate, PointIn
    from server.db import make_engine, make_sessionmaker
    from server.flags.service import recompute_flags
    from server.fleet import service as fleet
    from server.fleet.schemas import SensorTypeCreate, UnitCreate
    from server.migrate import upgrade

    body = type_body or pot_type("Reliability pot")
    engine = make_engine(url)
    try:
        upgrade(engine)
        with make_sessionmaker(engine)() as session:
            tech = accounts.create_user(session, TECH[0], Role.technician, password=TECH[1])
            admin = accounts.create_user(session, ADMIN[0], Role.admin, password=ADMIN[1])
            tech_token = accounts.create_token(session, tech, "reliability")
            admin_token = accounts.create_token(session, admin, "reliability")
            st = fleet.create_sensor_type(session, SensorTypeCreate(**body))
            serials = tuple(f"{serial_prefix}-{i:04d}" for i in range(n_units))
            for i, serial in enumerate(serials):
                unit = fleet.create_unit(session, UnitCreate(serial=serial, sensor_type=st.name))
                for k in range(sessions_per_unit):
                    calibrations.run_calibration(
                        session,
                        unit,
                        CalibrationCreate(
                            performed_at=T0 - timedelta(days=400 * (sessions_per_unit - k)),
                            operator="seed",
                            reference="angle jig",
                            points=[PointIn(**p) for p in points_of(i, 10_000 * i + k)],
                        ),
                        recorded_by="seed",
                    )
            if sessions_per_unit:
                session.flush()
                recompute_flags(session, st)
            session.commit()
    finally:
        engine.dispose()
    return Fleet(body["name"], serials, tech_token, admin_token)


def session_body(index: int, when: datetime, seed: int) -> dict[str, Any]:
    return {
        "performed_at": when.isoformat(),
        "operator": "load",
        "reference": "angle jig",
        "kind": "periodic",
        "points": points_of(index, seed),
    }
