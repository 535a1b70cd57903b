"""POST /api/v1/units/{serial}/calibrations/preview: the fit and decision a save would store,
with nothing stored (used by `sensorledger capture` before it asks to save); and the sample
statistics a point may carry (a reading that is the mean of n samples)."""

from __future__ import annotations

from datetime import UTC, datetime

from tests.server.lines import line_points, pot_type

WHEN = datetime(2025, 3, 1, 10, 0, tzinfo=UTC)


def _setup(client, admin) -> None:
    assert (
        client.post("/api/v1/sensor-types", json=pot_type("pot"), headers=admin).status_code == 201
    )
    r = client.post("/api/v1/units", json={"serial": "P-1", "sensor_type": "pot"}, headers=admin)
    assert r.status_code == 201


def _body(points) -> dict:
    return {
        "performed_at": WHEN.isoformat(),
        "operator": "tom",
        "reference": "angle jig",
        "points": points,
    }


def test_preview_matches_the_save_and_stores_nothing(client, admin, technician) -> None:
    _setup(client, admin)
    body = _body(line_points(3))
    r = client.post("/api/v1/units/P-1/calibrations/preview", json=body, headers=technician)
    assert r.status_code == 200, r.text
    preview = r.json()
    listed = client.get("/api/v1/units/P-1/calibrations", headers=technician).json()
    assert listed["total"] == 0
    saved = client.post("/api/v1/units/P-1/calibrations", json=body, headers=technician).json()
    assert preview["family"] == saved["fit"]["family"] == "line"
    assert preview["params"] == saved["fit"]["params"]
    assert preview["rse"] == saved["fit"]["rse"]
    assert preview["decision"] == saved["decision"]
    assert (preview["points"], preview["value_unit"]) == (11, "deg")


def test_preview_refusals(client, admin, technician, viewer) -> None:
    _setup(client, admin)
    body = _body(line_points(3))
    url = "/api/v1/units/P-1/calibrations/preview"
    assert client.post(url, json=body, headers=viewer).status_code == 403
    assert client.post(url, json=body).status_code == 401
    missing = client.post("/api/v1/units/NOPE/calibrations/preview", json=body, headers=technician)
    assert missing.status_code == 404
    two = client.post(url, json=_body(line_points(3)[:2]), headers=technician)
    assert two.status_code == 422
    bad_family = client.post(url, json={**body, "family": "beta"}, headers=technician)
    assert bad_family.status_code == 422 and bad_family.json()["field"] == "family"


def test_sample_statistics_are_kept_with_their_points(client, admin, technician) -> None:
    _setup(client, admin)
    points = line_points(4)
    points[0] |= {"sd": 2.5, "n": 19, "rejected": 1}
    points[1] |= {"sd": 0.0, "n": 20, "rejected": 0}
    saved = client.post(
        "/api/v1/units/P-1/calibrations", json=_body(points), headers=technician
    ).json()
    got = client.get(f"/api/v1/units/P-1/calibrations/{saved['id']}", headers=technician).json()
    assert [(p["sd"], p["n"], p["rejected"]) for p in got["points"][:3]] == [
        (2.5, 19, 1),
        (0.0, 20, 0),
        (None, None, None),
    ]
    for bad in ({"n": 0}, {"sd": -1.0}, {"rejected": -2}):
        wrong = [points[0] | bad, *points[1:]]
        r = client.post("/api/v1/units/P-1/calibrations", json=_body(wrong), headers=technician)
        assert r.status_code == 422, bad
    # the unit page and the report show them beside the points
    signed = client.post("/signin", data={"name": "tom", "password": "tom-pw", "next": "/"})
    assert signed.status_code == 200
    page = client.get("/units/P-1").text
    assert "samples: sd (counts), n, rejected" in page
    assert '<td class="num mono samples">2.5, 19, 1</td>' in page
    assert '<td class="num mono samples">—</td>' in page
    report = client.get(f"/units/P-1/calibrations/{saved['id']}/report").text
    assert "Each reading is the mean of n samples" in report and "2.5, 19, 1" in report
