"""The authorization matrix (SQLite and PostgreSQL), generated from the app's route table: every
route (API and pages) x anonymous, viewer, technician, admin, a revoked token, a disabled user ->
the status the rule table below expects.

A route missing from RULES fails the test (a new route needs its rule), and so does a rule for a
route that is gone. Denied: the API answers 401 (no usable token) or 403 (a role too low); pages
send to the sign-in page (303) or answer 403. Allowed: anything but 401/403/5xx and a sign-in
redirect (the requests carry real path values but no body: a 422 means the door was open).
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select
from starlette.routing import Mount, Route

from server.accounts import csrf
from server.accounts import service as accounts
from server.accounts.models import Role, TokenKind
from server.app import create_app
from server.calibrations.models import CalibrationSession
from server.config import Settings
from server.db import utcnow
from server.flags.models import Flag
from tests.web.seed import IR_TYPE, VIEWER, Fleet, seed

PUBLIC, VIEWER_ROLE, TECHNICIAN, ADMIN = "public", "viewer", "technician", "admin"
LEVEL = {VIEWER_ROLE: 0, TECHNICIAN: 1, ADMIN: 2}

RULES: dict[tuple[str, str], str] = {
    # documentation, static files, signing in and out
    ("GET", "/openapi.json"): PUBLIC,
    ("GET", "/docs"): PUBLIC,
    ("GET", "/static/vendor/plotly.min.js"): PUBLIC,
    ("GET", "/static/{path}"): PUBLIC,
    ("GET", "/signin"): PUBLIC,
    ("POST", "/signin"): PUBLIC,
    ("POST", "/signout"): PUBLIC,
    # the API
    ("POST", "/api/v1/sensor-types"): ADMIN,
    ("GET", "/api/v1/sensor-types"): VIEWER_ROLE,
    ("PATCH", "/api/v1/sensor-types/{name}"): ADMIN,
    ("POST", "/api/v1/sensor-types/{name}/refit"): ADMIN,
    ("GET", "/api/v1/jobs/{job_id}"): VIEWER_ROLE,
    ("POST", "/api/v1/units"): TECHNICIAN,
    ("GET", "/api/v1/units"): VIEWER_ROLE,
    ("GET", "/api/v1/units/{serial}"): VIEWER_ROLE,
    ("PATCH", "/api/v1/units/{serial}"): TECHNICIAN,
    ("POST", "/api/v1/units/{serial}/calibrations"): TECHNICIAN,
    ("POST", "/api/v1/units/{serial}/calibrations/csv"): TECHNICIAN,
    ("POST", "/api/v1/units/{serial}/calibrations/preview"): TECHNICIAN,
    ("GET", "/api/v1/units/{serial}/calibrations"): VIEWER_ROLE,
    ("GET", "/api/v1/units/{serial}/calibrations/{session_id}"): VIEWER_ROLE,
    ("POST", "/api/v1/units/{serial}/calibrations/{session_id}/void"): TECHNICIAN,
    ("GET", "/api/v1/units/{serial}/calibration"): VIEWER_ROLE,
    ("POST", "/api/v1/history"): TECHNICIAN,
    ("GET", "/api/v1/units/{serial}/table.csv"): VIEWER_ROLE,
    ("GET", "/api/v1/units/{serial}/table.json"): VIEWER_ROLE,
    ("GET", "/api/v1/units/{serial}/firmware.h"): VIEWER_ROLE,
    ("GET", "/api/v1/flags"): VIEWER_ROLE,
    ("POST", "/api/v1/flags/{flag_id}/acknowledge"): TECHNICIAN,
    ("POST", "/api/v1/units/{serial}/events"): TECHNICIAN,
    ("GET", "/api/v1/units/{serial}/events"): VIEWER_ROLE,
    ("GET", "/api/v1/audit"): VIEWER_ROLE,
    ("POST", "/api/v1/reference-standards"): TECHNICIAN,
    ("GET", "/api/v1/reference-standards"): VIEWER_ROLE,
    ("GET", "/api/v1/reference-standards/{name}"): VIEWER_ROLE,
    ("POST", "/api/v1/reference-standards/{name}/checks"): TECHNICIAN,
    # pages
    ("GET", "/"): VIEWER_ROLE,
    ("GET", "/find"): VIEWER_ROLE,
    ("GET", "/types"): VIEWER_ROLE,
    ("GET", "/types/new"): ADMIN,
    ("POST", "/types"): ADMIN,
    ("GET", "/types/{name}"): VIEWER_ROLE,
    ("POST", "/types/{name}"): ADMIN,
    ("POST", "/types/{name}/refit"): ADMIN,
    ("GET", "/types/{name}/jobs/{job_id}"): VIEWER_ROLE,
    ("GET", "/receive"): TECHNICIAN,
    ("POST", "/receive"): TECHNICIAN,
    ("GET", "/units/{serial}"): VIEWER_ROLE,
    ("POST", "/units/{serial}/calibrations/{session_id}/void"): TECHNICIAN,
    ("POST", "/units/{serial}/status"): TECHNICIAN,
    ("POST", "/units/{serial}/calibrations"): TECHNICIAN,
    ("GET", "/calibrate"): TECHNICIAN,
    ("POST", "/calibrate/preview"): TECHNICIAN,
    ("POST", "/calibrate"): TECHNICIAN,
    ("GET", "/units/{serial}/table.csv"): VIEWER_ROLE,
    ("GET", "/units/{serial}/table.json"): VIEWER_ROLE,
    ("GET", "/units/{serial}/firmware.h"): VIEWER_ROLE,
    ("GET", "/units/{serial}/calibrations/{session_id}/report"): VIEWER_ROLE,
    ("GET", "/attention"): VIEWER_ROLE,
    ("GET", "/attention/flags/{flag_id}/chart"): VIEWER_ROLE,
    ("POST", "/attention/flags/{flag_id}/acknowledge"): TECHNICIAN,
    ("POST", "/units/{serial}/events"): TECHNICIAN,
    ("GET", "/standards"): VIEWER_ROLE,
    ("GET", "/standards/find"): VIEWER_ROLE,
    ("POST", "/standards"): TECHNICIAN,
    ("GET", "/standards/{name}"): VIEWER_ROLE,
    ("POST", "/standards/{name}/checks"): TECHNICIAN,
    ("GET", "/standards/{name}/units.csv"): VIEWER_ROLE,
    ("GET", "/admin/people"): ADMIN,
    ("POST", "/admin/people/{name}/role"): ADMIN,
    ("POST", "/admin/people/{name}/password"): ADMIN,
    ("POST", "/admin/people/{name}/disable"): ADMIN,
    ("POST", "/admin/people/{name}/enable"): ADMIN,
    ("POST", "/admin/tokens/{token_id}/revoke"): ADMIN,
    ("POST", "/admin/signin-locks/clear"): ADMIN,
}

WHO = ("anonymous", "revoked token", "disabled user", VIEWER_ROLE, TECHNICIAN, ADMIN)


def routes_of(app: Any) -> Iterator[tuple[str, str]]:
    """(method, path) of every route the app serves, routers included (HEAD left out)."""

    def walk(routes: list[Any], prefix: str) -> Iterator[tuple[str, str]]:
        for route in routes:
            if hasattr(route, "original_router"):  # FastAPI's included router
                yield from walk(route.original_router.routes, prefix + route.include_context.prefix)
            elif isinstance(route, Mount):
                yield "GET", prefix + route.path + "/{path}"
            elif isinstance(route, Route):
                for method in sorted((route.methods or set()) - {"HEAD"}):
                    yield method, prefix + route.path
            else:
                raise AssertionError(f"a route of an unknown kind: {route!r}")

    yield from walk(app.routes, "")


@pytest.fixture
def world(db_url: str) -> Iterator[tuple[Any, dict[str, str]]]:
    """The seeded fleet, real values for every path parameter."""
    fleet: Fleet = seed(db_url)
    app = create_app(Settings(database_url=db_url))
    with app.state.sessionmaker() as session:
        accounts.create_user(session, "m-admin", Role.admin, password="m-admin-pw")
        gone = accounts.create_user(session, "m-gone", Role.admin, password="m-gone-pw")
        gone.disabled_at = utcnow()
        spare = accounts.create_user(session, "m-spare", Role.viewer, password="m-spare-pw")
        accounts.create_token(session, spare, "to revoke")
        session.flush()
        values = {
            "serial": fleet.calibrated,
            "name": IR_TYPE,
            "session_id": str(
                session.scalars(
                    select(CalibrationSession.id).order_by(CalibrationSession.id)
                ).first()
            ),
            "flag_id": str(session.scalars(select(Flag.id)).first() or 1),
            "job_id": "1",
            "token_id": str(spare.tokens[0].id),
            "path": "css/app.css",
        }
        session.commit()
    yield app, values
    app.state.engine.dispose()


def credentials(app: Any, who: str, api: bool) -> dict[str, str]:
    """Headers that make a request as ``who`` (a fresh token each time: a request may sign out)."""
    if who == "anonymous":
        return {}
    name = {VIEWER_ROLE: VIEWER[0], TECHNICIAN: "tess", ADMIN: "m-admin"}.get(who, "m-admin")
    if who == "disabled user":
        name = "m-gone"
    kind = TokenKind.api if api else TokenKind.browser
    with app.state.sessionmaker() as session:
        raw = accounts.create_token(session, accounts.get_user(session, name), "matrix", kind)
        if who == "revoked token":
            accounts.revoke_token(session, raw)
        session.commit()
    if api:
        return {"Authorization": f"Bearer {raw}"}
    return {"Cookie": f"{csrf.COOKIE}={raw}", csrf.HEADER: csrf.token_of(raw)}


def expected_denial(rule: str, who: str, api: bool) -> int | None:
    """The status that refuses ``who`` on a route of ``rule``; None when they are let in."""
    if rule == PUBLIC:
        return None
    if who in ("anonymous", "revoked token", "disabled user"):
        return 401 if api else 303
    return 403 if LEVEL[who] < LEVEL[rule] else None


def test_every_route_has_a_rule(tmp_path) -> None:
    app = create_app(Settings(database_url=f"sqlite:///{tmp_path / 'routes.db'}"), migrate=False)
    served = set(routes_of(app))
    assert sorted(served - RULES.keys()) == [], "routes without a rule in RULES"
    assert sorted(RULES.keys() - served) == [], "rules for routes the app no longer has"


def test_the_matrix(world) -> None:
    app, values = world
    wrong: list[str] = []
    with TestClient(app) as client:
        for (method, template), rule in RULES.items():
            api = template.startswith("/api/")
            path = template.format(**values)
            for who in WHO:
                answer = client.request(
                    method, path, headers=credentials(app, who, api), follow_redirects=False
                )
                client.cookies.clear()
                status = answer.status_code
                denied = expected_denial(rule, who, api)
                to_signin = status == 303 and answer.headers["location"].startswith("/signin")
                if template == "/signout":  # anyone: the sign-in page after it
                    ok = to_signin
                elif denied is None:
                    ok = status not in (401, 403) and status < 500 and not to_signin
                else:
                    ok = status == denied and (denied != 303 or to_signin)
                if not ok:
                    wrong.append(f"{method} {template} as {who}: {status} (rule {rule})")
    assert wrong == []
