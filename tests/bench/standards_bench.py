"""Time the impact list of a suspect reference standard on a 1,000-unit fleet.

The fleet is ``tests.bench.bigfleet.seed`` (invented potentiometers, two calibrations a unit about
a year apart) on a temporary SQLite file; a standard is registered and every calibration of the
last 200 days is made to name it, so every unit's current calibration depends on it; an
in-tolerance check 100 days ago makes all of them "since its last good check".

Cases (time per call, best of a few alternating repeats, ``time.perf_counter``):

- the impact list (``server.standards.service.dependents`` + ``at_risk``: one statement) against
  the plain way: load every unit with its sessions and fits (``selectinload``) and pick each
  unit's current calibration in Python (``latest_session``);
- ``GET /api/v1/reference-standards/{name}`` (the standard with its checks and every dependent
  unit, as JSON) and ``GET /standards/{name}`` (the page with its table) through the app
  (Starlette's TestClient, no network), against the same plain way. The goal: under 200 ms for
  the list, the API answer and the page; reported, never asserted.

Both sides must find the same units before any time is reported. A failed check's flagging of
all 1,000 units (``raise_for_check``, one flush) is timed once and printed.

Alone: ``.venv/bin/python -m tests.bench.standards_bench [--units N]``.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

from sqlalchemy import select, update
from sqlalchemy.orm import selectinload

N_UNITS = 1_000
GOAL_MS = 200.0
STANDARD = "BENCH-RAIL-1"


def build(path: Path, n_units: int) -> tuple[Any, Any, dict[str, str]]:
    """The seeded app, the standard, and the API headers of a technician."""
    from server.accounts import service as accounts
    from server.accounts.models import Role
    from server.app import create_app
    from server.calibrations.models import CalibrationSession
    from server.config import Settings
    from server.standards import service
    from server.standards.schemas import CheckCreate, StandardCreate
    from tests.bench.bigfleet import seed

    url = f"sqlite:///{path}"
    seed(url, n_units=n_units, n_flags=0)
    app = create_app(Settings(database_url=url))
    today = datetime.now(UTC).date()
    with app.state.sessionmaker() as session:
        standard = service.create_standard(
            session,
            StandardCreate(
                name=STANDARD,
                quantity="angle",
                value_unit="deg",
                expanded_u=0.05,
                certificate="BENCH-CERT-1",
                calibrated_on=today - timedelta(days=300),
                due_on=today + timedelta(days=65),
            ),
            "bench",
        )
        session.execute(
            update(CalibrationSession)
            .where(CalibrationSession.performed_at > datetime.now(UTC) - timedelta(days=200))
            .values(reference_standard_id=standard.id, reference=STANDARD)
        )
        service.add_check(
            session,
            standard,
            CheckCreate(checked_on=today - timedelta(days=100), in_tolerance=True),
            "bench",
        )
        user = accounts.create_user(session, "stdbench", Role.technician, "bench-pass-2")
        raw = accounts.create_token(session, user, "bench")
        session.commit()
    return app, STANDARD, {"Authorization": f"Bearer {raw}"}


def plain_impact(session: Any, standard_id: int) -> list[str]:
    """The plain way: every unit with its sessions and fits, current calibration in Python."""
    from server.calibrations.models import CalibrationSession, latest_session
    from server.fleet.models import Unit, UnitStatus

    units = session.scalars(
        select(Unit).options(selectinload(Unit.sessions).selectinload(CalibrationSession.fits))
    ).all()
    found = []
    for unit in units:
        current = latest_session(unit.sessions)
        if (
            unit.status is not UnitStatus.retired
            and current is not None
            and current.reference_standard_id == standard_id
        ):
            found.append(unit.serial)
    session.expunge_all()
    return sorted(found)


def ms(call: Any, loops: int) -> float:
    start = time.perf_counter()
    for _ in range(loops):
        call()
    return (time.perf_counter() - start) / loops * 1e3


def report(n_units: int = N_UNITS) -> bool:
    """Print the table; False when the two ways disagree."""
    from fastapi.testclient import TestClient

    from server.standards import service, suspect

    folder = Path(tempfile.mkdtemp(prefix="sensorledger-standards-bench-"))
    started = time.perf_counter()
    app, name, headers = build(folder / "bench.db", n_units)
    seeded_s = time.perf_counter() - started
    read = app.state.read_sessionmaker()
    standard = service.get_standard(read, name)
    since = service.last_good_on(standard, datetime.now(UTC).date())

    def ours() -> list[str]:
        return sorted(
            d.serial for d in service.at_risk(standard, service.dependents(read, standard), since)
        )

    def baseline() -> list[str]:
        return plain_impact(read, standard.id)

    ok = True
    listed = ours()
    same = listed == baseline()
    ok &= same and bool(listed)
    print(
        f"\nreference standards: impact list of a suspect standard, {n_units:,}-unit fleet "
        f"(SQLite, seeded in {seeded_s:.0f} s); baseline: every unit with its sessions and fits "
        "loaded, the current calibration picked in Python"
    )
    print(
        f"  both ways find the same {len(listed):,} units at risk: {'yes' if same else 'NO'} "
        "(every unit but the fleet's one overdue template, last calibrated 500 days ago)"
    )
    with TestClient(app) as client:
        signin = client.post(
            "/signin",
            data={"name": "stdbench", "password": "bench-pass-2", "next": "/"},
            follow_redirects=False,
        )
        assert signin.status_code == 303
        api = client.get(f"/api/v1/reference-standards/{name}", headers=headers)
        page = client.get(f"/standards/{name}")
        answered = api.status_code == page.status_code == 200 and len(api.json()["units"]) == len(
            listed
        )
        ok &= answered
        cases = (
            ("impact list (service, 1 statement)", ours, 5),
            (
                "GET /api/v1/reference-standards/{name}",
                lambda: client.get(f"/api/v1/reference-standards/{name}", headers=headers),
                3,
            ),
            ("GET /standards/{name} (page)", lambda: client.get(f"/standards/{name}"), 3),
        )
        header = f"{'case':<40} | {'ours (ms)':>10} | {'baseline (ms)':>13} | {'ratio':>6} | goal"
        print(header)
        print("-" * len(header))
        for label, call, loops in cases:
            mine, base = [], []
            for _ in range(5):
                mine.append(ms(call, loops))
                base.append(ms(baseline, 1))
            best, base_best = min(mine), min(base)
            verdict = f"< {GOAL_MS:g} ms: {'met' if best < GOAL_MS else 'NOT met'}"
            print(
                f"{label:<40} | {best:>10.1f} | {base_best:>13.1f} | "
                f"{best / base_best:>6.2f} | {verdict}"
            )
    read.close()
    with app.state.sessionmaker() as session:
        standard = service.get_standard(session, name)
        from server.standards.schemas import CheckCreate

        check = service.add_check(
            session,
            standard,
            CheckCreate(checked_on=datetime.now(UTC).date(), in_tolerance=False),
            "bench",
        )
        start = time.perf_counter()
        flagged = suspect.raise_for_check(session, standard, check)
        raise_ms = (time.perf_counter() - start) * 1e3
        session.commit()
    ok &= len(flagged) == len(listed)
    print(
        f"  a failed check flags {len(flagged):,} units (reference_suspect, one flush) in "
        f"{raise_ms:.0f} ms (once)"
    )
    app.state.engine.dispose()
    return ok


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--units", type=int, default=N_UNITS)
    args = parser.parse_args()
    return 0 if report(args.units) else 1


if __name__ == "__main__":
    sys.exit(main())
