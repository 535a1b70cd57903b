"""API: a session POST with an Idempotency-Key is stored once, however often it is sent
(SQLite and PostgreSQL). The race of two requests with one key is replayed deterministically by
hiding the first request's stored answer from the second one's early look-ups."""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, datetime

import pytest
import sqlalchemy as sa

from server import idempotency
from server.calibrations.models import CalibrationSession
from tests.server.lines import line_points, pot_type

WHEN = datetime(2026, 3, 2, 9, 30, tzinfo=UTC)


@pytest.fixture
def unit(client, admin, technician) -> Iterator[str]:
    assert client.post("/api/v1/sensor-types", json=pot_type("idem pot"), headers=admin).is_success
    r = client.post(
        "/api/v1/units", json={"serial": "ID-1", "sensor_type": "idem pot"}, headers=technician
    )
    assert r.status_code == 201, r.text
    yield "ID-1"


def _post(client, headers, serial: str, key: str, seed: int = 1):
    return client.post(
        f"/api/v1/units/{serial}/calibrations",
        json={
            "performed_at": WHEN.isoformat(),
            "operator": "tom",
            "reference": "angle jig",
            "points": line_points(seed),
        },
        headers={**headers, "Idempotency-Key": key},
    )


def _stored(app) -> int:
    with app.state.sessionmaker() as s:
        return s.scalar(sa.select(sa.func.count()).select_from(CalibrationSession)) or 0


def test_a_retry_is_replayed(client, app, technician, unit) -> None:
    first = _post(client, technician, unit, "k-1")
    again = _post(client, technician, unit, "k-1")
    assert first.status_code == again.status_code == 201
    assert "Idempotency-Replayed" not in first.headers
    assert again.headers["Idempotency-Replayed"] == "true"
    assert again.json()["id"] == first.json()["id"]
    assert _stored(app) == 1


def test_the_same_key_for_another_request_is_refused(client, app, technician, unit) -> None:
    assert _post(client, technician, unit, "k-2").status_code == 201
    r = _post(client, technician, unit, "k-2", seed=2)
    assert r.status_code == 422
    assert r.json()["field"] == "idempotency-key"
    assert _stored(app) == 1


@pytest.mark.parametrize("hidden", [1, 2], ids=["seen-after-the-lock", "seen-at-the-insert"])
def test_two_requests_with_one_key_at_once(
    client, app, technician, unit, monkeypatch, hidden: int
) -> None:
    """The second request looked before the first committed (``hidden`` look-ups miss the stored
    answer): it sees the answer once it holds the unit, or at the latest when its own insert of
    the key collides (PostgreSQL raised there, a 500, before the fix); either way it replays."""
    first = _post(client, technician, unit, "k-3")
    assert first.status_code == 201
    real = idempotency.find
    calls = {"n": 0}

    def late(*args, **kwargs):
        calls["n"] += 1
        return None if calls["n"] <= hidden else real(*args, **kwargs)

    monkeypatch.setattr(idempotency, "find", late)
    second = _post(client, technician, unit, "k-3")
    assert second.status_code == 201, second.text
    assert second.headers["Idempotency-Replayed"] == "true"
    assert second.json()["id"] == first.json()["id"]
    assert calls["n"] == hidden + 1
    assert _stored(app) == 1
