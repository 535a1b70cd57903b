"""The register of reference standards over the API (SQLite and PostgreSQL): standards are
registered and listed; a session naming one takes its U and k, refuses another U, and does not
pass when the standard was overdue; a check that finds a standard out of tolerance flags exactly
the units whose current calibration used it since it was last known good.

Synthetic points (common practice, no source): value = 0.1 r plus a little noise, well inside
the tolerance, so every decision below is decided by the standard alone.
"""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta
from typing import Any

from tests.server.lines import line_points, pot_type

TYPE = "Pot std"
NOW = datetime.now(UTC).replace(microsecond=0)
TODAY = NOW.date()


def ok(r: Any, status: int = 200) -> dict[str, Any]:
    assert r.status_code == status, r.text
    return dict(r.json())


def standard(label: str, **changes: Any) -> dict[str, Any]:
    """A standard body: an angle standard, U = 0.05 deg (k = 2), certificate a year old, due in
    a year; ``changes`` override."""
    body: dict[str, Any] = {
        "name": label,
        "description": "indexing head with a 1 degree plate",
        "quantity": "angle",
        "value_unit": "deg",
        "expanded_u": 0.05,
        "k": 2.0,
        "certificate": f"CERT-{label}",
        "calibrated_on": (TODAY - timedelta(days=400)).isoformat(),
        "due_on": (TODAY + timedelta(days=300)).isoformat(),
    }
    return {**body, **changes}


def session_body(when: datetime, seed: int = 1, **fields: Any) -> dict[str, Any]:
    return {
        "performed_at": when.isoformat(),
        "operator": "tom",
        "kind": "periodic",
        "points": line_points(seed),
        **fields,
    }


def shop(client: Any, admin: dict[str, str], technician: dict[str, str], *serials: str) -> None:
    ok(client.post("/api/v1/sensor-types", json=pot_type(TYPE), headers=admin), 201)
    for serial in serials:
        ok(
            client.post(
                "/api/v1/units", json={"serial": serial, "sensor_type": TYPE}, headers=technician
            ),
            201,
        )


def calibrate(
    client: Any, headers: dict[str, str], serial: str, when: datetime, **fields: Any
) -> dict[str, Any]:
    return ok(
        client.post(
            f"/api/v1/units/{serial}/calibrations",
            json=session_body(when, **fields),
            headers=headers,
        ),
        201,
    )


def check(
    client: Any, headers: dict[str, str], name: str, on: date, in_tolerance: bool, **more: Any
) -> dict[str, Any]:
    return ok(
        client.post(
            f"/api/v1/reference-standards/{name}/checks",
            json={"checked_on": on.isoformat(), "in_tolerance": in_tolerance, **more},
            headers=headers,
        ),
        201,
    )


def suspect_flags(client: Any, headers: dict[str, str], **query: Any) -> list[dict[str, Any]]:
    body = ok(
        client.get(
            "/api/v1/flags",
            params={"kind": "reference_suspect", "per_page": 500, **query},
            headers=headers,
        )
    )
    return list(body["items"])


def test_register_list_and_read_standards(client, technician, viewer):
    created = ok(
        client.post("/api/v1/reference-standards", json=standard("HEAD-1"), headers=technician),
        201,
    )
    assert created["name"] == "HEAD-1"
    assert created["expanded_u"] == 0.05 and created["k"] == 2.0
    assert created["standing"] == "ok"
    assert created["checks"] == [] and created["units"] == []
    ok(
        client.post(
            "/api/v1/reference-standards",
            json=standard("HEAD-2", due_on=(TODAY + timedelta(days=10)).isoformat()),
            headers=technician,
        ),
        201,
    )
    ok(
        client.post(
            "/api/v1/reference-standards",
            json=standard("HEAD-3", due_on=(TODAY - timedelta(days=1)).isoformat()),
            headers=technician,
        ),
        201,
    )
    listed = ok(client.get("/api/v1/reference-standards", headers=viewer))
    assert listed["total"] == 3
    # soonest due first, each with its standing
    assert [(s["name"], s["standing"]) for s in listed["items"]] == [
        ("HEAD-3", "overdue"),
        ("HEAD-2", "due_soon"),
        ("HEAD-1", "ok"),
    ]
    paged = ok(
        client.get("/api/v1/reference-standards", params={"per_page": 2, "page": 2}, headers=viewer)
    )
    assert [s["name"] for s in paged["items"]] == ["HEAD-1"] and paged["total"] == 3
    # found by name ignoring case, as a scanner types it
    assert ok(client.get("/api/v1/reference-standards/head-1", headers=viewer))["name"] == "HEAD-1"
    assert client.get("/api/v1/reference-standards/NOPE", headers=viewer).status_code == 404


def test_bad_registrations_are_refused_by_field(client, technician, viewer):
    ok(client.post("/api/v1/reference-standards", json=standard("RAIL-1"), headers=technician), 201)
    again = client.post("/api/v1/reference-standards", json=standard("rail-1"), headers=technician)
    assert again.status_code == 409 and again.json()["field"] == "name"
    for changes, field in (
        ({"expanded_u": 0}, "expanded_u"),
        ({"expanded_u": -1}, "expanded_u"),
        ({"k": 0}, "k"),
        ({"name": ""}, "name"),
        ({"name": "RAIL/2"}, "name"),
        ({"due_on": "2026-13-01"}, "due_on"),
    ):
        r = client.post(
            "/api/v1/reference-standards", json=standard("X-1", **changes), headers=technician
        )
        assert r.status_code == 422, (changes, r.text)
        assert r.json()["field"] == field, (changes, r.json())
    early = client.post(
        "/api/v1/reference-standards",
        json=standard("X-2", due_on=(TODAY - timedelta(days=500)).isoformat()),
        headers=technician,
    )
    assert early.status_code == 422 and early.json()["field"] == "due_on"
    viewer_try = client.post("/api/v1/reference-standards", json=standard("X-3"), headers=viewer)
    assert viewer_try.status_code == 403
    names = [
        s["name"] for s in ok(client.get("/api/v1/reference-standards", headers=viewer))["items"]
    ]
    assert names == ["RAIL-1"]


def test_a_name_outside_ascii_registered_twice_is_a_conflict(client, technician, viewer):
    """SQLite's lower() folds ASCII only: the second "Jig À" once reached the unique
    constraint and answered 500 (found by the API fuzz run)."""
    ok(client.post("/api/v1/reference-standards", json=standard("Jig À"), headers=technician), 201)
    again = client.post("/api/v1/reference-standards", json=standard("Jig À"), headers=technician)
    assert again.status_code == 409 and again.json()["field"] == "name"
    found = client.get("/api/v1/reference-standards/Jig%20%C3%80", headers=viewer)
    assert found.status_code == 200 and found.json()["name"] == "Jig À"


def test_a_session_naming_a_standard_takes_its_u_and_k(client, admin, technician, viewer):
    shop(client, admin, technician, "S-1")
    ok(
        client.post(
            "/api/v1/reference-standards",
            json=standard("HEAD-9", expanded_u=0.06, k=2.5),
            headers=technician,
        ),
        201,
    )
    saved = calibrate(
        client, technician, "S-1", NOW - timedelta(days=1), reference_standard="head-9"
    )
    assert saved["reference"] == "HEAD-9"
    assert saved["reference_standard"] == "HEAD-9"
    assert saved["reference_expanded_u"] == 0.06 and saved["reference_k"] == 2.5
    assert saved["decision"]["passed"] is True
    assert saved["reference_standard_problem"] is None
    # the budget's reference row is the register's U / k: 0.06 / 2.5 = 0.024 deg
    rows = {r["source"]: r for r in saved["budget"]["rows"]}
    reference_row = next(r for name, r in rows.items() if "reference" in name)
    assert abs(reference_row["u"] - 0.024) < 1e-12
    # the same U given beside it is accepted
    calibrate(
        client,
        technician,
        "S-1",
        NOW - timedelta(hours=5),
        reference_standard="HEAD-9",
        reference_expanded_u=0.06,
    )
    detail = ok(client.get("/api/v1/reference-standards/HEAD-9", headers=viewer))
    assert [u["serial"] for u in detail["units"]] == ["S-1"]


def test_a_different_u_or_an_unknown_standard_is_refused_by_field(
    client, admin, technician, viewer
):
    shop(client, admin, technician, "S-2")
    ok(client.post("/api/v1/reference-standards", json=standard("HEAD-8"), headers=technician), 201)
    when = NOW - timedelta(days=1)
    for fields, field in (
        ({"reference_standard": "HEAD-8", "reference_expanded_u": 0.5}, "reference_expanded_u"),
        ({"reference_standard": "HEAD-8", "reference_k": 3.0}, "reference_k"),
        ({"reference_standard": "HEAD-8", "reference": "some jig"}, "reference"),
        ({"reference_standard": "NOPE"}, "reference_standard"),
        ({}, "reference_standard"),
    ):
        r = client.post(
            "/api/v1/units/S-2/calibrations",
            json=session_body(when, **fields),
            headers=technician,
        )
        assert r.status_code == 422, (fields, r.text)
        assert r.json()["field"] == field, (fields, r.json())
    other_unit = ok(
        client.post(
            "/api/v1/reference-standards",
            json=standard("MASS-1", quantity="force", value_unit="N"),
            headers=technician,
        ),
        201,
    )
    assert other_unit["value_unit"] == "N"
    r = client.post(
        "/api/v1/units/S-2/calibrations",
        json=session_body(when, reference_standard="MASS-1"),
        headers=technician,
    )
    assert r.status_code == 422 and r.json()["field"] == "reference_standard"
    history = ok(client.get("/api/v1/units/S-2/calibrations", headers=viewer))
    assert history["total"] == 0  # nothing was stored
    # the free-text path stays
    free = calibrate(
        client, technician, "S-2", when, reference="angle jig", reference_expanded_u=0.1
    )
    assert free["reference"] == "angle jig" and free["reference_standard"] is None


def test_a_session_with_an_overdue_standard_is_stored_and_does_not_pass(
    client, admin, technician, viewer
):
    shop(client, admin, technician, "S-3")
    due = TODAY - timedelta(days=3)
    ok(
        client.post(
            "/api/v1/reference-standards",
            json=standard("HEAD-7", due_on=due.isoformat()),
            headers=technician,
        ),
        201,
    )
    before = calibrate(
        client,
        technician,
        "S-3",
        datetime.combine(due, datetime.min.time(), UTC) + timedelta(hours=9),
        reference_standard="HEAD-7",
    )
    assert before["decision"]["passed"] is True  # on its due date it still vouches
    late = calibrate(
        client, technician, "S-3", NOW - timedelta(hours=1), reference_standard="HEAD-7"
    )
    assert late["decision"]["passed"] is False
    reasons = " ".join(late["decision"]["reasons"])
    assert "HEAD-7" in reasons and "overdue" in reasons and due.isoformat() in reasons
    assert late["reference_standard_problem"] and "HEAD-7" in late["reference_standard_problem"]
    stored = ok(client.get(f"/api/v1/units/S-3/calibrations/{late['id']}", headers=viewer))
    assert stored["decision"]["passed"] is False
    current = ok(client.get("/api/v1/units/S-3/calibration", headers=viewer))
    assert current["calibration"]["id"] == late["id"]
    kinds = {f["kind"] for f in current["calibration"]["flags"]}
    assert "failed_acceptance" in kinds
    # a refit of the type keeps the standard's verdict
    ok(client.post(f"/api/v1/sensor-types/{TYPE}/refit", headers=admin), 202)
    client.app.state.jobs.wait(120)
    refitted = ok(client.get(f"/api/v1/units/S-3/calibrations/{late['id']}", headers=viewer))
    assert len(refitted["fit_history"]) == 2
    assert refitted["decision"]["passed"] is False
    assert any("HEAD-7" in r for r in refitted["decision"]["reasons"])


def test_a_failed_check_flags_exactly_the_units_at_risk(client, admin, technician, viewer):
    serials = ("A", "B", "C", "D", "E", "F")
    shop(client, admin, technician, *serials)
    for name in ("RAIL-S", "RAIL-T"):
        ok(client.post("/api/v1/reference-standards", json=standard(name), headers=technician), 201)
    good_on = TODAY - timedelta(days=100)
    check(client, technician, "RAIL-S", good_on, True, note="annual check")
    ago = lambda days: NOW - timedelta(days=days)  # noqa: E731
    calibrate(client, technician, "A", ago(50), reference_standard="RAIL-S")  # at risk
    calibrate(client, technician, "B", ago(200), reference_standard="RAIL-S")  # before good check
    calibrate(client, technician, "C", ago(60), reference_standard="RAIL-S")  # then recalibrated
    calibrate(client, technician, "C", ago(10), reference_standard="RAIL-T")
    calibrate(client, technician, "D", ago(40), reference="angle jig")  # free text
    calibrate(client, technician, "E", ago(30), reference_standard="RAIL-S")  # at risk, installed
    calibrate(client, technician, "F", ago(20), reference_standard="RAIL-T")  # other standard
    ok(
        client.post(
            "/api/v1/units/E/events",
            json={"kind": "installed", "location": "arm 4", "at": ago(29).isoformat()},
            headers=technician,
        ),
        201,
    )
    failed_on = TODAY - timedelta(days=5)
    result = check(client, technician, "RAIL-S", failed_on, False, note="stop 3 worn 0.2 mm")
    assert result["flagged"] == ["A", "E"]
    assert result["standard"]["standing"] == "suspect"

    flags = {f["unit"]: f for f in suspect_flags(client, viewer, open="true")}
    assert set(flags) == {"A", "E"}
    e = flags["E"]
    assert e["severity"] == "action"
    assert e["evidence"]["standard"] == "RAIL-S"
    assert e["evidence"]["certificate"] == "CERT-RAIL-S"
    assert e["evidence"]["failed_on"] == failed_on.isoformat()
    assert e["evidence"]["last_good_on"] == good_on.isoformat()
    assert e["evidence"]["installed_in"] == "arm 4"
    assert "RAIL-S" in e["message"] and "arm 4" in e["message"]
    assert flags["A"]["evidence"]["installed_in"] is None

    # the standard's page lists its units, marking those since its last good check
    detail = ok(client.get("/api/v1/reference-standards/RAIL-S", headers=viewer))
    risk = {u["serial"]: u["since_last_good_check"] for u in detail["units"]}
    assert risk == {"A": True, "B": False, "E": True}
    assert [c["in_tolerance"] for c in detail["checks"]] == [True, False]

    # a second failed check raises nothing new; a later good check clears nothing
    assert check(client, technician, "RAIL-S", TODAY - timedelta(days=2), False)["flagged"] == []
    renewed = check(
        client,
        technician,
        "RAIL-S",
        TODAY,
        True,
        note="stop replaced",
        due_on=(TODAY + timedelta(days=365)).isoformat(),
    )
    assert renewed["flagged"] == [] and renewed["standard"]["standing"] == "ok"
    assert renewed["standard"]["due_on"] == (TODAY + timedelta(days=365)).isoformat()
    assert {f["unit"] for f in suspect_flags(client, viewer, open="true")} == {"A", "E"}

    # recalibrated against another standard: A's flag closes, E's stays
    calibrate(client, technician, "A", ago(0.5), reference_standard="RAIL-T")
    assert {f["unit"] for f in suspect_flags(client, viewer, open="true")} == {"E"}
    closed = suspect_flags(client, viewer, open="false")
    assert [f["unit"] for f in closed] == ["A"] and closed[0]["closed_at"] is not None
    # voiding that recalibration makes the suspect one current again: the flag opens again
    last_a = ok(client.get("/api/v1/units/A/calibration", headers=viewer))["calibration"]["id"]
    ok(
        client.post(
            f"/api/v1/units/A/calibrations/{last_a}/void",
            json={"reason": "wrong unit on the jig"},
            headers=technician,
        )
    )
    assert {f["unit"] for f in suspect_flags(client, viewer, open="true")} == {"A", "E"}


def test_check_rules_and_the_audit_log(client, technician, viewer):
    ok(client.post("/api/v1/reference-standards", json=standard("TH-1"), headers=technician), 201)
    for body, field in (
        (
            {"checked_on": (TODAY + timedelta(days=1)).isoformat(), "in_tolerance": True},
            "checked_on",
        ),
        (
            {"checked_on": (TODAY - timedelta(days=900)).isoformat(), "in_tolerance": True},
            "checked_on",
        ),
        (
            {
                "checked_on": TODAY.isoformat(),
                "in_tolerance": False,
                "due_on": (TODAY + timedelta(days=9)).isoformat(),
            },
            "due_on",
        ),
        ({"checked_on": TODAY.isoformat()}, "in_tolerance"),
    ):
        r = client.post("/api/v1/reference-standards/TH-1/checks", json=body, headers=technician)
        assert r.status_code == 422, (body, r.text)
        assert r.json()["field"] == field, (body, r.json())
    r = client.post(
        "/api/v1/reference-standards/TH-1/checks",
        json={"checked_on": TODAY.isoformat(), "in_tolerance": True},
        headers=viewer,
    )
    assert r.status_code == 403
    check(client, technician, "TH-1", TODAY, False, note="reads 0.3 high")
    log = ok(
        client.get("/api/v1/audit", params={"subject_kind": "reference_standard"}, headers=viewer)
    )["items"]
    assert [(e["action"], e["actor"], e["subject"]) for e in reversed(log)] == [
        ("standard.registered", "tom", "TH-1"),
        ("standard.checked", "tom", "TH-1"),
    ]
    assert log[0]["detail"]["in_tolerance"] is False
    assert log[0]["detail"]["note"] == "reads 0.3 high"


def test_sessions_after_a_failed_check_do_not_pass(client, admin, technician):
    shop(client, admin, technician, "G")
    ok(client.post("/api/v1/reference-standards", json=standard("RAIL-U"), headers=technician), 201)
    check(client, technician, "RAIL-U", TODAY - timedelta(days=3), False)
    after = calibrate(
        client, technician, "G", NOW - timedelta(hours=2), reference_standard="RAIL-U"
    )
    assert after["decision"]["passed"] is False
    assert any("out of tolerance" in r and "RAIL-U" in r for r in after["decision"]["reasons"])


def test_upgrade_keeps_free_text_references(db_url):
    """A database at revision 0007 holding a session with a free-text reference, U and k
    upgrades to the register's schema with the session as it was, naming no standard."""
    import sqlalchemy as sa
    from alembic import command

    from server.db import make_engine
    from server.migrate import alembic_config, upgrade

    engine = make_engine(db_url)
    cfg = alembic_config()
    when = datetime(2026, 1, 2, 3, 4, tzinfo=UTC)
    stamp = when.replace(tzinfo=None) if engine.dialect.name == "sqlite" else when
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, "0007")
        conn.execute(
            sa.text(
                "INSERT INTO sensor_type (id, name, quantity, value_unit, reading_unit, "
                "reading_min, reading_max, families, family_options, interval_days, tur, "
                "created_at, tolerance_abs, noise_in) VALUES (1, 'pot', 'angle', 'deg', "
                "'counts', 0, 4095, '[\"line\"]', '{}', 365, 4, :now, 1, 'value')"
            ),
            {"now": stamp},
        )
        conn.execute(
            sa.text(
                "INSERT INTO unit (id, serial, sensor_type_id, status, created_at) "
                "VALUES (1, 'P-1', 1, 'in_stock', :now)"
            ),
            {"now": stamp},
        )
        conn.execute(
            sa.text(
                "INSERT INTO calibration_session (id, unit_id, performed_at, operator, reference, "
                "reference_expanded_u, reference_k, kind, created_at) VALUES (1, 1, :now, 'kim', "
                "'jig DJ-2 (bench 3)', 0.25, 2.5, 'incoming', :now)"
            ),
            {"now": stamp},
        )
    upgrade(engine)
    with engine.connect() as conn:
        row = conn.execute(
            sa.text(
                "SELECT reference, reference_expanded_u, reference_k, reference_standard_id, "
                "reference_standard_problem FROM calibration_session WHERE id = 1"
            )
        ).one()
        assert tuple(row) == ("jig DJ-2 (bench 3)", 0.25, 2.5, None, None)
        assert conn.execute(sa.text("SELECT count(*) FROM reference_standard")).scalar() == 0
    engine.dispose()
