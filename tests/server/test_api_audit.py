"""The audit log over the API (SQLite and PostgreSQL): every change leaves one entry with who,
what and the numbers; a refused change leaves none; nothing can edit or delete an entry.

Synthetic points (common practice, no source): value = 0.1 r plus a little noise.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

from tests.server.lines import READINGS, calibrate, line_points, pot_type

TYPE = "Pot audit"
NOW = datetime.now(UTC).replace(microsecond=0)


def entries(client: Any, headers: dict[str, str], **query: Any) -> list[dict[str, Any]]:
    r = client.get("/api/v1/audit", params={"per_page": 500, **query}, headers=headers)
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["total"] == len(body["items"])
    return list(body["items"])


def ok(r: Any, status: int = 200) -> dict[str, Any]:
    assert r.status_code == status, r.text
    return dict(r.json())


def drifted_unit(
    client: Any, admin: dict[str, str], technician: dict[str, str], serial: str
) -> tuple[list[int], dict[str, Any]]:
    """The type, one unit and two calibrations of it 2.0 deg apart (drift limit 0.5): the
    session ids and the second one's answer."""
    ok(
        client.post(
            "/api/v1/sensor-types", json=pot_type(TYPE, drift_limit_abs=0.5), headers=admin
        ),
        201,
    )
    ok(
        client.post(
            "/api/v1/units", json={"serial": serial, "sensor_type": TYPE}, headers=technician
        ),
        201,
    )
    answers = [
        calibrate(client, technician, serial, when, line_points(seed, shift=shift))
        for when, shift, seed in (
            (NOW - timedelta(days=90), 0.0, 1),
            (NOW - timedelta(days=1), 2.0, 2),
        )
    ]
    return [a["id"] for a in answers], answers[-1]


def test_each_change_leaves_one_entry(client, app, admin, technician, viewer):
    drifted_unit(client, admin, technician, "A-1")
    ok(
        client.post(
            "/api/v1/units/A-1/events",
            json={"kind": "installed", "location": "arm 2", "at": NOW.isoformat()},
            headers=technician,
        ),
        201,
    )
    drift = [
        f
        for f in ok(client.get("/api/v1/flags", params={"kind": "drift"}, headers=viewer))["items"]
        if f["unit"] == "A-1"
    ]
    assert len(drift) == 1
    ok(
        client.post(
            f"/api/v1/flags/{drift[0]['id']}/acknowledge",
            json={"note": "bracket re-seated"},
            headers=technician,
        )
    )
    changed = ok(client.patch(f"/api/v1/sensor-types/{TYPE}", json={"tur": 3.0}, headers=admin))
    app.state.jobs.wait(120)

    log = entries(client, viewer)
    actions = [(e["action"], e["actor"], e["subject"]) for e in reversed(log)]  # oldest first
    assert actions == [
        ("sensor_type.created", "ada", TYPE),
        ("unit.registered", "tom", "A-1"),
        ("calibration.saved", "tom", "A-1"),
        ("calibration.saved", "tom", "A-1"),
        ("unit.installed", "tom", "A-1"),
        ("flag.acknowledged", "tom", "A-1"),
        ("sensor_type.updated", "ada", TYPE),
        ("refit.started", "ada", TYPE),
        ("refit.finished", "ada", TYPE),
    ]
    by_action = {e["action"]: e for e in log}
    assert by_action["sensor_type.updated"]["detail"]["changed"] == {
        "tur": {"before": 4.0, "after": 3.0}
    }
    assert by_action["flag.acknowledged"]["detail"]["note"] == "bracket re-seated"
    assert by_action["refit.finished"]["detail"]["job_id"] == changed["job"]["id"]
    assert by_action["refit.finished"]["detail"]["refitted"] == 2
    assert "arm 2" in by_action["unit.installed"]["summary"]
    saved = [e for e in log if e["action"] == "calibration.saved"]
    assert {e["detail"]["points"] for e in saved} == {READINGS.size}
    assert all(e["detail"]["engine_version"] for e in saved)

    of_unit = entries(client, viewer, subject_kind="unit", subject="A-1")
    assert {e["action"] for e in of_unit} == {
        "unit.registered",
        "calibration.saved",
        "unit.installed",
        "flag.acknowledged",
    }
    assert entries(client, viewer, actor="ada", action="refit.started")[0]["subject"] == TYPE


def test_a_refused_change_leaves_no_entry(client, admin, technician, viewer):
    before = entries(client, viewer)
    r = client.post(
        "/api/v1/units", json={"serial": "B-1", "sensor_type": "none"}, headers=technician
    )
    assert r.status_code == 404
    r = client.patch("/api/v1/sensor-types/none", json={"tur": 2.0}, headers=admin)
    assert r.status_code == 404
    assert entries(client, viewer) == before


def test_the_log_cannot_be_changed_through_the_api(client, admin):
    for method in ("post", "put", "patch", "delete"):
        r = getattr(client, method)("/api/v1/audit", headers=admin)
        assert r.status_code == 405, method
    paths = client.get("/openapi.json").json()["paths"]
    audit_paths = {p: set(ops) for p, ops in paths.items() if "audit" in p}
    assert audit_paths == {"/api/v1/audit": {"get"}}


def test_voiding_a_calibration_keeps_it_and_moves_everything_back(
    client, admin, technician, viewer
):
    """Void the newer of two calibrations: the older one is current again, the drift flag closes,
    the voided one keeps its points, reason and who; a second void is refused."""
    ids, saved = drifted_unit(client, admin, technician, "V-1")
    assert "drift" in {f["kind"] for f in saved["flags"]}
    url = f"/api/v1/units/V-1/calibrations/{ids[1]}/void"

    refused = client.post(url, json={"reason": "   "}, headers=technician)
    assert refused.status_code == 422 and refused.json()["field"] == "reason"
    assert client.post(url, json={"reason": "x"}, headers=viewer).status_code == 403
    assert (
        client.post(
            f"/api/v1/units/V-1/calibrations/{ids[1] + 99}/void",
            json={"reason": "x"},
            headers=technician,
        ).status_code
        == 404
    )

    voided = ok(client.post(url, json={"reason": "wrong jig plate fitted"}, headers=technician))
    assert voided["voided"] is True and voided["voided_by"] == "tom"
    assert voided["void_reason"] == "wrong jig plate fitted" and voided["voided_at"]
    assert len(voided["points"]) == READINGS.size  # kept whole
    again = client.post(url, json={"reason": "twice"}, headers=technician)
    assert again.status_code == 409 and "voided already by tom" in again.json()["detail"]

    current = ok(client.get("/api/v1/units/V-1/calibration", headers=viewer))
    assert current["calibration"]["id"] == ids[0]
    unit = ok(client.get("/api/v1/units/V-1", headers=viewer))
    assert unit["calibration_count"] == 1
    drift = ok(client.get("/api/v1/flags", params={"kind": "drift"}, headers=viewer))["items"]
    assert [f["open"] for f in drift if f["unit"] == "V-1"] == [False]  # closed, kept
    log = entries(client, viewer, action="calibration.voided")
    assert [(e["actor"], e["subject"], e["detail"]["session_id"]) for e in log] == [
        ("tom", "V-1", ids[1])
    ]
