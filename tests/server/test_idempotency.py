"""Idempotency-Key on the session POSTs (SQLite and PostgreSQL): a retried POST stores one
session and answers what the first answered; a key reused for another body is refused."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from datetime import UTC, datetime, timedelta
from typing import Any

import pytest

from server import idempotency
from tests.server.lines import line_points, pot_type

TYPE = "Pot 200"
WHEN = (datetime.now(UTC) - timedelta(days=2)).replace(microsecond=0)


@pytest.fixture
def unit(client, admin, technician) -> str:
    assert (
        client.post("/api/v1/sensor-types", json=pot_type(TYPE), headers=admin).status_code == 201
    )
    r = client.post(
        "/api/v1/units", json={"serial": "K-1", "sensor_type": TYPE}, headers=technician
    )
    assert r.status_code == 201, r.text
    return "K-1"


def body(seed: int = 1) -> dict[str, Any]:
    return {
        "performed_at": WHEN.isoformat(),
        "operator": "tom",
        "reference": "angle jig",
        "kind": "incoming",
        "points": line_points(seed),
    }


def post(client: Any, headers: dict[str, str], key: str | None, data: dict[str, Any]) -> Any:
    extra = {"Idempotency-Key": key} if key is not None else {}
    return client.post("/api/v1/units/K-1/calibrations", json=data, headers={**headers, **extra})


def stored(client: Any, headers: dict[str, str]) -> int:
    return int(client.get("/api/v1/units/K-1/calibrations", headers=headers).json()["total"])


def test_a_retry_with_the_same_key_stores_one_session(client, technician, unit):
    first = post(client, technician, "bench-7-0001", body())
    again = post(client, technician, "bench-7-0001", body())
    assert first.status_code == again.status_code == 201
    assert again.headers.get("Idempotency-Replayed") == "true"
    assert "Idempotency-Replayed" not in first.headers
    assert again.json() == first.json()
    assert stored(client, technician) == 1
    other = post(client, technician, "bench-7-0002", body())
    assert other.status_code == 201 and other.json()["id"] != first.json()["id"]
    assert stored(client, technician) == 2


def test_without_a_key_every_post_stores(client, technician, unit):
    assert post(client, technician, None, body()).status_code == 201
    assert post(client, technician, None, body()).status_code == 201
    assert stored(client, technician) == 2


def test_a_key_reused_for_another_request_is_refused(client, technician, unit):
    assert post(client, technician, "k1", body(1)).status_code == 201
    wrong = post(client, technician, "k1", body(2))
    assert wrong.status_code == 422
    assert wrong.json()["field"] == "idempotency-key"
    assert stored(client, technician) == 1


@pytest.mark.parametrize("key", ["", " ", "x" * 129, "tab\there"])
def test_a_bad_key_is_refused_naming_the_header(client, technician, unit, key):
    r = post(client, technician, key, body())
    assert r.status_code == 422, r.text
    assert r.json()["field"] == "idempotency-key"
    assert stored(client, technician) == 0


def test_keys_belong_to_their_user(client, technician, admin, unit):
    assert post(client, technician, "same", body()).status_code == 201
    theirs = post(client, admin, "same", body())
    assert theirs.status_code == 201 and "Idempotency-Replayed" not in theirs.headers
    assert stored(client, technician) == 2


def test_the_csv_upload_replays_too(client, technician, unit):
    csv = "reference_value,reading\n" + "".join(
        f"{p['reference_value']},{p['reading']}\n" for p in line_points(3)
    )
    form = {
        "performed_at": WHEN.isoformat(),
        "operator": "tom",
        "reference": "angle jig",
        "kind": "incoming",
    }

    def upload() -> Any:
        return client.post(
            "/api/v1/units/K-1/calibrations/csv",
            data=form,
            files={"file": ("points.csv", csv, "text/csv")},
            headers={**technician, "Idempotency-Key": "csv-1"},
        )

    first, again = upload(), upload()
    assert first.status_code == again.status_code == 201, again.text
    assert again.headers.get("Idempotency-Replayed") == "true"
    assert again.json()["id"] == first.json()["id"]
    assert stored(client, technician) == 1


def test_retries_at_the_same_moment_store_one_session(client, technician, unit):
    with ThreadPoolExecutor(max_workers=6) as pool:
        answers = list(pool.map(lambda _: post(client, technician, "burst", body()), range(6)))
    assert [a.status_code for a in answers] == [201] * 6, [a.text for a in answers]
    assert len({a.json()["id"] for a in answers}) == 1
    assert stored(client, technician) == 1


@pytest.mark.parametrize("hidden", [1, 2], ids=["seen-after-the-lock", "seen-at-the-insert"])
def test_two_requests_with_one_key_at_once(client, technician, unit, monkeypatch, hidden: int):
    """The same race replayed deterministically: the second request looked before the first
    committed (``hidden`` look-ups miss the stored answer). It sees the answer once it holds the
    unit, or at the latest when its own insert of the key collides (PostgreSQL raised there, a
    500, before the fix); either way it replays."""
    first = post(client, technician, "k-3", body())
    assert first.status_code == 201
    real = idempotency.find
    calls = {"n": 0}

    def late(*args: Any, **kwargs: Any) -> Any:
        calls["n"] += 1
        return None if calls["n"] <= hidden else real(*args, **kwargs)

    monkeypatch.setattr(idempotency, "find", late)
    second = post(client, technician, "k-3", body())
    assert second.status_code == 201, second.text
    assert second.headers["Idempotency-Replayed"] == "true"
    assert second.json()["id"] == first.json()["id"]
    assert calls["n"] == hidden + 1
    assert stored(client, technician) == 1
