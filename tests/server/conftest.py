"""API fixtures: an app on an isolated database (SQLite file and PostgreSQL), users with tokens."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from fastapi.testclient import TestClient

from server.accounts import service as accounts
from server.accounts.models import Role
from server.app import create_app
from server.config import Settings


@pytest.fixture
def app(db_url: str):
    return create_app(Settings(database_url=db_url))


@pytest.fixture
def client(app) -> Iterator[TestClient]:
    with TestClient(app) as c:
        yield c


def _token_for(app, name: str, role: Role) -> dict[str, str]:
    with app.state.sessionmaker() as session:
        user = accounts.create_user(session, name, role, password=f"{name}-pw")
        raw = accounts.create_token(session, user, "tests")
        session.commit()
    return {"Authorization": f"Bearer {raw}"}


@pytest.fixture
def admin(app) -> dict[str, str]:
    """Headers of an admin's API token."""
    return _token_for(app, "ada", Role.admin)


@pytest.fixture
def technician(app) -> dict[str, str]:
    return _token_for(app, "tom", Role.technician)


@pytest.fixture
def viewer(app) -> dict[str, str]:
    return _token_for(app, "vic", Role.viewer)
