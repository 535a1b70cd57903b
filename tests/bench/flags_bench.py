"""Time the flag recomputation that follows a saved calibration, on a 200-unit sensor type.

Saves, voids, events and status changes recompute the flags of their own unit and the fleet
outliers of the type (``recompute_flags(..., units=[unit])``); an edit of the type recomputes every
unit (``recompute_flags(...)``, the baseline here: what every save did before). A unit's drift,
as-found and due date compare curves (tens of ms each), so the whole type costs about units x
that. Both sides must leave the same open flags (checked before any time is reported).

The fleet: invented potentiometers read in counts, value = c0 + c1 r with slopes 2 % apart, two
calibrations each a year apart (a few drifted), on a temporary SQLite file.
"""

from __future__ import annotations

import tempfile
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
from sqlalchemy import select

N_UNITS = 200


def build(path: Path) -> Any:
    """A migrated SQLite file with the fleet; the app (its sessionmaker) on it."""
    from server.app import create_app
    from server.calibrations import service as calibrations
    from server.calibrations.schemas import CalibrationCreate, PointIn
    from server.config import Settings
    from server.fleet import service as fleet
    from server.fleet.schemas import SensorTypeCreate, UnitCreate

    app = create_app(Settings(database_url=f"sqlite:///{path}"))
    rng = np.random.default_rng(7)
    readings = np.linspace(0.0, 1000.0, 11)
    first = datetime(2025, 1, 10, 9, 0, tzinfo=UTC)
    with app.state.sessionmaker() as session:
        st = fleet.create_sensor_type(
            session,
            SensorTypeCreate(
                name="bench pot",
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
        for i in range(N_UNITS):
            unit = fleet.create_unit(session, UnitCreate(serial=f"BP-{i:03d}", sensor_type=st.name))
            slope = 0.27 * (1 + 0.02 * rng.normal())
            for year, shift in ((0, 0.0), (1, 1.5 if i % 25 == 0 else 0.0)):
                values = slope * readings + shift + rng.normal(0.0, 0.03, readings.size)
                calibrations.run_calibration(
                    session,
                    unit,
                    CalibrationCreate(
                        performed_at=first + timedelta(days=365 * year),
                        operator="bench",
                        reference="angle jig",
                        points=[
                            PointIn(reference_value=float(v), reading=float(r))
                            for v, r in zip(values, readings, strict=True)
                        ],
                    ),
                    recorded_by="bench",
                )
        session.commit()
    return app


def open_flags(session: Any) -> set[tuple[int, str, str, str]]:
    from server.flags.models import Flag

    return {
        (f.unit_id, f.kind.value, f.severity.value, f.message)
        for f in session.scalars(select(Flag).where(Flag.open.is_(True)))
    }


def flags_case() -> Any:
    """The bench Case: ours = one unit's recompute, baseline = the whole type's."""
    from server.flags.service import recompute_flags
    from server.fleet.models import SensorType, Unit
    from tests.bench.__main__ import Case

    folder = Path(tempfile.mkdtemp(prefix="sensorledger-bench-"))
    app = build(folder / "bench.db")
    session = app.state.sessionmaker()
    st = session.scalar(select(SensorType))
    unit = session.scalar(select(Unit).where(Unit.serial == "BP-000"))
    recompute_flags(session, st)
    session.commit()
    full = open_flags(session)
    recompute_flags(session, st, units=[unit])
    session.flush()
    same = open_flags(session) == full
    n_drift = sum(1 for f in full if f[1] == "drift")
    return Case(
        name=f"flags after a save, {N_UNITS}-unit type",
        ours=lambda: recompute_flags(session, st, units=[unit]),
        baseline=lambda: recompute_flags(session, st),
        agreement=0.0 if same else 1.0,
        loops=1,
        repeats=3,
        notes=(
            f"  the unit's own recompute and the whole type's leave the same {len(full)} open "
            f"flags ({n_drift} drift): {'yes' if same else 'NO'}",
        ),
    )
