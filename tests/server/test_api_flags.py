"""Flags over the API (SQLite and PostgreSQL): drift, out of tolerance in service with the
installations affected, failed acceptance, overdue; acknowledging; recomputation keeps or closes.

The points are synthetic (common practice, no source): a line value = 0.1 r with a little noise,
and a second calibration of the same unit shifted by 3 value units, far past the drift limit
(0.5) and the tolerance (1.0).
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

import pytest

from tests.server.lines import READINGS, line_points
from tests.server.lines import calibrate as save

TYPE = "Pot 1000"
NOW = datetime.now(UTC).replace(microsecond=0)
SHIFT = 3.0


def points(shift: float = 0.0, *, seed: int, bump: float = 0.0) -> list[dict[str, float]]:
    return line_points(seed, shift=shift, bump=bump)


def calibrate(client: Any, headers: dict[str, str], serial: str, when: datetime, pts: list) -> int:
    return int(save(client, headers, serial, when, pts, reference="indexing head")["id"])


def flags(client: Any, headers: dict[str, str], **query: Any) -> list[dict[str, Any]]:
    r = client.get("/api/v1/flags", params={"per_page": 500, **query}, headers=headers)
    assert r.status_code == 200, r.text
    body = r.json()
    assert set(body) == {"items", "total", "page", "per_page"}
    assert body["total"] == len(body["items"])
    return list(body["items"])


def of(items: list[dict[str, Any]], serial: str, kind: str) -> list[dict[str, Any]]:
    return [f for f in items if f["unit"] == serial and f["kind"] == kind]


@pytest.fixture
def shop(client, admin, technician) -> dict[str, Any]:
    """A type with a drift limit; D-1 drifted while installed in rig A; F-1 fails; O-1 is
    overdue; a second type with one unit, for the sensor_type filter."""
    for name, interval in ((TYPE, 365), ("Other pot", 365)):
        r = client.post(
            "/api/v1/sensor-types",
            json={
                "name": name,
                "quantity": "angle",
                "value_unit": "deg",
                "reading_unit": "counts",
                "reading_min": 0,
                "reading_max": 1023,
                "families": ["line"],
                "tolerance_abs": 1.0,
                "drift_limit_abs": 0.5,
                "interval_days": interval,
            },
            headers=admin,
        )
        assert r.status_code == 201, r.text
    for serial, type_name in (("D-1", TYPE), ("F-1", TYPE), ("O-1", TYPE), ("X-1", "Other pot")):
        r = client.post(
            "/api/v1/units", json={"serial": serial, "sensor_type": type_name}, headers=technician
        )
        assert r.status_code == 201, r.text
    first = NOW - timedelta(days=60)
    calibrate(client, technician, "D-1", first, points(seed=1))
    r = client.post(
        "/api/v1/units/D-1/events",
        json={
            "kind": "installed",
            "location": "rig A / wrist",
            "at": (first + timedelta(days=5)).isoformat(),
        },
        headers=technician,
    )
    assert r.status_code == 201, r.text
    second = NOW - timedelta(days=2)
    calibrate(client, technician, "D-1", second, points(SHIFT, seed=2))
    calibrate(client, technician, "F-1", NOW - timedelta(days=1), points(seed=3, bump=4.0))
    calibrate(client, technician, "O-1", NOW - timedelta(days=400), points(seed=4))
    calibrate(client, technician, "X-1", NOW - timedelta(days=500), points(seed=5))
    return {"first": first, "second": second}


def test_drift_flag_with_evidence(client, viewer, shop):
    drift = of(flags(client, viewer), "D-1", "drift")
    assert len(drift) == 1
    flag = drift[0]
    assert flag["severity"] == "action" and flag["open"] is True
    assert flag["acknowledged_by"] is None and flag["note"] is None
    assert "deg" in flag["message"] and "\n" not in flag["message"]
    assert flag["detail"] == flag["message"]
    e = flag["evidence"]
    assert e["max_deviation"] == pytest.approx(SHIFT, abs=0.1)
    assert e["drift_limit"] == 0.5
    assert e["z_simultaneous"] > e["critical"] > 0
    assert abs(e["en_at_max"]) > 1
    grid = e["grid"]
    assert len(grid["reading"]) == len(grid["deviation"]) == len(grid["band"]) <= 41
    assert datetime.fromisoformat(flag["raised_at"]).tzinfo is not None


def test_out_of_tolerance_in_service_names_the_installation(client, viewer, shop):
    found = of(flags(client, viewer), "D-1", "out_of_tolerance_in_service")
    assert len(found) == 1
    flag = found[0]
    assert "rig A / wrist" in flag["message"]
    e = flag["evidence"]
    assert e["worst_error"] == pytest.approx(-SHIFT, abs=0.1)
    assert e["allowed_at_worst"] == pytest.approx(1.0)
    assert e["tolerance_used_pct"] == pytest.approx(100 * abs(e["worst_error"]) / 1.0)
    assert "% of its tolerance" in flag["message"]
    assert e["n_out"] == e["n_judged"] == READINGS.size
    [place] = e["installations"]
    assert place["location"] == "rig A / wrist"
    assert datetime.fromisoformat(place["from"]) == shop["first"] + timedelta(days=5)
    assert place["to"] is None  # still installed


def test_failed_acceptance_and_overdue(client, viewer, shop):
    items = flags(client, viewer)
    [failed] = of(items, "F-1", "failed_acceptance")
    assert failed["severity"] == "action"
    e = failed["evidence"]
    assert e["worst_error"] > e["allowed_at_worst"]
    assert e["tolerance_used_pct"] == pytest.approx(100 * e["worst_error"] / e["allowed_at_worst"])
    [overdue] = of(items, "O-1", "overdue")
    assert overdue["evidence"]["days_overdue"] == 35
    assert overdue["severity"] == "action"  # more than 30 days late
    assert not of(items, "F-1", "overdue") and not of(items, "O-1", "failed_acceptance")
    assert not of(items, "F-1", "drift")  # one calibration: nothing to compare


def test_filters(client, viewer, shop):
    assert {f["kind"] for f in flags(client, viewer, kind="drift")} == {"drift"}
    other = flags(client, viewer, sensor_type="Other pot")
    assert [(f["unit"], f["kind"]) for f in other] == [("X-1", "overdue")]
    assert "X-1" not in {f["unit"] for f in flags(client, viewer, sensor_type=TYPE)}
    assert flags(client, viewer, open="false") == []
    assert len(flags(client, viewer, open="true")) == len(flags(client, viewer))
    r = client.get("/api/v1/flags", params={"kind": "wobbly"}, headers=viewer)
    assert r.status_code == 422 and r.json()["field"] == "kind"
    page = client.get("/api/v1/flags", params={"per_page": 2, "page": 2}, headers=viewer).json()
    assert (page["page"], page["per_page"], len(page["items"])) == (2, 2, 2)
    assert page["total"] == len(flags(client, viewer))


def test_acknowledge_keeps_note_who_and_when(client, viewer, technician, shop):
    [flag] = of(flags(client, viewer), "D-1", "drift")
    url = f"/api/v1/flags/{flag['id']}/acknowledge"
    assert client.post(url, json={"note": "x"}, headers=viewer).status_code == 403
    r = client.post(url, json={"note": "   "}, headers=technician)
    assert r.status_code == 422 and r.json()["field"] == "note"
    r = client.post(url, json={}, headers=technician)
    assert r.status_code == 422 and r.json()["field"] == "note"
    before = datetime.now(UTC)
    r = client.post(url, json={"note": "pulled from rig A; recalibrated"}, headers=technician)
    assert r.status_code == 200, r.text
    got = r.json()
    assert got["acknowledged_by"] == "tom"
    assert got["note"] == "pulled from rig A; recalibrated"
    assert datetime.fromisoformat(got["acknowledged_at"]) >= before - timedelta(seconds=1)
    assert got["open"] is True  # acknowledged, but the condition still holds
    [listed] = of(flags(client, viewer, open="true"), "D-1", "drift")
    assert listed["note"] == "pulled from rig A; recalibrated"
    assert of(flags(client, viewer, acknowledged="true"), "D-1", "drift")
    assert not of(flags(client, viewer, acknowledged="false"), "D-1", "drift")
    again = client.post(url, json={"note": "twice"}, headers=technician)
    assert again.status_code == 409
    assert (
        client.post(
            "/api/v1/flags/999999/acknowledge", json={"note": "n"}, headers=technician
        ).status_code
        == 404
    )


def test_recompute_keeps_the_acknowledged_flag_then_closes_it(client, viewer, technician, shop):
    [flag] = of(flags(client, viewer), "D-1", "drift")
    client.post(
        f"/api/v1/flags/{flag['id']}/acknowledge", json={"note": "seen"}, headers=technician
    )
    # an installation event recomputes the type's flags: the same condition keeps its row
    r = client.post(
        "/api/v1/units/D-1/events",
        json={"kind": "removed", "at": NOW.isoformat()},
        headers=technician,
    )
    assert r.status_code == 201, r.text
    assert r.json()["location"] == "rig A / wrist"
    [kept] = of(flags(client, viewer), "D-1", "drift")
    assert (kept["id"], kept["note"], kept["open"]) == (flag["id"], "seen", True)
    assert kept["raised_at"] == flag["raised_at"]
    # a new calibration matching the last one: no drift between the last two, flag closes
    calibrate(client, technician, "D-1", NOW - timedelta(hours=1), points(SHIFT, seed=6))
    closed = of(flags(client, viewer, open="false"), "D-1", "drift")
    assert [(f["id"], f["note"], f["open"]) for f in closed] == [(flag["id"], "seen", False)]
    assert not of(flags(client, viewer, open="true"), "D-1", "drift")
    assert not of(flags(client, viewer, open="true"), "D-1", "out_of_tolerance_in_service")


def test_installation_events_keep_the_unit_in_step(client, viewer, technician, shop):
    r = client.post(
        "/api/v1/units/O-1/events",
        json={"kind": "removed", "at": NOW.isoformat()},
        headers=technician,
    )
    assert r.status_code == 422 and r.json()["field"] == "kind"
    assert "not installed" in r.json()["detail"]
    r = client.post(
        "/api/v1/units/O-1/events",
        json={"kind": "installed", "at": NOW.isoformat()},
        headers=technician,
    )
    assert r.status_code == 422 and r.json()["field"] == "location"
    r = client.post(
        "/api/v1/units/O-1/events",
        json={"kind": "installed", "location": "rig B", "at": "2026-01-01T10:00:00"},
        headers=technician,
    )
    assert r.status_code == 422 and r.json()["field"] == "at"  # no time zone
    r = client.post(
        "/api/v1/units/O-1/events",
        json={"kind": "installed", "location": "rig B", "at": NOW.isoformat()},
        headers=viewer,
    )
    assert r.status_code == 403
    r = client.post(
        "/api/v1/units/O-1/events",
        json={"kind": "installed", "location": "rig B", "at": NOW.isoformat(), "note": "loan"},
        headers=technician,
    )
    assert r.status_code == 201, r.text
    assert r.json()["recorded_by"] == "tom"
    unit = client.get("/api/v1/units/O-1", headers=viewer).json()
    assert (unit["status"], unit["installed_in"]) == ("installed", "rig B")
    r = client.post(
        "/api/v1/units/O-1/events",
        json={"kind": "installed", "location": "rig C", "at": NOW.isoformat()},
        headers=technician,
    )
    assert r.status_code == 422 and "already installed in rig B" in r.json()["detail"]
    r = client.post(
        "/api/v1/units/O-1/events",
        json={"kind": "removed", "at": (NOW - timedelta(days=1)).isoformat()},
        headers=technician,
    )
    assert r.status_code == 422 and r.json()["field"] == "at"  # before the last event
    r = client.post(
        "/api/v1/units/O-1/events",
        json={"kind": "removed", "at": (NOW + timedelta(minutes=1)).isoformat()},
        headers=technician,
    )
    assert r.status_code == 201
    unit = client.get("/api/v1/units/O-1", headers=viewer).json()
    assert (unit["status"], unit["installed_in"]) == ("in_stock", None)
    listed = client.get("/api/v1/units/O-1/events", headers=viewer).json()
    assert [e["kind"] for e in listed["items"]] == ["installed", "removed"]
    assert listed["total"] == 2


def test_openapi_documents_flags(client):
    spec = client.get("/openapi.json").json()
    assert "/api/v1/flags" in spec["paths"]
    assert "/api/v1/flags/{flag_id}/acknowledge" in spec["paths"]
    assert "/api/v1/units/{serial}/events" in spec["paths"]
    assert "FlagRead" in spec["components"]["schemas"]


def test_steady_drift_brings_the_due_date_forward(client, viewer, technician, shop):
    """S-1 drifts 0.2 deg per 100 days against its first calibration (same noise each time, so
    each fit is the first shifted exactly: deviations 0, 0.2, 0.4). By hand from the rule in
    shared.fleet.due_date: rate 0.2 deg / 100 days; threshold min(tolerance 1.0, drift limit
    0.5) = 0.5 deg, reached 0.5 / 0.2 * 100 = 250 days after the last calibration, before the
    365-day interval. The last calibration was 260 days ago: due 10 days ago, overdue."""
    r = client.post(
        "/api/v1/units", json={"serial": "S-1", "sensor_type": TYPE}, headers=technician
    )
    assert r.status_code == 201, r.text
    last = NOW - timedelta(days=260)
    for days_before, shift in ((200, 0.0), (100, 0.2), (0, 0.4)):
        calibrate(
            client, technician, "S-1", last - timedelta(days=days_before), points(shift, seed=9)
        )
    r = client.get("/api/v1/units/S-1", headers=viewer)
    assert r.status_code == 200, r.text
    body = r.json()
    due = last.date() + timedelta(days=250)
    assert body["due_on"] == due.isoformat()
    assert "projected crossing of the drift limit 0.5 deg" in body["due_basis"]
    assert "3 calibrations" in body["due_basis"]
    (overdue,) = of(flags(client, viewer, open="true"), "S-1", "overdue")
    assert overdue["evidence"]["due"] == due.isoformat()
    assert overdue["evidence"]["days_overdue"] == 10
    assert overdue["evidence"]["decided_by"] == "crossing"
    assert overdue["evidence"]["basis"] == body["due_basis"]
    assert not of(flags(client, viewer), "S-1", "drift")  # 0.2 deg a step: under the limit
    # a single calibration: the interval alone
    r = client.get("/api/v1/units/O-1", headers=viewer)
    o1 = r.json()
    assert o1["due_on"] == ((NOW - timedelta(days=400)).date() + timedelta(days=365)).isoformat()
    assert o1["due_basis"].startswith("interval only (365 days)")


def test_recomputing_one_unit_leaves_the_flags_a_full_recompute_gives(client, app, viewer, shop):
    """Saves and events recompute the flags of their unit only (and the fleet outliers of the
    type); a full recomputation of every type must find exactly the same open flags."""
    from server.flags.service import recompute_all

    def snapshot() -> list[tuple[Any, ...]]:
        return sorted(
            (f["unit"], f["kind"], f["severity"], f["message"], repr(f["evidence"]))
            for f in flags(client, viewer, open=True)
        )

    incremental = snapshot()
    assert {k for _, k, *_ in incremental} >= {"drift", "failed_acceptance", "overdue"}
    with app.state.sessionmaker() as session:
        recompute_all(session)
        session.commit()
    assert snapshot() == incremental


def test_the_overdue_sweep_raises_what_time_alone_brought(client, app, technician, viewer, shop):
    from datetime import date as Date

    from server.flags.service import sweep_overdue

    client.post("/api/v1/units", json={"serial": "T-1", "sensor_type": TYPE}, headers=technician)
    calibrate(client, technician, "T-1", NOW - timedelta(days=300), points(seed=7))
    assert of(flags(client, viewer, open=True), "T-1", "overdue") == []
    due = Date.fromisoformat(client.get("/api/v1/units/T-1", headers=viewer).json()["due_on"])
    assert due == (NOW - timedelta(days=300)).date() + timedelta(days=365)  # no drift history

    def sweep(on: Date) -> int:
        with app.state.sessionmaker() as session:
            n = sweep_overdue(session, today=on)
            session.commit()
        return n

    def overdue_of_t1() -> list[str]:
        return [f["severity"] for f in of(flags(client, viewer, open=True), "T-1", "overdue")]

    sweep(due)
    assert overdue_of_t1() == []  # due today is not overdue
    assert sweep(due) == 0  # nothing else left to do on that day
    assert sweep(due + timedelta(days=10)) >= 1
    assert overdue_of_t1() == ["warning"]
    late = of(flags(client, viewer, open=True), "T-1", "overdue")
    assert late[0]["evidence"]["days_overdue"] == 10
    assert sweep(due + timedelta(days=12)) == 0  # flagged already: nothing to do
    assert sweep(due + timedelta(days=31)) >= 1  # past 30 days: the warning becomes an action
    assert overdue_of_t1() == ["action"]


def test_error_evidence_of_as_found_and_failed_flags(client, viewer, shop):
    """The per-point errors behind the small plots, against numpy's own least-squares lines: as
    found = the first calibration's line at the second session's readings minus its references;
    failed = the residuals of the failing session's own line; allowed = the tolerance, 1.0."""
    import numpy as np

    from server.flags.charts import errors_figure

    def line_of(pts: list[dict[str, float]]) -> np.ndarray:
        return np.polyfit([p["reading"] for p in pts], [p["reference_value"] for p in pts], 1)

    items = flags(client, viewer, open=True)
    first, second = points(seed=1), points(SHIFT, seed=2)
    (oot,) = of(items, "D-1", "out_of_tolerance_in_service")
    got = oot["evidence"]["points"]
    r = np.array([p["reading"] for p in second])
    expected = np.polyval(line_of(first), r) - np.array([p["reference_value"] for p in second])
    assert np.array(got["error"]) == pytest.approx(expected, abs=1e-9)
    assert got["allowed"] == pytest.approx([1.0] * len(second))

    failing = points(seed=3, bump=4.0)
    (failed,) = of(items, "F-1", "failed_acceptance")
    got = failed["evidence"]["points"]
    refs = np.array([p["reference_value"] for p in failing])
    residuals = refs - np.polyval(line_of(failing), [p["reading"] for p in failing])
    assert np.array(got["error"]) == pytest.approx(residuals, abs=1e-9)

    fig = errors_figure(failed["evidence"])
    assert fig is not None
    outside = next(t for t in fig.data if t.name == "outside")
    assert list(outside.y) == pytest.approx([float(residuals[5])])  # the bumped point alone
    assert errors_figure({"value_unit": "deg"}) is None  # older evidence: no plot
