"""The unit lookup and the unit list read summaries in SQL: a bounded number of statements
whatever a unit's history or the page's size, with the same answer as the unit's sessions give."""

from __future__ import annotations

import threading
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy import event, update

from server.fleet.models import Unit
from tests.server.lines import calibrate, line_points, pot_type

START = datetime(2024, 3, 1, 9, 0, tzinfo=UTC)
LOOKUP_STATEMENTS = 2  # the token with its user, the unit with its summary


@contextmanager
def statements(app: Any) -> Iterator[list[str]]:
    """The SQL statements the requests run on the app's engine inside the block: not those of
    the background job runner's threads, nor transaction control such as SQLite's BEGIN."""
    seen: list[str] = []

    def count(conn: Any, cursor: Any, statement: str, *args: Any) -> None:
        if threading.current_thread().name.startswith("sensorledger-"):
            return
        if statement.split(None, 1)[0].upper() not in {"BEGIN", "COMMIT", "ROLLBACK"}:
            seen.append(statement)

    event.listen(app.state.engine, "before_cursor_execute", count)
    try:
        yield seen
    finally:
        event.remove(app.state.engine, "before_cursor_execute", count)


def _setup(client: Any, admin: dict[str, str], serials: list[str]) -> None:
    assert client.post("/api/v1/sensor-types", json=pot_type("lookup pot"), headers=admin)
    for serial in serials:
        r = client.post(
            "/api/v1/units", json={"serial": serial, "sensor_type": "lookup pot"}, headers=admin
        )
        assert r.status_code == 201, r.text


def test_lookup_runs_the_same_few_statements_however_long_the_history(
    app: Any, client: Any, admin: dict[str, str]
) -> None:
    _setup(client, admin, ["LK-1"])
    with statements(app) as seen:
        fresh = client.get("/api/v1/units/LK-1", headers=admin)
    assert fresh.status_code == 200 and len(seen) == LOOKUP_STATEMENTS, seen
    assert fresh.json()["calibration_count"] == 0 and fresh.json()["last_calibrated_at"] is None

    saved = [
        calibrate(client, admin, "LK-1", START + timedelta(days=90 * i), line_points(i))
        for i in range(6)
    ]
    newest = saved[-1]["id"]
    voided = client.post(
        f"/api/v1/units/LK-1/calibrations/{newest}/void",
        json={"reason": "wrong jig"},
        headers=admin,
    )
    assert voided.status_code == 200, voided.text
    with statements(app) as seen:
        answer = client.get("/api/v1/units/LK-1", headers=admin)
    assert answer.status_code == 200 and len(seen) == LOOKUP_STATEMENTS, seen
    body = answer.json()
    assert body["calibration_count"] == 5  # the voided one does not count
    previous = saved[-2]
    assert datetime.fromisoformat(body["last_calibrated_at"]) == datetime.fromisoformat(
        previous["performed_at"]
    )
    assert body["last_passed"] is saved[-2]["decision"]["passed"] is True
    assert body["due_on"] is not None and body["due_basis"]
    assert set(body) == {
        "serial",
        "sensor_type",
        "status",
        "installed_in",
        "received_on",
        "notes",
        "calibration_count",
        "last_calibrated_at",
        "last_passed",
        "due_on",
        "due_basis",
    }
    assert client.get("/api/v1/units/LK-nope", headers=admin).status_code == 404

    with app.state.sessionmaker() as session:  # as a database from before stored due dates
        session.execute(update(Unit).values(due_on=None, due_basis=None))
        session.commit()
    again = client.get("/api/v1/units/LK-1", headers=admin).json()
    assert (again["due_on"], again["due_basis"]) == (body["due_on"], body["due_basis"])


def test_unit_list_runs_the_same_few_statements_whatever_the_page_size(
    app: Any, client: Any, admin: dict[str, str]
) -> None:
    serials = [f"LS-{i:02d}" for i in range(12)]
    _setup(client, admin, serials)
    for i, serial in enumerate(serials[:4]):
        calibrate(client, admin, serial, START + timedelta(days=i), line_points(10 + i))
    counts = []
    for per_page in (2, 12):
        with statements(app) as seen:
            page = client.get(f"/api/v1/units?per_page={per_page}", headers=admin)
        assert page.status_code == 200 and len(page.json()["items"]) == per_page
        counts.append(len(seen))
    assert counts[0] == counts[1] <= LOOKUP_STATEMENTS + 2, counts  # + the count and the page
    items = client.get("/api/v1/units?per_page=12", headers=admin).json()["items"]
    for item in items[:5]:
        assert item == client.get(f"/api/v1/units/{item['serial']}", headers=admin).json()
    assert [i["calibration_count"] for i in items[:5]] == [1, 1, 1, 1, 0]
