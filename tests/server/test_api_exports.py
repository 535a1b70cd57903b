"""API: exports of a unit's current calibration (SQLite and PostgreSQL)."""

from __future__ import annotations

import csv
import io

import pytest

from tests.server.test_api_calibrations import POT, pot_points, session_body

LOAD_CELL = {
    "name": "load cell",
    "quantity": "force",
    "value_unit": "N",
    "reading_unit": "mV/V",
    "reading_min": 0,
    "reading_max": 2.2,
    "families": ["line"],
    "tolerance_abs": 0.5,
    "interval_days": 365,
}


def _unit(client, admin, sensor_type, serial):
    assert client.post("/api/v1/sensor-types", json=sensor_type, headers=admin).status_code == 201
    answer = client.post(
        "/api/v1/units", json={"serial": serial, "sensor_type": sensor_type["name"]}, headers=admin
    )
    assert answer.status_code == 201, answer.text
    return serial


@pytest.fixture
def pot(client, admin, technician):
    serial = _unit(client, admin, POT, "IR-2506-03")
    answer = client.post(
        f"/api/v1/units/{serial}/calibrations", json=session_body(pot_points()), headers=technician
    )
    assert answer.status_code == 201, answer.text
    return serial


def test_table_csv_is_an_attachment_with_every_code(client, viewer, pot):
    answer = client.get(f"/api/v1/units/{pot}/table.csv", headers=viewer)
    assert answer.status_code == 200, answer.text
    assert answer.headers["content-type"].startswith("text/csv")
    assert answer.headers["content-disposition"] == 'attachment; filename="IR-2506-03-table.csv"'
    rows = list(csv.reader(io.StringIO(answer.text)))
    assert rows[0][:2] == ["reading [counts]", "value [deg]"]
    assert len(rows) == 1 + 4096  # the type's span 0..4095, step 1
    # valid range 100..4000 (the calibrated readings): outside it marked, not converted
    assert rows[1] == ["0", "", "", "out of range"] and rows[1 + 100][3] == "in range"


def test_table_json_with_step_and_range(client, viewer, pot):
    answer = client.get(
        f"/api/v1/units/{pot}/table.json",
        params={"step": 100, "reading_min": 100, "reading_max": 1000, "level": 0.95},
        headers=viewer,
    )
    assert answer.status_code == 200, answer.text
    assert answer.headers["content-disposition"].endswith('filename="IR-2506-03-table.json"')
    doc = answer.json()
    assert [r["reading"] for r in doc["rows"]] == [float(r) for r in range(100, 1001, 100)]
    assert doc["coverage"]["level"] == 0.95 and all(r["in_range"] for r in doc["rows"])
    # the value is the fitted line itself: -7 + 0.0733 r within the points' deviations
    assert doc["rows"][0]["value"] == pytest.approx(-7 + 7.33, abs=0.03)


@pytest.mark.parametrize(
    ("params", "field"),
    [({"step": 0}, "step"), ({"step": "-1.5"}, "step"), ({"step": "nan"}, "step"),
     ({"reading_min": 10, "reading_max": 5}, "reading_max")],
)  # fmt: skip
def test_table_bad_inputs_are_422_naming_the_field(client, viewer, pot, params, field):
    answer = client.get(f"/api/v1/units/{pot}/table.csv", params=params, headers=viewer)
    assert answer.status_code == 422
    assert answer.json()["field"] == field


def test_firmware_header_names_functions_after_the_serial(client, viewer, pot):
    answer = client.get(f"/api/v1/units/{pot}/firmware.h", headers=viewer)
    assert answer.status_code == 200, answer.text
    assert answer.headers["content-type"].startswith("text/x-c")
    assert answer.headers["content-disposition"] == 'attachment; filename="IR-2506-03.h"'
    assert "ir_2506_03_to_value_f(int32_t reading)" in answer.text
    assert '#define IR_2506_03_UNIT_SERIAL "IR-2506-03"' in answer.text
    coarse = client.get(
        f"/api/v1/units/{pot}/firmware.h", params={"lut_max_error": 0.5}, headers=viewer
    )
    assert coarse.status_code == 200 and "IR_2506_03_LUT_MAX_ERROR" in coarse.text
    refused = client.get(
        f"/api/v1/units/{pot}/firmware.h", params={"lut_max_error": -1}, headers=viewer
    )
    assert refused.status_code == 422 and refused.json()["field"] == "lut_max_error"


def test_no_current_calibration_is_404_with_a_reason(client, admin, viewer):
    serial = _unit(client, admin, POT, "P-NEW")
    for path in ("table.csv", "table.json", "firmware.h"):
        answer = client.get(f"/api/v1/units/{serial}/{path}", headers=viewer)
        assert answer.status_code == 404
        assert answer.json()["detail"] == (
            "unit 'P-NEW' has no current calibration, so there is nothing to export"
        )
    assert client.get("/api/v1/units/NOPE/table.csv", headers=viewer).status_code == 404


def test_header_needs_an_integer_reading_span(client, admin, technician, viewer):
    serial = _unit(client, admin, LOAD_CELL, "LC-1")
    points = [{"reference_value": 90.0 * x, "reading": x} for x in (0.0, 0.5, 1.0, 1.5, 2.0)]
    points[2]["reference_value"] += 0.01
    answer = client.post(
        f"/api/v1/units/{serial}/calibrations", json=session_body(points), headers=technician
    )
    assert answer.status_code == 201, answer.text
    refused = client.get(f"/api/v1/units/{serial}/firmware.h", headers=viewer)
    assert refused.status_code == 422
    assert "integer reading codes" in refused.json()["detail"]
    assert "0 to 2.2 mV/V" in refused.json()["detail"]
    table = client.get(f"/api/v1/units/{serial}/table.json", headers=viewer)
    assert table.status_code == 200
    readings = [r["reading"] for r in table.json()["rows"]]
    # not whole codes: by default the smallest 1-2-5 step giving at most 200 rows: 2.2 / 200 =
    # 0.011 mV/V, so 0.02 mV/V and 111 rows
    assert readings[:3] == pytest.approx([0.0, 0.02, 0.04])
    assert len(readings) == 111 and readings[-1] == pytest.approx(2.2)
    fine = client.get(
        f"/api/v1/units/{serial}/table.json", params={"step": 0.25}, headers=viewer
    ).json()
    assert [r["reading"] for r in fine["rows"]] == pytest.approx([0.25 * i for i in range(9)])


def test_exports_need_a_token_and_are_in_the_openapi_schema(client, pot):
    assert client.get(f"/api/v1/units/{pot}/table.csv").status_code == 401
    schema = client.get("/openapi.json").json()
    paths = schema["paths"]
    csv_op = paths["/api/v1/units/{serial}/table.csv"]["get"]
    assert "text/csv" in csv_op["responses"]["200"]["content"]
    assert {p["name"] for p in csv_op["parameters"]} >= {"step", "reading_min", "reading_max"}
    step = next(p for p in csv_op["parameters"] if p["name"] == "step")
    number = next(s for s in step["schema"]["anyOf"] if s.get("type") == "number")
    assert number["exclusiveMinimum"] == 0
    json_op = paths["/api/v1/units/{serial}/table.json"]["get"]
    ref = json_op["responses"]["200"]["content"]["application/json"]["schema"]["$ref"]
    assert ref.endswith("/ConversionTableRead")
    assert "404" in json_op["responses"] and "422" in json_op["responses"]
    assert (
        "text/x-c"
        in paths["/api/v1/units/{serial}/firmware.h"]["get"]["responses"]["200"]["content"]
    )
