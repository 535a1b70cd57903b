"""API: calibration sessions are stored, fitted server-side and judged (SQLite and PostgreSQL)."""

from __future__ import annotations

import numpy as np
import pytest
import sqlalchemy as sa
from scipy import stats

from server.calibrations.models import FitRecord

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
        (lambda b: b["points"][1].update(reference_value=1e300), "points.1.reference_value"),
        (lambda b: b["points"][2].update(reading=-2e15), "points.2.reading"),
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


# ---- ranking, diagnostics, type B inputs and the budget -----------------------------------------

POT_TWO = {**POT, "name": "pot two", "families": ["line", "polynomial"],
           "family_options": {"polynomial": {"degree": 2}}}  # fmt: skip


def aicc(rss: float, n: int, p: int) -> float:
    """AICc of a least-squares fit, k = p + 1 (Burnham & Anderson 2002, eq. 2.14 with the
    error variance counted as a parameter)."""
    k = p + 1
    return n * np.log(rss / n) + 2 * k + 2 * k * (k + 1) / (n - k - 1)


def bowed_points(bow: float = 0.3):
    """The pot's points with a quadratic bow of ``bow`` deg at the ends (synthetic, no source)."""
    points = pot_points()
    for p in points:
        x = (p["reading"] - 2050.0) / 1950.0
        p["reference_value"] += bow * x * x
    return points


def unit_of_type(client, admin, sensor_type: dict, serial: str) -> str:
    created = client.post("/api/v1/sensor-types", json=sensor_type, headers=admin)
    assert created.status_code == 201, created.text
    answer = client.post(
        "/api/v1/units", json={"serial": serial, "sensor_type": sensor_type["name"]}, headers=admin
    )
    assert answer.status_code == 201, answer.text
    return serial


def test_every_family_is_ranked_and_the_recommended_one_is_kept(client, admin, app):
    serial = unit_of_type(client, admin, POT_TWO, "P-2")
    points = bowed_points()
    body = client.post(
        f"/api/v1/units/{serial}/calibrations", json=session_body(points), headers=admin
    ).json()
    ranking = body["ranking"]
    assert [c["label"] for c in ranking["candidates"]] == ["polynomial(degree=2)", "line"]
    assert ranking["recommended"] == "polynomial(degree=2)"
    assert (ranking["chosen"], ranking["chosen_because"]) == ("polynomial(degree=2)", "recommended")
    assert body["fit"]["family"] == "polynomial" and body["fit"]["options"]["degree"] == 2
    # criteria from numpy.polyfit's residuals (independent least squares), n = 11
    r = np.array([p["reading"] for p in points])
    v = np.array([p["reference_value"] for p in points])
    rss = {d: float(np.sum((v - np.polyval(np.polyfit(r, v, d), r)) ** 2)) for d in (1, 2)}
    by_label = {c["label"]: c for c in ranking["candidates"]}
    assert by_label["line"]["rss"] == pytest.approx(rss[1], rel=1e-8)
    assert by_label["line"]["aicc"] == pytest.approx(aicc(rss[1], 11, 2), abs=1e-6)
    assert by_label["polynomial(degree=2)"]["aicc"] == pytest.approx(aicc(rss[2], 11, 3), abs=1e-6)
    assert by_label["polynomial(degree=2)"]["delta_aicc"] == 0
    assert by_label["line"]["delta_aicc"] > 10 and by_label["line"]["monotone"] is True

    # stored with the fit, and returned again by the current calibration
    with app.state.sessionmaker() as session:
        stored = session.scalars(sa.select(FitRecord)).one()
        assert stored.ranking["recommended"] == "polynomial(degree=2)"
        assert stored.ranking["chosen_because"] == "recommended"
        assert [c["family"] for c in stored.ranking["candidates"]] == ["polynomial", "line"]
    current = client.get(f"/api/v1/units/{serial}/calibration", headers=admin).json()
    assert current["calibration"]["ranking"] == ranking


def test_a_requested_family_is_kept_and_the_ranking_still_says_what_it_recommends(client, admin):
    serial = unit_of_type(client, admin, POT_TWO, "P-3")
    body = client.post(
        f"/api/v1/units/{serial}/calibrations",
        json=session_body(bowed_points(), family="line"),
        headers=admin,
    ).json()
    assert body["fit"]["family"] == "line"
    assert body["ranking"]["chosen"] == "line"
    assert body["ranking"]["chosen_because"] == "requested"
    assert body["ranking"]["recommended"] == "polynomial(degree=2)"


def test_on_straight_points_the_simpler_family_is_recommended(client, admin):
    serial = unit_of_type(client, admin, POT_TWO, "P-4")
    body = client.post(
        f"/api/v1/units/{serial}/calibrations", json=session_body(pot_points()), headers=admin
    ).json()
    # the two are within delta-AICc 2 of each other, or the line is best: fewest parameters wins
    assert body["ranking"]["recommended"] == "line" and body["fit"]["family"] == "line"
    assert "fewest parameters" in body["ranking"]["reason"]


def test_a_single_family_type_stores_a_one_row_ranking(client, technician, pot_unit):
    body = client.post(
        f"/api/v1/units/{pot_unit}/calibrations",
        json=session_body(pot_points()),
        headers=technician,
    ).json()
    assert [c["family"] for c in body["ranking"]["candidates"]] == ["line"]
    assert body["ranking"]["recommended"] == "line"
    assert body["ranking"]["candidates"][0]["delta_aicc"] == 0


def test_a_suspect_point_is_flagged_with_its_reason_and_still_used(client, technician, pot_unit):
    offsets = np.zeros(11)
    offsets[6] = 0.3  # 0.3 deg off: inside the 1 deg tolerance, 20 times the others' scatter
    body = client.post(
        f"/api/v1/units/{pot_unit}/calibrations",
        json=session_body(pot_points(offsets)),
        headers=technician,
    ).json()
    [suspect] = body["suspects"]
    assert suspect["index"] == 6 and suspect["t"] > 0
    assert "studentised residual" in suspect["reason"] and "Bonferroni" in suspect["reason"]
    assert body["points"][6]["used"] is True
    assert body["points"][6]["suspect_reason"] == suspect["reason"]
    assert all(p["suspect_reason"] is None for i, p in enumerate(body["points"]) if i != 6)
    assert body["lack_of_fit"] is None  # no reference value repeats
    assert body["decision"]["passed"] is True  # flagged, not a failure


def test_lack_of_fit_is_tested_when_reference_values_repeat(client, technician, pot_unit):
    # each point twice, the repeat 0.01 deg higher: pure error from the pairs
    points = pot_points()
    repeats = [{**p, "reference_value": p["reference_value"]} for p in points]
    for p, q in zip(points, repeats, strict=True):
        q["reading"] = p["reading"] + 0.5
    body = client.post(
        f"/api/v1/units/{pot_unit}/calibrations",
        json=session_body(points + repeats),
        headers=technician,
    ).json()
    lof = body["lack_of_fit"]
    assert lof["groups"] == 11 and lof["dof_pure_error"] == 11 and lof["dof_lack_of_fit"] == 9
    # By hand (NIST/SEMATECH e-Handbook 4.4.4.4): SSE = SS_pe + SS_lof, F = (SS_lof/9)/(SS_pe/11)
    assert lof["f"] == pytest.approx(
        (lof["ss_lack_of_fit"] / 9) / (lof["ss_pure_error"] / 11), rel=1e-12
    )
    assert lof["significant"] == (lof["p_value"] < 0.05)


def test_type_b_inputs_are_kept_and_enter_the_budget(client, technician, pot_unit):
    body = client.post(
        f"/api/v1/units/{pot_unit}/calibrations",
        json=session_body(
            pot_points(),
            reference_expanded_u=0.08,
            reference_k=2,
            extra_u=0.05,
            extra_label="shaft coupling backlash",
        ),
        headers=technician,
    )
    assert body.status_code == 201, body.text
    body = body.json()
    assert body["reference_expanded_u"] == 0.08 and body["reference_k"] == 2
    assert body["extra_u"] == 0.05 and body["extra_label"] == "shaft coupling backlash"
    b = body["budget"]
    assert b["reading"] == 2050.0  # the middle of the valid range 100..4000
    assert (b["value_unit"], b["reading_unit"]) == ("deg", "counts")
    rows = {r["source"].split(" (")[0]: r for r in b["rows"]}
    assert rows["reference standard"]["contribution"] == pytest.approx(0.04)  # U / k
    assert rows["reference standard"]["kind"] == "B" and rows["reference standard"]["dof"] is None
    assert rows["shaft coupling backlash"]["contribution"] == pytest.approx(0.05)
    assert "reading resolution" not in rows  # this type states none
    # type A rows by hand for a straight line: u_curve = s sqrt(1/n + (r - mean)^2 / Sxx),
    # repeatability = s (noise in the value); s from numpy.polyfit's residuals
    r = np.array([p["reading"] for p in pot_points()])
    v = np.array([p["reference_value"] for p in pot_points()])
    s = np.sqrt(np.sum((v - np.polyval(np.polyfit(r, v, 1), r)) ** 2) / 9)
    u_curve = s * np.sqrt(1 / 11 + (2050 - r.mean()) ** 2 / np.sum((r - r.mean()) ** 2))
    assert rows["calibration curve"]["u"] == pytest.approx(u_curve, rel=1e-8)
    assert rows["repeatability of a new reading"]["u"] == pytest.approx(s, rel=1e-8)
    u = np.sqrt(u_curve**2 + s**2 + 0.04**2 + 0.05**2)
    assert b["u"] == pytest.approx(u, rel=1e-8)
    nu_eff = u**4 / ((u_curve**2 + s**2) ** 2 / 9)  # GUM G.4.1, type A as one term, 9 dof
    assert b["dof_eff"] == pytest.approx(nu_eff, rel=1e-8)
    assert b["k"] == pytest.approx(stats.t.ppf(0.975, nu_eff), rel=1e-8)
    assert b["expanded"] == pytest.approx(b["k"] * u, rel=1e-8)


def test_the_reference_standard_counts_in_the_tur(client, technician, pot_unit):
    # U = 0.6 deg at k = 2: u_ref = 0.3, so U >= 2 * 0.3 = 0.6 against 1 deg / 4 = 0.25
    body = client.post(
        f"/api/v1/units/{pot_unit}/calibrations",
        json=session_body(pot_points(), reference_expanded_u=0.6),
        headers=technician,
    ).json()
    assert body["decision"]["passed"] is False
    [reason] = body["decision"]["reasons"]
    assert "test-uncertainty ratio" in reason
    assert body["decision"]["max_expanded_uncertainty"] > 0.6
    assert "reference standard (U = 0.6 deg, k = 2)" in body["decision"]["rule"]


def test_budget_at_a_chosen_reading_and_outside_the_range(client, technician, pot_unit):
    client.post(
        f"/api/v1/units/{pot_unit}/calibrations",
        json=session_body(pot_points()),
        headers=technician,
    )
    url = f"/api/v1/units/{pot_unit}/calibration"
    at = client.get(url, params={"reading": 3500}, headers=technician)
    assert at.status_code == 200, at.text
    b = at.json()["calibration"]["budget"]
    assert b["reading"] == 3500
    assert b["value"] == pytest.approx(-7.0 + 0.0733 * 3500, abs=0.05)
    middle = client.get(url, headers=technician).json()["calibration"]["budget"]
    assert middle["reading"] == 2050 and middle["u"] < b["u"]  # the curve is surest mid-range
    for bad in ("4000.5", "-3", "nan", "lots"):
        answer = client.get(url, params={"reading": bad}, headers=technician)
        assert answer.status_code == 422, bad
        assert answer.json()["field"] == "reading", answer.json()
    assert (
        "outside the valid range 100 to 4000 counts"
        in (client.get(url, params={"reading": 4001}, headers=technician).json()["detail"])
    )


@pytest.mark.parametrize(
    ("extra", "field"),
    [
        ({"reference_expanded_u": -0.1}, "reference_expanded_u"),
        ({"reference_expanded_u": "lots"}, "reference_expanded_u"),
        ({"reference_k": 0}, "reference_k"),
        ({"extra_u": 0.1}, "extra_label"),  # an extra term needs a name
        ({"extra_label": "cable"}, "extra_label"),  # and a name needs a value
        ({"extra_u": -1, "extra_label": "cable"}, "extra_u"),
    ],
)
def test_bad_type_b_inputs_name_the_field(client, technician, pot_unit, extra, field):
    response = client.post(
        f"/api/v1/units/{pot_unit}/calibrations",
        json=session_body(pot_points(), **extra),
        headers=technician,
    )
    assert response.status_code == 422, response.text
    assert response.json()["field"] == field


def test_csv_upload_takes_the_type_b_inputs(client, technician, pot_unit):
    rows = "reference_value,reading\n" + "".join(
        f"{p['reference_value']!r},{p['reading']!r}\n" for p in pot_points()
    )
    form = {
        "performed_at": WHEN,
        "operator": "kim",
        "reference": "angle jig #2",
        "reference_expanded_u": "0.08",
        "reference_k": "2",
        "extra_u": "",
        "extra_label": "",
    }
    url = f"/api/v1/units/{pot_unit}/calibrations/csv"
    created = client.post(
        url, data=form, files={"file": ("pts.csv", rows.encode())}, headers=technician
    )
    assert created.status_code == 201, created.text
    assert created.json()["reference_expanded_u"] == 0.08 and created.json()["extra_u"] is None
    for change, field in (
        ({"reference_expanded_u": "abc"}, "reference_expanded_u"),
        ({"reference_k": "-2"}, "reference_k"),
        ({"extra_u": "0.1"}, "extra_label"),
    ):
        bad = client.post(
            url,
            data={**form, **change},
            files={"file": ("pts.csv", rows.encode())},
            headers=technician,
        )
        assert bad.status_code == 422, (change, bad.text)
        assert bad.json()["field"] == field


def test_a_curve_that_is_not_monotone_fails_with_that_reason(client, admin):
    bent = {**POT, "name": "bent", "families": ["polynomial"],
            "family_options": {"polynomial": {"degree": 2}}, "tolerance_abs": 5.0}  # fmt: skip
    serial = unit_of_type(client, admin, bent, "B-1")
    # value = (reading - 50)^2 / 100 on readings 0..100: turns at 50, inside the range
    # (synthetic, common practice, no source); a little scatter keeps the fit honest
    rng = np.random.default_rng(1)
    r = np.linspace(0, 100, 11)
    v = (r - 50) ** 2 / 100 + rng.normal(0, 0.01, r.size)
    points = [{"reference_value": float(a), "reading": float(b)} for a, b in zip(v, r, strict=True)]
    body = client.post(
        f"/api/v1/units/{serial}/calibrations", json=session_body(points), headers=admin
    ).json()
    assert body["fit"]["monotone"] is False
    assert body["decision"]["passed"] is False
    assert any("not monotone over its valid range" in why for why in body["decision"]["reasons"])
    # nothing monotone to recommend: the type's first family is kept, and the ranking says so
    assert body["ranking"]["recommended"] is None
    assert body["ranking"]["chosen_because"] == "fallback"
    assert "no monotone fit" in body["ranking"]["reason"]


def test_a_type_with_reading_noise_fits_in_the_reading_direction(client, admin):
    serial = unit_of_type(client, admin, {**POT, "name": "pot r", "noise_in": "reading"}, "R-9")
    points = pot_points()
    body = client.post(
        f"/api/v1/units/{serial}/calibrations", json=session_body(points), headers=admin
    ).json()
    assert body["fit"]["noise"] == "reading"
    # a line with all the noise in the reading is the inverse of the reading-on-value regression
    # (numpy.polyfit as the independent least squares)
    r = np.array([p["reading"] for p in points])
    v = np.array([p["reference_value"] for p in points])
    slope, intercept = np.polyfit(v, r, 1)
    assert body["fit"]["params"]["c1"] == pytest.approx(1 / slope, rel=1e-8)
    assert body["fit"]["params"]["c0"] == pytest.approx(-intercept / slope, rel=1e-8)
    rows = [row["source"] for row in body["budget"]["rows"]]
    assert rows == ["calibration curve (fitted constants)", "repeatability of a new reading"]
    assert body["budget"]["rows"][1]["unit"] == "counts"  # the noise is a reading's


def test_the_reading_resolution_enters_the_budget_and_the_tur(client, admin):
    coarse = {**POT, "name": "pot coarse", "reading_resolution": 10.0}
    serial = unit_of_type(client, admin, coarse, "C-1")
    body = client.post(
        f"/api/v1/units/{serial}/calibrations", json=session_body(pot_points()), headers=admin
    ).json()
    [resolution] = [r for r in body["budget"]["rows"] if r["source"].startswith("reading res")]
    assert resolution["distribution"] == "rectangular"
    assert resolution["u"] == pytest.approx(10 / np.sqrt(12))  # GUM 4.3.7
    assert resolution["sensitivity"] == pytest.approx(0.0733, rel=1e-3)
    # 10 counts * 0.0733 deg/count / sqrt(12) = 0.2116 deg: U >= 0.42 > 1 deg / 4
    assert body["decision"]["passed"] is False
    assert "test-uncertainty ratio" in body["decision"]["reasons"][0]
    assert "one step = 10 counts" in body["decision"]["rule"]


def test_a_fit_stored_before_rankings_were_kept_still_reads(client, technician, pot_unit, app):
    offsets = np.zeros(11)
    offsets[6] = 0.3
    client.post(
        f"/api/v1/units/{pot_unit}/calibrations",
        json=session_body(pot_points(offsets)),
        headers=technician,
    )
    with app.state.sessionmaker() as session:  # as revision 0002 leaves older fits
        session.execute(sa.update(FitRecord).values(ranking=None, diagnostics=None))
        session.commit()
    body = client.get(f"/api/v1/units/{pot_unit}/calibration", headers=technician).json()
    calibration = body["calibration"]
    assert calibration["ranking"] is None
    assert [s["index"] for s in calibration["suspects"]] == [6]  # computed from the stored fit
    assert calibration["budget"]["reading"] == 2050.0
