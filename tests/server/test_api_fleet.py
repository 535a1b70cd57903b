"""API: sensor types and units (runs on a SQLite file and on PostgreSQL)."""

from __future__ import annotations

import pytest

RANGEFINDER = {
    "name": "IR ranger",
    "quantity": "distance",
    "value_unit": "mm",
    "reading_unit": "counts",
    "reading_min": 0,
    "reading_max": 4095,
    "families": ["inverse_offset"],
    "tolerance_abs": 3.0,
    "tolerance_rel": 2.0,
    "drift_limit_abs": 5.0,
    "interval_days": 180,
}
LOADCELL = {
    "name": "load cell 50 N",
    "quantity": "force",
    "value_unit": "N",
    "reading_unit": "mV/V",
    "reading_min": 0,
    "reading_max": 2.2,
    "families": ["polynomial", "line"],
    "family_options": {"polynomial": {"degree": 2}},
    "tolerance_rel": 0.5,
}


def test_sensor_type_round_trip(client, admin):
    created = client.post("/api/v1/sensor-types", json=LOADCELL, headers=admin)
    assert created.status_code == 201, created.text
    body = created.json()
    assert body["family_options"]["polynomial"] == {"degree": 2, "through_zero": False}
    assert body["family_options"]["line"] == {"through_zero": False}
    assert body["noise_in"] == "value" and body["reading_resolution"] is None  # the defaults
    listed = client.get("/api/v1/sensor-types", headers=admin).json()
    assert listed["total"] == 1 and listed["items"][0]["name"] == "load cell 50 N"


@pytest.mark.parametrize(
    ("change", "field", "words"),
    [
        ({"reading_max": -1}, "", "reading_max must be greater"),
        ({"tolerance_abs": None, "tolerance_rel": None}, "", "tolerance"),
        ({"families": ["nonesuch"]}, "families.0", "inverse_offset"),
        ({"families": []}, "families", "at least 1"),
        (
            {"family_options": {"inverse_offset": {"degree": 3}}},
            "family_options.inverse_offset",
            "unknown option",
        ),
        ({"tolerance_abs": -1}, "tolerance_abs", "greater than or equal"),
        ({"colour": "red"}, "colour", "Extra inputs"),
        ({"noise_in": "reference"}, "noise_in", "'value' or 'reading'"),
        ({"reading_resolution": 0}, "reading_resolution", "greater than 0"),
    ],
)
def test_bad_sensor_type_names_the_field_and_writes_nothing(client, admin, change, field, words):
    response = client.post("/api/v1/sensor-types", json={**RANGEFINDER, **change}, headers=admin)
    assert response.status_code == 422, response.text
    error = response.json()
    assert error["field"] == field
    assert words in error["detail"]
    assert client.get("/api/v1/sensor-types", headers=admin).json()["total"] == 0


def test_duplicate_sensor_type_is_a_conflict(client, admin):
    assert client.post("/api/v1/sensor-types", json=RANGEFINDER, headers=admin).status_code == 201
    again = client.post("/api/v1/sensor-types", json=RANGEFINDER, headers=admin)
    assert again.status_code == 409
    assert again.json()["field"] == "name"


def test_roles_and_tokens(client, admin, technician, viewer):
    assert client.get("/api/v1/units").status_code == 401
    bogus = {"Authorization": "Bearer not-a-token"}
    assert client.get("/api/v1/units", headers=bogus).status_code == 401
    assert (
        client.post("/api/v1/sensor-types", json=RANGEFINDER, headers=technician).status_code == 403
    )
    assert client.post("/api/v1/sensor-types", json=RANGEFINDER, headers=admin).status_code == 201
    unit = {"serial": "R-1", "sensor_type": "IR ranger"}
    assert client.post("/api/v1/units", json=unit, headers=viewer).status_code == 403
    assert client.post("/api/v1/units", json=unit, headers=technician).status_code == 201
    assert client.get("/api/v1/units/R-1", headers=viewer).status_code == 200


def test_units_create_get_list_filter_paginate(client, admin):
    client.post("/api/v1/sensor-types", json=RANGEFINDER, headers=admin)
    client.post("/api/v1/sensor-types", json=LOADCELL, headers=admin)
    for i in range(7):
        r = client.post(
            "/api/v1/units",
            headers=admin,
            json={
                "serial": f"IR-{i:03d}",
                "sensor_type": "IR ranger",
                "received_on": f"2026-03-0{i + 1}",
            },
        )
        assert r.status_code == 201, r.text
    client.post(
        "/api/v1/units", headers=admin, json={"serial": "LC-9", "sensor_type": "load cell 50 N"}
    )

    one = client.get("/api/v1/units/IR-003", headers=admin).json()
    assert one == {
        "serial": "IR-003",
        "sensor_type": "IR ranger",
        "status": "in_stock",
        "installed_in": None,
        "received_on": "2026-03-04",
        "notes": None,
        "calibration_count": 0,
        "last_calibrated_at": None,
        "last_passed": None,
        "due_on": None,
        "due_basis": None,
    }

    page = client.get("/api/v1/units?per_page=3&page=2", headers=admin).json()
    assert page["total"] == 8 and page["page"] == 2 and page["per_page"] == 3
    assert [u["serial"] for u in page["items"]] == ["IR-003", "IR-004", "IR-005"]
    by_type = client.get("/api/v1/units?sensor_type=load cell 50 N", headers=admin).json()
    assert [u["serial"] for u in by_type["items"]] == ["LC-9"]
    search = client.get("/api/v1/units?q=ir-00", headers=admin).json()
    assert search["total"] == 7
    assert client.get("/api/v1/units?q=%25", headers=admin).json()["total"] == 0
    assert client.get("/api/v1/units?status=installed", headers=admin).json()["total"] == 0
    assert client.get("/api/v1/units?status=lost", headers=admin).status_code == 422
    assert client.get("/api/v1/units?per_page=0", headers=admin).json()["field"] == "per_page"


def test_unit_errors(client, admin):
    client.post("/api/v1/sensor-types", json=RANGEFINDER, headers=admin)
    missing_type = client.post(
        "/api/v1/units", headers=admin, json={"serial": "X", "sensor_type": "nope"}
    )
    assert missing_type.status_code == 404 and missing_type.json()["field"] == "sensor_type"
    client.post("/api/v1/units", headers=admin, json={"serial": "X", "sensor_type": "IR ranger"})
    dup = client.post(
        "/api/v1/units", headers=admin, json={"serial": "X", "sensor_type": "IR ranger"}
    )
    assert dup.status_code == 409 and dup.json()["field"] == "serial"
    # a scanner finds serials ignoring case, so "x" would make "X" ambiguous
    other_case = client.post(
        "/api/v1/units", headers=admin, json={"serial": "x", "sensor_type": "IR ranger"}
    )
    assert other_case.status_code == 409
    assert other_case.json()["detail"] == "unit 'x' exists already as 'X'"
    blank = client.post(
        "/api/v1/units", headers=admin, json={"serial": "  ", "sensor_type": "IR ranger"}
    )
    assert blank.status_code == 422 and blank.json()["field"] == "serial"
    gone = client.get("/api/v1/units/NOPE", headers=admin)
    assert gone.status_code == 404 and "NOPE" in gone.json()["detail"]


def test_noise_model_and_resolution_are_kept(client, admin):
    body = {**RANGEFINDER, "noise_in": "reading", "reading_resolution": 1}
    created = client.post("/api/v1/sensor-types", json=body, headers=admin)
    assert created.status_code == 201, created.text
    assert created.json()["noise_in"] == "reading"
    assert created.json()["reading_resolution"] == 1.0
    listed = client.get("/api/v1/sensor-types", headers=admin).json()["items"][0]
    assert (listed["noise_in"], listed["reading_resolution"]) == ("reading", 1.0)
