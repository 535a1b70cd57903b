"""PostgreSQL: the fleet comparison's write and a calibration save never wait for each other in
a cycle (a deadlock, found by tests/reliability under two servers).

A save holds its unit's row lock (``get_unit(lock=True)``) and, last, queues the type's fleet
job: the job row's foreign key takes a KEY SHARE lock on the sensor type's row. The comparison's
write locks the type's row, then updates unit rows and adds flags (a KEY SHARE lock on each flag's
unit). With FOR UPDATE on the type, a save holding unit U and waiting for the type, while the
write holds the type and waits for U, deadlocked; FOR NO KEY UPDATE does not block KEY SHARE, so
the save goes on, commits and frees U. Checked without timing: the save's part runs with a
lock_timeout while the write's transaction is open."""

from __future__ import annotations

from datetime import UTC, datetime

import pytest
import sqlalchemy as sa
from sqlalchemy.orm import Session

from server.calibrations import service as calibrations
from server.calibrations.schemas import CalibrationCreate, PointIn
from server.db import make_engine, make_sessionmaker
from server.flags.fleet import compare, queue, write
from server.flags.service import recompute_flags
from server.fleet import service as fleet
from server.fleet.models import SensorType
from server.fleet.schemas import SensorTypeCreate, UnitCreate
from server.jobs.models import Job
from server.migrate import upgrade
from tests.conftest import fresh_pg_database
from tests.server.lines import line_points, pot_type

WHEN = datetime(2026, 1, 5, 9, 0, tzinfo=UTC)


def _fleet(session: Session) -> SensorType:
    """Six calibrated units of one type, every flag computed."""
    st = fleet.create_sensor_type(session, SensorTypeCreate(**pot_type("lock pot")))
    for i in range(6):
        unit = fleet.create_unit(session, UnitCreate(serial=f"LK-{i}", sensor_type=st.name))
        calibrations.run_calibration(
            session,
            unit,
            CalibrationCreate(
                performed_at=WHEN,
                operator="tom",
                reference="angle jig",
                points=[PointIn(**p) for p in line_points(i, shift=0.05 * i)],
            ),
            recorded_by="tom",
        )
    session.flush()
    recompute_flags(session, st)
    return st


@pytest.mark.postgres
def test_a_save_queues_its_fleet_job_while_a_comparison_writes() -> None:
    with fresh_pg_database() as url:
        engine = make_engine(url)
        upgrade(engine)
        factory = make_sessionmaker(engine)
        try:
            with factory() as s:
                st_id = _fleet(s).id
                s.commit()
            with factory() as writer, factory() as saver:
                st = writer.get(SensorType, st_id)
                assert st is not None
                write(writer, compare(writer, st.id))  # holds the type's row until it ends
                saver.execute(sa.text("SET LOCAL lock_timeout = '3s'"))
                mine = saver.get(SensorType, st.id)
                assert mine is not None
                saver.execute(sa.delete(Job))  # no queued job to fold into: a new row is added
                queue(saver, mine)  # LockNotAvailable here when the write blocked it
                saver.commit()
                writer.commit()
        finally:
            engine.dispose()
