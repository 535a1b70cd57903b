"""PostgreSQL: a failed check of a reference standard and a calibration save against it never
wait for each other in a cycle, and the save sees the check.

A save holds its unit's row lock (``get_unit(lock=True)``), then reads the standard with FOR
SHARE; a check holds the standard with FOR UPDATE and adds a reference_suspect flag on each unit
at risk (a KEY SHARE lock on the unit's row). With FOR UPDATE on the unit, a save holding unit U
and waiting for the standard, while the check holds the standard and waits for U, deadlocked;
FOR NO KEY UPDATE does not block KEY SHARE, so the check goes on and commits, and the save then
finds the standard out of tolerance and does not pass. Checked without timing: the check runs
with a lock_timeout while the save's transaction holds the unit."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta

import pytest
import sqlalchemy as sa

from server.calibrations import service as calibrations
from server.calibrations.schemas import CalibrationCreate, PointIn
from server.db import make_engine, make_sessionmaker
from server.fleet import service as fleet
from server.fleet.schemas import SensorTypeCreate, UnitCreate
from server.migrate import upgrade
from server.standards import service as standards
from server.standards import suspect
from server.standards.schemas import CheckCreate, StandardCreate
from tests.conftest import fresh_pg_database
from tests.server.lines import line_points, pot_type

NOW = datetime.now(UTC).replace(microsecond=0)


def _session_body(days_ago: float, seed: int) -> CalibrationCreate:
    return CalibrationCreate(
        performed_at=NOW - timedelta(days=days_ago),
        operator="tom",
        reference_standard="LOCK-HEAD",
        points=[PointIn(**p) for p in line_points(seed)],
    )


@pytest.mark.postgres
def test_a_failed_check_and_a_save_against_the_standard_take_turns() -> None:
    with fresh_pg_database() as url:
        engine = make_engine(url)
        upgrade(engine)
        factory = make_sessionmaker(engine)
        try:
            with factory() as s:
                st = fleet.create_sensor_type(s, SensorTypeCreate(**pot_type("lock std pot")))
                standards.create_standard(
                    s,
                    StandardCreate(
                        name="LOCK-HEAD",
                        quantity="angle",
                        value_unit="deg",
                        expanded_u=0.05,
                        certificate="L-1",
                        calibrated_on=date.today() - timedelta(days=300),
                        due_on=date.today() + timedelta(days=300),
                    ),
                )
                unit = fleet.create_unit(s, UnitCreate(serial="LS-1", sensor_type=st.name))
                calibrations.run_calibration(s, unit, _session_body(10, 1), recorded_by="tom")
                s.commit()
            with factory() as saver, factory() as checker:
                mine = fleet.get_unit(saver, "LS-1", lock=True)  # held until the save ends
                checker.execute(sa.text("SET LOCAL lock_timeout = '3s'"))
                standard = standards.get_standard(checker, "LOCK-HEAD", lock="update")
                # LockNotAvailable here when the unit's lock blocked the flag's foreign key
                _, flagged = suspect.check_standard(
                    checker,
                    standard,
                    # the day before NOW: the save below (NOW - 15 min) is after it even just
                    # past midnight, when NOW - 15 min is still the day before
                    CheckCreate(checked_on=(NOW - timedelta(days=1)).date(), in_tolerance=False),
                    "ann",
                )
                checker.commit()
                assert flagged == ["LS-1"]
                record = calibrations.run_calibration(
                    saver, mine, _session_body(0.01, 2), recorded_by="tom"
                )
                saver.commit()
                assert record.reference_standard_problem is not None
                assert record.current_fit is not None and record.current_fit.passed is False
        finally:
            engine.dispose()
