"""Sign-in throttling (SQLite and PostgreSQL): after 5 failures in a row a user name must wait,
429 with Retry-After, doubling; an address after 20; the count is in the database, so a second
server process sees it; a successful sign-in or an admin clears it.

The numbers (5 free failures, 30 s doubling to 15 min, 20 per address) are our policy, common
practice, no source. Time is moved by rewriting ``locked_until``, never by sleeping."""

from __future__ import annotations

from datetime import timedelta

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import update

from server.accounts import people, throttle
from server.accounts import service as accounts
from server.accounts.csrf import COOKIE
from server.accounts.models import Role, SigninThrottle, ThrottleKind
from server.app import create_app
from server.config import Settings
from server.db import utcnow
from server.errors import NotSignedIn, TooManyTries

PASSWORD = "right-horse-9"


@pytest.fixture
def user(app) -> str:
    with app.state.sessionmaker() as session:
        accounts.create_user(session, "gus", Role.technician, password=PASSWORD)
        session.commit()
    return "gus"


def try_sign_in(client: TestClient, name: str, password: str):  # type: ignore[no-untyped-def]
    return client.post(
        "/signin", data={"name": name, "password": password, "next": "/"}, follow_redirects=False
    )


def time_passes(app, seconds: float) -> None:
    """Every lock ends ``seconds`` sooner (as if that much time went by)."""
    with app.state.sessionmaker() as session:
        for row in session.query(SigninThrottle).all():
            if row.locked_until is not None:
                row.locked_until -= timedelta(seconds=seconds)
            row.last_failure_at -= timedelta(seconds=seconds)
        session.commit()


def test_the_back_off_doubles_to_fifteen_minutes() -> None:
    user = [throttle.wait_after(ThrottleKind.user, n) for n in range(1, 13)]
    assert user == [0, 0, 0, 0, 30, 60, 120, 240, 480, 900, 900, 900]
    assert throttle.wait_after(ThrottleKind.address, 19) == 0
    assert throttle.wait_after(ThrottleKind.address, 20) == 30


def test_five_failures_lock_the_user_name(app, client, user) -> None:
    for _ in range(4):
        wrong = try_sign_in(client, user, "guess")
        assert wrong.status_code == 401 and "Retry-After" not in wrong.headers
    fifth = try_sign_in(client, user, "guess")
    assert fifth.status_code == 429 and fifth.headers["Retry-After"] == "30"
    assert "wait 30 s" in fifth.text
    # while locked even the right password is not checked, and no cookie is given
    locked = try_sign_in(client, user, PASSWORD)
    assert locked.status_code == 429 and 25 <= int(locked.headers["Retry-After"]) <= 30
    assert COOKIE not in client.cookies
    # the same name in other letter case is the same count
    assert try_sign_in(client, " GUS ", PASSWORD).status_code == 429

    time_passes(app, 31)
    again = try_sign_in(client, user, "guess")  # a 6th failure: twice as long
    assert again.status_code == 429 and again.headers["Retry-After"] == "60"
    time_passes(app, 61)
    ok = try_sign_in(client, user, PASSWORD)
    assert ok.status_code == 303 and COOKIE in client.cookies
    with app.state.sessionmaker() as session:  # the success cleared the name and the address
        assert throttle.list_locks(session) == []


def test_unknown_names_are_throttled_alike(client) -> None:
    answers = [try_sign_in(client, "nobody-here", "x").status_code for _ in range(6)]
    assert answers == [401, 401, 401, 401, 429, 429]


def test_another_server_process_sees_the_same_count(app, db_url, user) -> None:
    other = create_app(Settings(database_url=db_url))
    try:
        with TestClient(app) as first, TestClient(other) as second:
            for i in range(5):
                side = first if i % 2 else second
                try_sign_in(side, user, "guess")
            assert try_sign_in(first, user, PASSWORD).status_code == 429
            assert try_sign_in(second, user, PASSWORD).status_code == 429
    finally:
        other.state.engine.dispose()


def test_an_address_guessing_many_names_is_locked(app, user) -> None:
    with app.state.sessionmaker() as session:
        for i in range(20):
            with pytest.raises((NotSignedIn, TooManyTries)):
                accounts.sign_in(session, f"name-{i}", "x", 1, "10.0.0.9")
        session.commit()
        with pytest.raises(TooManyTries) as caught:  # the right password, the same address
            accounts.sign_in(session, user, PASSWORD, 1, "10.0.0.9")
        assert caught.value.retry_after == 30
        # the same user from another address may still sign in
        assert accounts.sign_in(session, user, PASSWORD, 1, "10.0.0.10")
        session.commit()


def test_an_admin_sees_and_clears_a_lock(app, client, user) -> None:
    for _ in range(5):
        try_sign_in(client, user, "guess")
    with app.state.sessionmaker() as session:
        locks = {(lk.kind, lk.key): lk for lk in throttle.list_locks(session)}
        lock = locks[(ThrottleKind.user, "gus")]
        assert lock.failures == 5 and lock.locked_until is not None
        assert lock.locked_until > utcnow() + timedelta(seconds=25)
        person = next(p for p in people.list_people(session) if p.user.name == "gus")
        assert person.lock is not None and person.lock.failures == 5
        people.unlock(session, "ada", ThrottleKind.user, "gus")
        people.unlock(session, "ada", ThrottleKind.address, "testclient")
        session.commit()
    assert try_sign_in(client, user, PASSWORD).status_code == 303


def test_old_failures_are_forgotten(app, client, user) -> None:
    for _ in range(4):
        try_sign_in(client, user, "guess")
    with app.state.sessionmaker() as session:
        session.execute(update(SigninThrottle).values(last_failure_at=utcnow() - timedelta(days=2)))
        session.commit()
    assert try_sign_in(client, user, "guess").status_code == 401  # a count of 1, not 5
