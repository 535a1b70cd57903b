"""API: calibration sessions are stored, fitted server-side and judged (SQLite and PostgreSQL)."""

from __future__ import annotations

import numpy as np
import pytest

POT = {
    "name": "pot 300",
    "quantity": "angle",
    "value_unit": "deg",
    "reading_unit": "counts",
    "reading_min": 0,
    "reading_max": 4095,
    "families": ["line"],
    "tolerance_abs": 1.0,
    "interval_days": 365,
}
RANGER = {
    "name": "ranger",
    "quantity": "distance",
    "value_unit": "mm",
    "reading_unit": "counts",
    "reading_min": 0,
    "reading_max": 4095,
    "families": ["inverse_offset"],
    "tolerance_abs": 3.0,
    "tolerance_rel": 2.0,
    "interval_days": 180,
}
WHEN = "2026-11-02T09:30:00+00:00"


def session_body(points, **extra):
    return {
        "performed_at": WHEN,
        "operator": "kim",
        "reference": "angle jig #2",
        "kind": "incoming",
        "points": points,
        **extra,
    }


def pot_points(offsets=None):
    """An ideal 300 deg pot (0.0733 deg/count) with small, known deviations."""
    counts = np.linspace(100, 4000, 11)
    deviations = np.array([0.01, -0.02, 0.015, 0.0, -0.01, 0.02, -0.015, 0.005, 0.0, -0.005, 0.01])
    if offsets is not None:
        deviations = deviations + offsets
    degrees = -7.0 + 0.0733 * counts + deviations
    pairs = zip(counts, degrees, strict=True)
    return [{"reference_value": float(v), "reading": float(r)} for r, v in pairs]


@pytest.fixture
def pot_unit(client, admin):
    assert client.post("/api/v1/sensor-types", json=POT, headers=admin).status_code == 201
    assert (
        client.post(
            "/api/v1/units", json={"serial": "P-7", "sensor_type": "pot 300"}, headers=admin
        ).status_code
        == 201
    )
    return "P-7"


def test_calibration_is_fitted_judged_and_current(client, technician, pot_unit):
    points = pot_points()
    created = client.post(
        f"/api/v1/units/{pot_unit}/calibrations", json=session_body(points), headers=technician
    )
    assert created.status_code == 201, created.text
    body = created.json()
    # Reference: numpy.polyfit (independent least-squares implementation).
    r = np.array([p["reading"] for p in points])
    v = np.array([p["reference_value"] for p in points])
    slope, intercept = np.polyfit(r, v, 1)
    assert body["fit"]["params"]["c1"] == pytest.approx(slope, rel=1e-10)
    assert body["fit"]["params"]["c0"] == pytest.approx(intercept, rel=1e-10)
    assert body["fit"]["dof"] == 9
    assert body["fit"]["valid_range"] == [100.0, 4000.0]
    assert body["fit"]["engine_version"]
    # Deviations are <= 0.02 deg against a 1 deg tolerance: passes, and the rule is stated.
    assert body["decision"]["passed"] is True
    assert "1 deg" in body["decision"]["rule"] and "4:1" in body["decision"]["rule"]
    assert body["recorded_by"] == "tom"
    assert [p["repeat_index"] for p in body["points"]] == [0] * 11

    current = client.get(f"/api/v1/units/{pot_unit}/calibration", headers=technician).json()
    assert current["calibration"]["id"] == body["id"]
    assert current["due_on"] == "2027-11-02"
    unit = client.get(f"/api/v1/units/{pot_unit}", headers=technician).json()
    assert unit["calibration_count"] == 1 and unit["last_passed"] is True


def test_point_outside_tolerance_fails_with_reason(client, technician, pot_unit):
    offsets = np.zeros(11)
    offsets[5] = 2.5  # a 2.5 deg error against a 1 deg tolerance
    body = client.post(
        f"/api/v1/units/{pot_unit}/calibrations",
        json=session_body(pot_points(offsets)),
        headers=technician,
    ).json()
    assert body["decision"]["passed"] is False
    assert "outside tolerance" in body["decision"]["reasons"][0]
    latest = client.get(f"/api/v1/units/{pot_unit}", headers=technician).json()
    assert latest["last_passed"] is False


def test_newest_session_is_current_and_repeats_are_numbered(client, technician, pot_unit):
    first = client.post(
        f"/api/v1/units/{pot_unit}/calibrations",
        json=session_body(pot_points()),
        headers=technician,
    ).json()
    later = [*pot_points(), pot_points()[3]]
    second = client.post(
        f"/api/v1/units/{pot_unit}/calibrations",
        json=session_body(later, performed_at="2027-01-05T10:00:00Z", kind="periodic"),
        headers=technician,
    ).json()
    assert second["points"][-1]["repeat_index"] == 1
    current = client.get(f"/api/v1/units/{pot_unit}/calibration", headers=technician).json()
    assert current["calibration"]["id"] == second["id"] != first["id"]
    assert (
        client.get(f"/api/v1/units/{pot_unit}", headers=technician).json()["calibration_count"] == 2
    )


@pytest.mark.parametrize(
    ("mutate", "field"),
    [
        (lambda b: b["points"][2].pop("reading"), "points.2.reading"),
        (lambda b: b["points"][1].update(reading="lots"), "points.1.reading"),
        (lambda b: b.update(points=b["points"][:2]), "points"),  # too few for a line + dof
        (lambda b: b.update(performed_at="2026-11-02T09:30:00"), "performed_at"),
        (lambda b: b.update(kind="guesswork"), "kind"),
        (lambda b: b.update(family="polynomial"), "family"),
        (lambda b: b.update(operator=""), "operator"),
        (lambda b: b["points"][0].update(excluded=True), "points.0.exclude_reason"),
        (lambda b: [p.update(reading=5.0) for p in b["points"]], "points"),  # constant readings
    ],
)
def test_bad_calibration_names_the_field_and_writes_nothing(
    client, technician, pot_unit, mutate, field
):
    body = session_body(pot_points())
    mutate(body)
    response = client.post(f"/api/v1/units/{pot_unit}/calibrations", json=body, headers=technician)
    assert response.status_code == 422, response.text
    assert response.json()["field"] == field
    assert response.json()["detail"]
    unit = client.get(f"/api/v1/units/{pot_unit}", headers=technician).json()
    assert unit["calibration_count"] == 0
    assert (
        client.get(f"/api/v1/units/{pot_unit}/calibration", headers=technician).status_code == 404
    )


def test_user_exclusion_is_kept_with_its_reason(client, technician, pot_unit):
    points = pot_points(np.r_[0, 0, 0, 9.0, np.zeros(7)])
    points[3].update(excluded=True, exclude_reason="jig slipped")
    body = client.post(
        f"/api/v1/units/{pot_unit}/calibrations", json=session_body(points), headers=technician
    ).json()
    assert body["points"][3]["used"] is False
    assert body["points"][3]["excluded_reason"] == "jig slipped"
    assert body["fit"]["dof"] == 8
    assert body["decision"]["passed"] is True


def test_rangefinder_fold_back_points_are_excluded_with_reason(client, admin):
    client.post("/api/v1/sensor-types", json=RANGER, headers=admin)
    client.post("/api/v1/units", json={"serial": "R-1", "sensor_type": "ranger"}, headers=admin)
    # Invented response: counts = 41000/(mm + 12) + 35 beyond 70 mm; below it the reading
    # falls again (fold-back). Synthetic test data, common practice, no source.
    mm = np.array([30.0, 50.0, 70, 90, 120, 160, 220, 300, 400, 550, 700])
    counts = 41000 / (mm + 12) + 35
    counts[:2] = [330.0, 460.0]
    pairs = zip(mm, counts, strict=True)
    points = [{"reference_value": float(v), "reading": float(round(r))} for v, r in pairs]
    body = client.post(
        "/api/v1/units/R-1/calibrations", json=session_body(points), headers=admin
    ).json()
    assert [p["used"] for p in body["points"][:3]] == [False, False, True]
    assert all("fold-back" in p["excluded_reason"] for p in body["points"][:2])
    assert body["fit"]["valid_range"][1] == round(41000 / 82 + 35)
    # Truth in the value direction: mm = 41000/(counts - 35) - 12; rounding to whole counts
    # is the only noise, so the constants come back close.
    assert body["fit"]["params"]["k"] == pytest.approx(41000, rel=0.01)
    assert body["fit"]["params"]["r0"] == pytest.approx(-35, abs=2)


def test_unknown_unit_and_openapi(client, technician):
    missing = client.post(
        "/api/v1/units/NOPE/calibrations", json=session_body(pot_points()), headers=technician
    )
    assert missing.status_code == 404
    schema = client.get("/openapi.json").json()
    for path in (
        "/api/v1/sensor-types",
        "/api/v1/units",
        "/api/v1/units/{serial}",
        "/api/v1/units/{serial}/calibrations",
        "/api/v1/units/{serial}/calibration",
    ):
        assert path in schema["paths"], path
    created = schema["paths"]["/api/v1/units/{serial}/calibrations"]["post"]["responses"]["201"]
    assert created["content"]["application/json"]["schema"]["$ref"].endswith("CalibrationRead")


def test_csv_upload_matches_json_and_names_bad_rows(client, technician, pot_unit):
    points = pot_points()
    rows = "reference_value;reading\n" + "".join(
        f"{p['reference_value']!r};{p['reading']!r}\n" for p in points
    )
    form = {
        "performed_at": WHEN,
        "operator": "kim",
        "reference": "angle jig #2",
        "kind": "incoming",
    }
    url = f"/api/v1/units/{pot_unit}/calibrations/csv"
    created = client.post(
        url, data=form, files={"file": ("pts.csv", rows.encode())}, headers=technician
    )
    assert created.status_code == 201, created.text
    by_json = client.post(
        f"/api/v1/units/{pot_unit}/calibrations", json=session_body(points), headers=technician
    ).json()
    assert created.json()["fit"]["params"] == by_json["fit"]["params"]

    bad = "reference_value,reading\n1,2\n3,four\n"
    response = client.post(
        url, data=form, files={"file": ("pts.csv", bad.encode())}, headers=technician
    )
    assert response.status_code == 422
    assert response.json()["field"] == "file" and "row 3" in response.json()["detail"]
    no_header = client.post(
        url, data=form, files={"file": ("pts.csv", b"1,2\n3,4\n")}, headers=technician
    )
    assert no_header.status_code == 422 and "header" in no_header.json()["detail"]
    naive = client.post(
        url,
        data={**form, "performed_at": "2026-11-02T09:30:00"},
        files={"file": ("pts.csv", rows.encode())},
        headers=technician,
    )
    assert naive.status_code == 422 and naive.json()["field"] == "performed_at"
    unit = client.get(f"/api/v1/units/{pot_unit}", headers=technician).json()
    assert unit["calibration_count"] == 2
