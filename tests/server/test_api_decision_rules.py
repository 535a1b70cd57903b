"""API: a sensor type's decision rule and guard band, and the noise-model check stored with each
fit (SQLite and PostgreSQL through the db_url fixture).

Points are invented (common practice, no source): tests/server/lines.py's potentiometer
(value = 0.1 r, 0.02 deg noise) and a rangefinder with 3 counts of ADC noise in the reading.
"""

from __future__ import annotations

from datetime import UTC, datetime

import numpy as np
import pytest

from tests.server.lines import calibrate, line_points, pot_type

WHEN = datetime(2026, 11, 2, 9, 30, tzinfo=UTC)
MM = np.array([60, 75, 100, 120, 150, 180, 220, 260, 300, 350, 400, 500, 600, 700, 800.0])


def add_unit(client, admin, serial: str, type_name: str) -> None:
    r = client.post(
        "/api/v1/units", json={"serial": serial, "sensor_type": type_name}, headers=admin
    )
    assert r.status_code == 201, r.text


def test_guarded_type_states_its_rule_guard_band_and_risk(client, admin, technician) -> None:
    body = pot_type("guarded pot", decision_rule="guarded", guard_multiple=1.5)
    created = client.post("/api/v1/sensor-types", json=body, headers=admin)
    assert created.status_code == 201, created.text
    assert created.json()["decision_rule"] == "guarded"
    assert created.json()["guard_multiple"] == 1.5
    add_unit(client, admin, "G-1", "guarded pot")
    saved = calibrate(client, technician, "G-1", WHEN, line_points(1))
    d = saved["decision"]
    assert d["decision_rule"] == "guarded" and d["guard_multiple"] == 1.5
    assert d["rule"].startswith("Guarded acceptance (ILAC-G8:2019)") and "w = 1.5 U" in d["rule"]
    assert d["passed"]
    # w = 1.5 U at the worst point, and the limit accepted there is the allowed error less w
    assert d["guard_band_at_worst"] == pytest.approx(1.5 * d["max_expanded_uncertainty"], rel=0.5)
    assert d["acceptance_limit_at_worst"] == pytest.approx(
        d["allowed_at_worst"] - d["guard_band_at_worst"]
    )
    assert 0.0 <= d["false_accept_risk"] < 1e-6  # errors ~0.02 deg against 1 deg allowed
    current = client.get("/api/v1/units/G-1/calibration", headers=technician).json()
    assert current["calibration"]["decision"]["decision_rule"] == "guarded"


def test_simple_rule_is_the_default(client, admin, technician) -> None:
    assert client.post("/api/v1/sensor-types", json=pot_type("plain"), headers=admin).is_success
    add_unit(client, admin, "S-1", "plain")
    d = calibrate(client, technician, "S-1", WHEN, line_points(2))["decision"]
    assert d["decision_rule"] == "simple" and d["guard_multiple"] is None
    assert d["rule"].startswith("Simple acceptance (ILAC-G8:2019)")


@pytest.mark.parametrize(
    "change", [{"decision_rule": "lenient"}, {"guard_multiple": -1}, {"guard_multiple": None}]
)
def test_bad_rule_settings_are_a_422(client, admin, change) -> None:
    assert client.post("/api/v1/sensor-types", json=pot_type("p2"), headers=admin).is_success
    r = client.patch("/api/v1/sensor-types/p2", json=change, headers=admin)
    assert r.status_code == 422, r.text


def test_noise_check_is_stored_and_names_what_to_change(client, admin, technician) -> None:
    ranger = pot_type(
        "ranger",
        quantity="distance",
        value_unit="mm",
        reading_max=4095,
        families=["inverse_offset"],
        tolerance_abs=3.0,
        tolerance_rel=2.0,
    )
    assert client.post("/api/v1/sensor-types", json=ranger, headers=admin).is_success
    add_unit(client, admin, "R-1", "ranger")
    rng = np.random.default_rng(3201)
    counts = 95.0 + 52000.0 / (MM + 18.0) + rng.normal(0.0, 3.0, MM.size)
    pts = [
        {"reference_value": float(v), "reading": float(r)} for r, v in zip(counts, MM, strict=True)
    ]
    saved = calibrate(client, technician, "R-1", WHEN, pts)
    check = saved["noise_check"]
    assert check["setting"] == "value" and check["supported"] == "reading"
    assert check["disagrees"] is True
    assert check["loglik_reading"] - check["loglik_value"] >= 2.0
    # the pages say so: sign in as the technician (password f"{name}-pw", see conftest)
    signed = client.post("/signin", data={"name": "tom", "password": "tom-pw"})
    assert signed.status_code in (200, 303), signed.text
    page = client.get("/units/R-1").text
    assert "The points support scatter in the reading" in page
    assert "Decision rule" in page and "simple acceptance" in page
    type_page = client.get("/types/ranger").text
    assert "the points of 1 of 1 checked units disagree" in type_page
    report = client.get(f"/units/R-1/calibrations/{saved['id']}/report").text
    assert "The points support scatter in the reading" in report
