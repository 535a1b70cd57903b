"""A big fleet in a database, fast: thousands of units of one sensor type with real fits.

Benches that need a fleet at scale use ``seed(url)``; it returns a ``BigFleet`` naming what it
made (serials, a sample of flag ids, tokens to sign in with). How:

1. The schema is migrated to head (``server.migrate.upgrade``), so the app starts on it as is.
2. A handful of template units are calibrated through the real services
   (``calibrations.service.run_calibration``, i.e. ``shared`` fits, decisions, rankings and
   diagnostics) and their flags recomputed (``flags.service.recompute_flags``): invented rotary
   potentiometers read in counts, value = c0 + c1 r, two calibrations each about a year apart; one
   unit drifted, one failing acceptance, one overdue, one reading unlike its siblings.
3. The rest of the fleet is copied from the templates with bulk core inserts (``insert(table)``
   with lists of rows, explicit ids, a few thousand rows a statement): each clone unit gets a
   template's sessions (dates moved by a few days), points and fit records, its stored due date
   (``Unit.due_on``, so that the app's start does not recompute them) and one audit entry.
4. ``n_flags`` open flags are copied from the templates' real flags onto clone units, every kind
   the templates raised in turn (keys of their own, so they never collide with a recompute's);
   half the fleet-outlier and overdue copies are warnings, the rest actions.

Nothing here is timed. 10,000 units take about half a minute on SQLite. PostgreSQL works too
(sequences are moved past the copied ids).
"""

from __future__ import annotations

import itertools
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
from sqlalchemy import Engine, Table, func, insert, select, text
from sqlalchemy.orm import Session

from server.accounts import service as accounts
from server.accounts.models import Role, TokenKind
from server.audit.models import AuditEntry
from server.calibrations import service as calibrations
from server.calibrations.models import CalibrationSession, FitRecord, Point, SessionKind
from server.calibrations.schemas import CalibrationCreate, PointIn
from server.db import make_engine, make_sessionmaker
from server.flags.models import Flag, FlagKind, Severity
from server.flags.service import recompute_flags
from server.fleet import service as fleet
from server.fleet.models import Unit, UnitStatus
from server.fleet.schemas import SensorTypeCreate, UnitCreate
from server.migrate import upgrade

TYPE_NAME = "bench pot 300 deg"
USER = ("benchtech", "bench-pass-1")
READINGS = np.linspace(0.0, 1000.0, 11)  # counts
CHUNK = 5_000  # rows per insert statement
WARNING_KINDS = (FlagKind.fleet_outlier, FlagKind.overdue)
TEMPLATE_SLOPES = (0.270, 0.272, 0.268, 0.271, 0.269, 0.2705, 0.2695, 0.300)  # the last: odd one


@dataclass(frozen=True, slots=True)
class BigFleet:
    """What ``seed`` made: the database, the type, every serial (templates first), the open
    flags' ids, and a technician's API token and browser sign-in (cookie value)."""

    url: str
    sensor_type: str
    serials: list[str]
    flag_ids: list[int]
    api_token: str
    browser_token: str
    user: tuple[str, str] = USER
    counts: dict[str, int] = field(default_factory=dict)  # rows per table


def _points(slope: float, shift: float, noise: float, rng: np.random.Generator) -> list[PointIn]:
    values = slope * READINGS + shift + rng.normal(0.0, noise, READINGS.size)
    return [
        PointIn(reference_value=float(v), reading=float(r))
        for v, r in zip(values, READINGS, strict=True)
    ]


def _templates(session: Session, now: datetime) -> list[Unit]:
    """The template units, calibrated through the services; their flags recomputed."""
    st = fleet.create_sensor_type(
        session,
        SensorTypeCreate(
            name=TYPE_NAME,
            quantity="angle",
            value_unit="deg",
            reading_unit="counts",
            reading_min=0,
            reading_max=1023,
            families=["line"],
            tolerance_abs=1.0,
            drift_limit_abs=0.5,
            interval_days=365,
        ),
    )
    rng = np.random.default_rng(20260101)
    units = []
    for i, slope in enumerate(TEMPLATE_SLOPES):
        unit = fleet.create_unit(
            session, UnitCreate(serial=f"BT-{i:02d}", sensor_type=st.name), actor=USER[0]
        )
        units.append(unit)
        if i == 3:  # overdue: one calibration long ago
            plan = [(500, 0.0, 0.03)]
        elif i == 1:  # drifted by 1.5 deg in a year (also out of tolerance in service)
            plan = [(400, 0.0, 0.03), (30, 1.5, 0.03)]
        elif i == 2:  # fails acceptance: scatter beyond the 1 deg tolerance
            plan = [(400, 0.0, 0.03), (30, 0.0, 1.2)]
        else:
            plan = [(400, 0.0, 0.03), (30, 0.0, 0.03)]
        for days, shift, noise in plan:
            calibrations.run_calibration(
                session,
                unit,
                CalibrationCreate(
                    performed_at=now - timedelta(days=days),
                    operator=USER[0],
                    reference="angle jig AJ-1",
                    kind=SessionKind.periodic,
                    points=_points(slope, shift, noise, rng),
                ),
                recorded_by=USER[0],
            )
    session.flush()
    recompute_flags(session, st)
    return units


def _chunks(rows: Sequence[dict[str, Any]]) -> Iterator[Sequence[dict[str, Any]]]:
    for start in range(0, len(rows), CHUNK):
        yield rows[start : start + CHUNK]


def _insert(session: Session, table: Table, rows: list[dict[str, Any]]) -> None:
    for chunk in _chunks(rows):
        session.execute(insert(table), list(chunk))


def _next_id(session: Session, table: Table) -> int:
    return int(session.scalar(select(func.coalesce(func.max(table.c.id), 0))) or 0) + 1


def _row(obj: Any, table: Table, **override: Any) -> dict[str, Any]:
    row = {c.key: getattr(obj, c.key) for c in table.columns}
    row.update(override)
    return row


def _move_sequences(engine: Engine, session: Session, tables: Sequence[Table]) -> None:
    if engine.dialect.name != "postgresql":
        return
    for table in tables:
        session.execute(
            text(
                f"SELECT setval(pg_get_serial_sequence('{table.name}', 'id'), "
                f"(SELECT max(id) FROM {table.name}))"
            )
        )


def seed(url: str, *, n_units: int = 10_000, n_flags: int = 500) -> BigFleet:
    """A fleet of ``n_units`` units of one type (templates included) with ``n_flags`` open flags
    on ``url`` (an empty database, migrated here)."""
    engine = make_engine(url)
    upgrade(engine)
    now = datetime.now(UTC).replace(microsecond=0)
    units_t: Table = Unit.__table__  # type: ignore[assignment]
    sessions_t: Table = CalibrationSession.__table__  # type: ignore[assignment]
    points_t: Table = Point.__table__  # type: ignore[assignment]
    fits_t: Table = FitRecord.__table__  # type: ignore[assignment]
    flags_t: Table = Flag.__table__  # type: ignore[assignment]
    audit_t: Table = AuditEntry.__table__  # type: ignore[assignment]
    try:
        with make_sessionmaker(engine)() as session:
            user = accounts.create_user(session, USER[0], Role.technician, USER[1])
            api_token = accounts.create_token(session, user, "bench", TokenKind.api)
            browser_token = accounts.create_token(
                session, user, "bench sign-in", TokenKind.browser, lifetime=timedelta(days=2)
            )
            templates = _templates(session, now)
            session.commit()
            template_flags = list(
                session.scalars(select(Flag).where(Flag.open.is_(True)).order_by(Flag.id))
            )
            # clones copy the well-behaved templates (not the overdue, drifted, failing or odd)
            models = [u for u in templates if u.serial in ("BT-00", "BT-04", "BT-05", "BT-06")]
            unit_id = _next_id(session, units_t)
            session_id = _next_id(session, sessions_t)
            point_id = _next_id(session, points_t)
            fit_id = _next_id(session, fits_t)
            rows: dict[str, list[dict[str, Any]]] = {
                "unit": [],
                "session": [],
                "point": [],
                "fit": [],
                "audit": [],
            }
            serials = [u.serial for u in templates]
            for i in range(n_units - len(templates)):
                model = models[i % len(models)]
                shift = timedelta(days=i % 20)
                serial = f"BF-{i:05d}"
                serials.append(serial)
                rows["unit"].append(
                    _row(
                        model,
                        units_t,
                        id=unit_id,
                        serial=serial,
                        status=UnitStatus.installed if i % 3 == 0 else UnitStatus.in_stock,
                        installed_in=f"rig {i % 40:02d}" if i % 3 == 0 else None,
                        due_on=model.due_on + shift if model.due_on else None,
                        created_at=now,
                    )
                )
                rows["audit"].append(
                    {
                        "at": now,
                        "actor": USER[0],
                        "action": "unit.registered",
                        "subject_kind": "unit",
                        "subject": serial,
                        "summary": f"{serial} registered ({TYPE_NAME})",
                        "detail": {},
                    }
                )
                for record in model.sessions:
                    rows["session"].append(
                        _row(
                            record,
                            sessions_t,
                            id=session_id,
                            unit_id=unit_id,
                            performed_at=record.performed_at + shift,
                            created_at=now,
                        )
                    )
                    for p in record.points:
                        rows["point"].append(_row(p, points_t, id=point_id, session_id=session_id))
                        point_id += 1
                    for f in record.fits:
                        rows["fit"].append(
                            _row(f, fits_t, id=fit_id, session_id=session_id, created_at=now)
                        )
                        fit_id += 1
                    session_id += 1
                unit_id += 1
            _insert(session, units_t, rows["unit"])
            _insert(session, sessions_t, rows["session"])
            _insert(session, points_t, rows["point"])
            _insert(session, fits_t, rows["fit"])
            _insert(session, audit_t, rows["audit"])
            clones = [r["id"] for r in rows["unit"]]
            wanted = max(0, n_flags - len(template_flags))
            step = max(1, len(clones) // max(1, wanted))
            flag_rows = []
            flag_id = _next_id(session, flags_t)
            for n, (model_flag, target) in enumerate(
                zip(itertools.cycle(template_flags), clones[::step][:wanted], strict=False)
            ):
                # half the outliers and overdue ones as warnings (|z| 2..3, late < 30 days)
                warn = model_flag.kind in WARNING_KINDS and n % 2 == 0
                flag_rows.append(
                    _row(
                        model_flag,
                        flags_t,
                        id=flag_id,
                        unit_id=target,
                        key=f"bench:{model_flag.kind.value}:{target}:{n}",
                        severity=Severity.warning if warn else model_flag.severity,
                        raised_at=now - timedelta(minutes=n),
                    )
                )
                flag_id += 1
            _insert(session, flags_t, flag_rows)
            _move_sequences(engine, session, (units_t, sessions_t, points_t, fits_t, flags_t))
            session.commit()
            flag_ids = list(
                session.scalars(select(Flag.id).where(Flag.open.is_(True)).order_by(Flag.id))
            )
            counts = {
                t.name: int(session.scalar(select(func.count()).select_from(t)) or 0)
                for t in (units_t, sessions_t, points_t, fits_t, flags_t)
            }
    finally:
        engine.dispose()
    return BigFleet(
        url=url,
        sensor_type=TYPE_NAME,
        serials=serials,
        flag_ids=flag_ids,
        api_token=api_token,
        browser_token=browser_token,
        counts=counts,
    )
