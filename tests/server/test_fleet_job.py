"""The fleet comparison after saves: a background job per type, coalesced, fed from the curves
stored on each unit, giving the same flags as the engine on the fits themselves (SQLite and
PostgreSQL).

Synthetic units (common practice, no source): value = g r, each unit its own gain g near 0.1
(1 % spread), N(0, 0.02) noise; one unit reads 4 deg high everywhere (an odd unit by
construction). The expected outliers come from ``shared.fleet.fleet_outliers`` applied to the
stored fits, the engine function the ISO 13528 reference tests check (tests/shared).
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pytest
import sqlalchemy as sa

import shared
from server.calibrations.models import CalibrationSession, FitRecord
from server.flags.models import Flag, FlagKind
from server.flags.service import recompute_flags
from server.fleet.models import SensorType, Unit
from server.jobs import service as jobs
from server.jobs.models import Job, JobKind, JobState
from shared.fleet import fleet_outliers
from tests.server.lines import READINGS, pot_type

TYPE = "Pot 330"
NOW = datetime.now(UTC).replace(microsecond=0)
N_UNITS = 12
ODD = "Q-07"
TIMEOUT_S = 60


def gain_points(seed: int, *, offset: float = 0.0) -> list[dict[str, float]]:
    rng = np.random.default_rng(seed)
    gain = 0.1 * (1.0 + 0.01 * rng.standard_normal())
    values = gain * READINGS + offset + rng.normal(0.0, 0.02, READINGS.size)
    return [
        {"reference_value": round(float(v), 4), "reading": float(r)}
        for v, r in zip(values, READINGS, strict=True)
    ]


def save(client: Any, headers: dict[str, str], serial: str, pts: list[dict[str, float]]) -> Any:
    return client.post(
        f"/api/v1/units/{serial}/calibrations",
        json={
            "performed_at": (NOW - timedelta(days=1)).isoformat(),
            "operator": "tom",
            "reference": "angle jig",
            "kind": "incoming",
            "points": pts,
        },
        headers=headers,
    )


def serials() -> list[str]:
    return [f"Q-{i:02d}" for i in range(1, N_UNITS + 1)]


@pytest.fixture
def fleet(client, admin, technician) -> None:
    r = client.post("/api/v1/sensor-types", json=pot_type(TYPE), headers=admin)
    assert r.status_code == 201, r.text
    for i, serial in enumerate(serials(), start=1):
        r = client.post(
            "/api/v1/units", json={"serial": serial, "sensor_type": TYPE}, headers=technician
        )
        assert r.status_code == 201, r.text
        r = save(client, technician, serial, gain_points(i, offset=4.0 if serial == ODD else 0))
        assert r.status_code == 201, r.text


def open_outliers(app: Any) -> dict[str, tuple[str, float]]:
    with app.state.sessionmaker() as s:
        rows = s.execute(
            sa.select(Unit.serial, Flag.severity, Flag.evidence)
            .join(Flag.unit)
            .where(Flag.kind == FlagKind.fleet_outlier, Flag.open.is_(True))
        ).all()
    return {serial: (sev.value, float(ev["z"])) for serial, sev, ev in rows}


def engine_outliers(app: Any) -> dict[str, tuple[str, float]]:
    """What the engine says on the stored current fits (not on the stored curves)."""
    with app.state.sessionmaker() as s:
        fits = {
            serial: shared.Fit.from_dict(result)
            for serial, result in s.execute(
                sa.select(Unit.serial, FitRecord.result)
                .join(CalibrationSession, CalibrationSession.unit_id == Unit.id)
                .join(FitRecord, FitRecord.session_id == CalibrationSession.id)
                .where(FitRecord.is_current.is_(True), CalibrationSession.voided_at.is_(None))
            )
        }
    found = fleet_outliers(fits)
    return {
        serial: (score.level, score.z_at_max)
        for serial, score in found.units.items()
        if score.level in ("action", "warning")
    }


def test_saves_leave_the_comparison_to_one_job_that_matches_the_engine(client, app, fleet):
    app.state.jobs.wait(TIMEOUT_S)
    got = open_outliers(app)
    expected = engine_outliers(app)
    assert ODD in expected and expected[ODD][0] == "action"
    assert got.keys() == expected.keys()
    for serial, (level, z) in expected.items():
        assert got[serial][0] == level
        assert got[serial][1] == pytest.approx(z, rel=1e-12)
    with app.state.sessionmaker() as s:
        ran = s.scalars(sa.select(Job).where(Job.kind == JobKind.fleet)).all()
        assert all(j.state is JobState.done and j.attempts == 1 for j in ran)
        assert len(ran) <= N_UNITS  # coalesced: never more jobs than saves
        st = s.scalar(sa.select(SensorType).where(SensorType.name == TYPE))
        assert st is not None and st.fleet_checked_at is not None and st.fleet_probes


def test_the_full_recompute_gives_the_same_flags_as_the_job(client, app, fleet):
    app.state.jobs.wait(TIMEOUT_S)
    from_job = open_outliers(app)
    with app.state.sessionmaker() as s:
        st = s.scalar(sa.select(SensorType).where(SensorType.name == TYPE))
        assert st is not None
        s.execute(sa.update(Unit).values(fleet_values=None))  # force every curve re-evaluated
        recompute_flags(s, st)
        s.commit()
    assert open_outliers(app) == from_job


def test_a_retired_outlier_leaves_the_comparison(client, app, admin, fleet):
    app.state.jobs.wait(TIMEOUT_S)
    assert ODD in open_outliers(app)
    r = client.patch(f"/api/v1/units/{ODD}", json={"status": "retired"}, headers=admin)
    assert r.status_code == 200, r.text
    app.state.jobs.wait(TIMEOUT_S)
    assert ODD not in open_outliers(app)
    with app.state.sessionmaker() as s:
        unit = s.scalar(sa.select(Unit).where(Unit.serial == ODD))
        assert unit is not None and unit.fleet_fit_id is None


def test_the_fleet_comparison_is_queued_once_while_it_waits(app, fleet):
    app.state.jobs.wait(TIMEOUT_S)
    app.state.jobs.shutdown()  # nobody claims: the queue is what is tested
    with app.state.sessionmaker() as s:
        st = s.scalar(sa.select(SensorType).where(SensorType.name == TYPE))
        assert st is not None
        first = jobs.enqueue_once(
            s, JobKind.fleet, jobs.fleet_key(st.id), "x", sensor_type_id=st.id
        )
        s.commit()
    with app.state.sessionmaker() as s:
        again = jobs.enqueue_once(
            s, JobKind.fleet, jobs.fleet_key(st.id), "x", sensor_type_id=st.id
        )
        s.commit()
        assert again == first
        queued = s.scalar(
            sa.select(sa.func.count())
            .select_from(Job)
            .where(Job.kind == JobKind.fleet, Job.state == JobState.queued)
        )
        assert queued == 1
    claimed = jobs.claim(app.state.sessionmaker, "tests:1")
    assert claimed is not None and claimed[0] == first
    with app.state.sessionmaker() as s:  # claimed: a new change queues a new comparison
        later = jobs.enqueue_once(
            s, JobKind.fleet, jobs.fleet_key(st.id), "x", sensor_type_id=st.id
        )
        s.commit()
    assert later != first
    # one job per type at a time: the new one waits while the claimed one runs
    assert jobs.claim(app.state.sessionmaker, "tests:2") is None
