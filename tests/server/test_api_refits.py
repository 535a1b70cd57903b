"""Editing a sensor type, refitting it as a background job, and what follows from it (SQLite and
PostgreSQL): decisions re-judged, previous fits kept, flags recomputed; the unit list's flag
filter and the flags in a calibration's answer; jobs and due dates after a restart.

The points are synthetic (common practice, no source): a line value = 0.1 r with a little noise;
one unit has a point bumped by BUMP, so it passes a tolerance of 1.0 and fails one of 0.3. The
expected pass/fail is decided in the test from numpy's own least-squares line.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pytest
import sqlalchemy as sa

from server.app import create_app
from server.calibrations.models import FitRecord
from server.config import Settings
from server.fleet.models import SensorType, Unit
from server.jobs.models import Job, JobKind, JobState
from server.jobs.service import MAX_ATTEMPTS
from tests.server.lines import calibrate, line_points, pot_type

TYPE = "Pot 270"
NOW = datetime.now(UTC).replace(microsecond=0)
BUMP = 0.6
TIMEOUT_S = 120  # a refit of a handful of sessions takes well under a second; this is a hang


def points(seed: int, *, shift: float = 0.0, bump: float = 0.0) -> list[dict[str, float]]:
    return line_points(seed, shift=shift, bump=bump, bump_at=4)


def worst_line_residual(pts: list[dict[str, float]]) -> float:
    """Largest |residual| of an ordinary least-squares line (numpy, not our engine)."""
    r = np.array([p["reading"] for p in pts])
    v = np.array([p["reference_value"] for p in pts])
    coef = np.polyfit(r, v, 1)
    return float(np.max(np.abs(v - np.polyval(coef, r))))


@pytest.fixture
def shop(client, admin, technician) -> dict[str, Any]:
    r = client.post(
        "/api/v1/sensor-types",
        json=pot_type(TYPE, drift_limit_abs=5.0, interval_days=365),
        headers=admin,
    )
    assert r.status_code == 201, r.text
    for serial in ("P-1", "P-2", "P-3"):
        r = client.post(
            "/api/v1/units", json={"serial": serial, "sensor_type": TYPE}, headers=technician
        )
        assert r.status_code == 201, r.text
    bumped = points(3, bump=BUMP)
    calibrate(client, technician, "P-1", NOW - timedelta(days=200), points(1))
    calibrate(client, technician, "P-1", NOW - timedelta(days=10), points(2, shift=1.0))
    calibrate(client, technician, "P-2", NOW - timedelta(days=5), bumped)
    return {"bumped": bumped}


def patch(client: Any, headers: dict[str, str], body: dict[str, Any], name: str = TYPE) -> Any:
    return client.patch(f"/api/v1/sensor-types/{name}", json=body, headers=headers)


def finished(client: Any, app: Any, headers: dict[str, str], job_id: int) -> dict[str, Any]:
    app.state.jobs.wait(TIMEOUT_S)
    r = client.get(f"/api/v1/jobs/{job_id}", headers=headers)
    assert r.status_code == 200, r.text
    return dict(r.json())


def open_kinds(client: Any, headers: dict[str, str], serial: str) -> set[str]:
    r = client.get("/api/v1/flags", params={"open": True, "per_page": 500}, headers=headers)
    assert r.status_code == 200, r.text
    return {f["kind"] for f in r.json()["items"] if f["unit"] == serial}


def fits_of_unit(app: Any, serial: str) -> list[FitRecord]:
    with app.state.sessionmaker() as s:
        unit = s.scalar(sa.select(Unit).where(Unit.serial == serial))
        assert unit is not None
        return [f for record in unit.sessions for f in record.fits]


def test_tighter_tolerance_refits_the_type_and_keeps_the_old_fits(client, app, admin, viewer, shop):
    worst = worst_line_residual(shop["bumped"])
    assert 0.3 < worst < 1.0  # the premise: P-2 passes at 1.0 and fails at 0.3
    before = client.get("/api/v1/units/P-2/calibration", headers=viewer).json()["calibration"]
    assert before["decision"]["passed"] is True
    assert "failed_acceptance" not in open_kinds(client, viewer, "P-2")

    r = patch(client, admin, {"tolerance_abs": 0.3})
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["changed"] == ["tolerance_abs"]
    assert body["sensor_type"]["tolerance_abs"] == 0.3
    assert body["flags_recomputed"] is False
    job = body["job"]
    assert job["state"] in {"queued", "running", "done"}
    assert job["total"] == 3 and job["requested_by"] == "ada"
    assert "tolerance_abs 1.0 -> 0.3" in job["reason"]

    done = finished(client, app, viewer, job["id"])
    assert done["state"] == "done", done
    assert (done["done"], done["total"], done["refitted"]) == (3, 3, 3)
    assert done["changed_decisions"] >= 1 and done["problems"] == []
    assert done["started_at"] and done["finished_at"]

    after = client.get("/api/v1/units/P-2/calibration", headers=viewer).json()["calibration"]
    assert after["decision"]["passed"] is False
    assert after["id"] == before["id"]  # the same session, judged again
    assert after["fit"]["params"] == pytest.approx(before["fit"]["params"], rel=1e-9)
    assert "failed_acceptance" in open_kinds(client, viewer, "P-2")
    assert "failed_acceptance" in {f["kind"] for f in after["flags"]}

    fits = fits_of_unit(app, "P-2")
    assert len(fits) == 2  # the previous fit is kept, not current
    assert [f.is_current for f in fits] == [False, True]
    assert [f.passed for f in fits] == [True, False]


def test_changing_families_refits_with_the_new_ranking(client, app, admin, viewer, shop):
    r = patch(
        client,
        admin,
        {"families": ["line", "polynomial"], "family_options": {"polynomial": {"degree": 2}}},
    )
    assert r.status_code == 200, r.text
    assert r.json()["changed"] == ["families", "family_options"]
    done = finished(client, app, viewer, r.json()["job"]["id"])
    assert done["state"] == "done" and done["refitted"] == 3
    ranking = client.get("/api/v1/units/P-1/calibration", headers=viewer).json()["calibration"][
        "ranking"
    ]
    assert {c["family"] for c in ranking["candidates"]} == {"line", "polynomial"}


def test_a_session_that_cannot_be_refitted_keeps_its_fit(client, app, admin, viewer, shop):
    # Steinhart-Hart needs positive readings (ln R): every session here has a reading of 0.
    r = patch(client, admin, {"families": ["steinhart_hart"]})
    assert r.status_code == 200, r.text
    done = finished(client, app, viewer, r.json()["job"]["id"])
    assert done["state"] == "done"
    assert done["refitted"] == 0 and len(done["problems"]) == 3
    assert {p["unit"] for p in done["problems"]} == {"P-1", "P-2"}
    assert "could not be refitted" in done["message"]
    current = client.get("/api/v1/units/P-1/calibration", headers=viewer).json()["calibration"]
    assert current["fit"]["family"] == "line"
    kept = fits_of_unit(app, "P-2")
    assert len(kept) == 1 and kept[0].is_current


def test_drift_limit_recomputes_flags_without_a_job(client, app, admin, viewer, shop):
    assert "drift" not in open_kinds(client, viewer, "P-1")  # shifted 1.0, limit 5.0
    r = patch(client, admin, {"drift_limit_abs": 0.5})
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["job"] is None and body["flags_recomputed"] is True
    assert "drift" in open_kinds(client, viewer, "P-1")
    assert len(fits_of_unit(app, "P-1")) == 2  # nothing refitted


def test_an_edit_that_changes_nothing_starts_nothing(client, admin, shop):
    r = patch(client, admin, {"tolerance_abs": 1.0, "interval_days": 365})
    assert r.status_code == 200, r.text
    assert r.json()["changed"] == [] and r.json()["job"] is None


@pytest.mark.parametrize(
    ("body", "field"),
    [
        ({"families": ["no_such_family"]}, "families.0"),
        ({"families": ["line", "line"]}, "families"),
        ({"tolerance_abs": None}, "tolerance_abs"),
        ({"family_options": {"polynomial": {"degree": 2}}}, "family_options"),
        ({"tur": None}, ""),
        ({"value_unit": "rad"}, "value_unit"),
        ({"interval_days": 0}, "interval_days"),
    ],
)
def test_bad_edits_are_refused_and_change_nothing(client, admin, viewer, shop, body, field):
    before = client.get("/api/v1/sensor-types", headers=viewer).json()["items"]
    r = patch(client, admin, body)
    assert r.status_code == 422, r.text
    assert r.json()["field"] == field
    assert client.get("/api/v1/sensor-types", headers=viewer).json()["items"] == before


def test_only_admins_edit_or_refit_types(client, technician, viewer, admin, shop):
    for headers in (technician, viewer):
        assert patch(client, headers, {"tur": 3.0}).status_code == 403
        assert client.post(f"/api/v1/sensor-types/{TYPE}/refit", headers=headers).status_code == 403
    assert patch(client, admin, {"tur": 3.0}, name="No such").status_code == 404
    assert client.get("/api/v1/jobs/9999", headers=viewer).status_code == 404


def test_refit_on_request(client, app, admin, viewer, shop):
    r = client.post(f"/api/v1/sensor-types/{TYPE}/refit", headers=admin)
    assert r.status_code == 202, r.text
    assert r.json()["reason"] == "refit requested"
    done = finished(client, app, viewer, r.json()["id"])
    assert done["state"] == "done" and done["refitted"] == 3
    assert done["changed_decisions"] == 0
    assert len(fits_of_unit(app, "P-1")) == 4


def test_units_filtered_by_open_flag(client, admin, viewer, technician, shop):
    patch(client, admin, {"drift_limit_abs": 0.5})

    def serials(**query: Any) -> list[str]:
        r = client.get("/api/v1/units", params=query, headers=viewer)
        assert r.status_code == 200, r.text
        assert r.json()["total"] == len(r.json()["items"])
        return [u["serial"] for u in r.json()["items"]]

    assert serials(flag="drift") == ["P-1"]
    assert serials(flag="any") == ["P-1"]
    assert serials(flag="fleet_outlier") == []
    assert serials(flag="drift", sensor_type="No such") == []
    r = client.get("/api/v1/units", params={"flag": "wobbly"}, headers=viewer)
    assert r.status_code == 422 and r.json()["field"] == "flag"


def test_a_calibration_answers_with_the_units_open_flags(client, admin, technician, shop):
    patch(client, admin, {"drift_limit_abs": 0.5})
    saved = calibrate(client, technician, "P-1", NOW - timedelta(days=1), points(9, shift=2.5))
    kinds = {f["kind"] for f in saved["flags"]}
    assert "drift" in kinds
    assert all(f["unit"] == "P-1" and f["open"] for f in saved["flags"])
    quiet = calibrate(client, technician, "P-3", NOW - timedelta(days=1), points(10))
    assert quiet["flags"] == []


def _left_running(app: Any, attempts: int) -> int:
    """A refit job as a process that died mid-job leaves it: running, its heartbeat old."""
    with app.state.sessionmaker() as s:
        sensor_type = s.scalar(sa.select(SensorType).where(SensorType.name == TYPE))
        assert sensor_type is not None
        job = Job(
            kind=JobKind.refit,
            sensor_type=sensor_type,
            state=JobState.running,
            reason="x",
            problems=[],
            claimed_by="gone:1",
            claim_token="0" * 32,
            heartbeat_at=NOW - timedelta(minutes=10),
            attempts=attempts,
        )
        s.add(job)
        s.commit()
        return job.id


def test_a_job_whose_process_died_is_resumed_and_due_dates_are_stored(db_url, shop, client, app):
    job_id = _left_running(app, attempts=1)
    with app.state.sessionmaker() as s:
        stored = dict(s.execute(sa.select(Unit.serial, Unit.due_on)).all())
        s.execute(sa.update(Unit).values(due_on=None, due_basis=None))
        s.commit()
    assert stored["P-1"] is not None and stored["P-3"] is None

    again = create_app(Settings(database_url=db_url, job_stale_after_s=2.0, job_poll_s=0.1))
    again.state.jobs.start()  # what a restarted server (or another one) does
    try:
        again.state.jobs.wait(TIMEOUT_S)
        with again.state.sessionmaker() as s:
            job = s.get(Job, job_id)
            assert job is not None and job.state is JobState.done, job.message if job else None
            assert job.attempts == 2 and job.refitted == 3
            now = dict(s.execute(sa.select(Unit.serial, Unit.due_on)).all())
        assert now == stored
    finally:
        again.state.jobs.shutdown()
        again.state.engine.dispose()


def test_a_job_whose_process_died_too_often_fails_and_changes_nothing(db_url, shop, client, app):
    before = {f.id: f.is_current for f in fits_of_unit(app, "P-1")}
    job_id = _left_running(app, attempts=MAX_ATTEMPTS)
    again = create_app(Settings(database_url=db_url, job_stale_after_s=2.0, job_poll_s=0.1))
    again.state.jobs.start()
    try:
        again.state.jobs.wait(TIMEOUT_S)
        with again.state.sessionmaker() as s:
            job = s.get(Job, job_id)
            assert job is not None and job.state is JobState.failed
            assert job.message is not None and "nothing was changed" in job.message
    finally:
        again.state.jobs.shutdown()
        again.state.engine.dispose()
    assert {f.id: f.is_current for f in fits_of_unit(app, "P-1")} == before


def test_the_unit_flag_filter_names_every_flag_kind():
    from server.flags.models import FlagKind
    from server.fleet.routes import FlagFilter

    assert {f.value for f in FlagFilter} == {k.value for k in FlagKind} | {"any"}


def test_retiring_a_unit_recomputes_its_types_flags(client, app, admin, technician, viewer, shop):
    done = finished(
        client, app, viewer, patch(client, admin, {"tolerance_abs": 0.3}).json()["job"]["id"]
    )
    assert done["state"] == "done"
    assert "failed_acceptance" in open_kinds(client, viewer, "P-2")
    r = client.patch("/api/v1/units/P-2", json={"status": "retired"}, headers=technician)
    assert r.status_code == 200, r.text
    assert r.json()["status"] == "retired"
    assert open_kinds(client, viewer, "P-2") == set()  # retired units carry no open flags
    r = client.get("/api/v1/flags", params={"open": False}, headers=viewer)
    closed = [f for f in r.json()["items"] if f["unit"] == "P-2"]
    assert closed and all(f["closed_at"] for f in closed)  # closed, kept


def test_unit_status_rules(client, technician, viewer, shop):
    r = client.patch("/api/v1/units/P-3", json={"status": "installed"}, headers=technician)
    assert r.status_code == 422 and "installation event" in r.json()["detail"]
    r = client.post(
        "/api/v1/units/P-3/events",
        json={"kind": "installed", "location": "arm 4", "at": NOW.isoformat()},
        headers=technician,
    )
    assert r.status_code == 201, r.text
    r = client.patch("/api/v1/units/P-3", json={"status": "quarantined"}, headers=technician)
    assert r.status_code == 422 and r.json()["field"] == "status"
    assert "removal" in r.json()["detail"]
    assert client.get("/api/v1/units/P-3", headers=viewer).json()["status"] == "installed"
    r = client.patch("/api/v1/units/P-1", json={"notes": "  bent bracket  "}, headers=technician)
    assert r.status_code == 200 and r.json()["notes"] == "bent bracket"
    assert client.patch("/api/v1/units/P-1", json={"notes": "x"}, headers=viewer).status_code == 403
    assert (
        client.patch("/api/v1/units/Q-9", json={"notes": "x"}, headers=technician).status_code
        == 404
    )


def test_a_sessions_fits_are_all_listed_after_a_refit(client, app, admin, viewer, shop):
    done = finished(
        client, app, viewer, patch(client, admin, {"tolerance_abs": 0.3}).json()["job"]["id"]
    )
    assert done["state"] == "done"
    listed = client.get("/api/v1/units/P-2/calibrations", headers=viewer).json()
    assert listed["total"] == 1
    (line,) = listed["items"]
    assert (line["fits"], line["passed"], line["current"], line["voided"]) == (
        2,
        False,
        True,
        False,
    )
    full = client.get(f"/api/v1/units/P-2/calibrations/{line['id']}", headers=viewer).json()
    history = full["fit_history"]
    assert [(h["current"], h["passed"]) for h in history] == [(False, True), (True, False)]
    assert history[0]["fitted_at"] <= history[1]["fitted_at"]
    p1 = client.get("/api/v1/units/P-1/calibrations", headers=viewer).json()["items"]
    assert [x["current"] for x in p1] == [True, False]  # newest first
    assert p1[0]["performed_at"] > p1[1]["performed_at"]
    other = client.get(f"/api/v1/units/P-1/calibrations/{line['id']}", headers=viewer)
    assert other.status_code == 404  # P-2's session is not P-1's
    paged = client.get(
        "/api/v1/units/P-1/calibrations", params={"per_page": 1, "page": 2}, headers=viewer
    ).json()
    assert paged["total"] == 2 and [x["id"] for x in paged["items"]] == [p1[1]["id"]]
