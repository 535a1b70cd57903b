"""Users, password checks and tokens. Tokens are random, shown once, stored as SHA-256."""

from __future__ import annotations

import functools
import hashlib
import hmac
import logging
import secrets
from datetime import datetime, timedelta

from sqlalchemy import or_, select, update
from sqlalchemy.exc import OperationalError
from sqlalchemy.orm import Session, joinedload, sessionmaker

from server.accounts import throttle
from server.accounts.models import ROLE_RANK, Role, Token, TokenKind, User
from server.db import utcnow
from server.errors import Conflict, Forbidden, Invalid, NotFound, NotSignedIn, TooManyTries

log = logging.getLogger("sensorledger")
TOUCH_EVERY = timedelta(minutes=1)  # a token's last use is written at most this often

SCRYPT = {"n": 2**14, "r": 8, "p": 1}


def hash_password(password: str) -> str:
    salt = secrets.token_bytes(16)
    digest = hashlib.scrypt(password.encode(), salt=salt, **SCRYPT)
    return f"scrypt${salt.hex()}${digest.hex()}"


@functools.cache
def _nobody() -> str:
    """A hash no password matches: checked for unknown names, so they take as long."""
    return hash_password(secrets.token_urlsafe(16))


def check_password(password: str, stored: str | None) -> bool:
    if not stored or not stored.startswith("scrypt$"):
        check_password(password, _nobody())
        return False
    _, salt, digest = stored.split("$")
    got = hashlib.scrypt(password.encode(), salt=bytes.fromhex(salt), **SCRYPT)
    return hmac.compare_digest(got.hex(), digest)


def token_hash(token: str) -> str:
    return hashlib.sha256(token.encode()).hexdigest()


def get_user(session: Session, name: str) -> User:
    user = session.scalar(select(User).where(User.name == name))
    if user is None:
        raise NotFound(f"user {name!r} not found", field="name")
    return user


def create_user(session: Session, name: str, role: Role, password: str | None = None) -> User:
    name = name.strip()
    if not name:
        raise Invalid("a user needs a name", field="name")
    if session.scalar(select(User).where(User.name == name)) is not None:
        raise Conflict(f"user {name!r} exists already", field="name")
    user = User(name=name, role=role, password_hash=hash_password(password) if password else None)
    session.add(user)
    session.flush()
    return user


def set_password(session: Session, user: User, password: str) -> None:
    if len(password) < 4:
        raise Invalid("a password needs at least 4 characters", field="password")
    user.password_hash = hash_password(password)


def create_token(
    session: Session,
    user: User,
    name: str,
    kind: TokenKind = TokenKind.api,
    *,
    lifetime: timedelta | None = None,
) -> str:
    """A new token for ``user``; the returned string is the only copy of it."""
    raw = secrets.token_urlsafe(32)
    session.add(
        Token(
            user=user,
            name=name,
            kind=kind,
            token_hash=token_hash(raw),
            expires_at=utcnow() + lifetime if lifetime else None,
        )
    )
    session.flush()
    return raw


def token_for(session: Session, raw: str, kind: TokenKind) -> Token:
    """The usable token ``raw`` of ``kind``, its user loaded (one query)."""
    token = session.scalar(
        select(Token)
        .options(joinedload(Token.user))  # one query per request, user included
        .where(Token.token_hash == token_hash(raw), Token.kind == kind)
    )
    now: datetime = utcnow()
    if (
        token is None
        or token.revoked_at is not None
        or (token.expires_at is not None and token.expires_at <= now)
    ):
        raise NotSignedIn("the token is unknown, expired or revoked")
    if token.user.disabled_at is not None:
        raise NotSignedIn(f"the user {token.user.name} is disabled")
    return token


def user_for_token(session: Session, raw: str, kind: TokenKind) -> User:
    return token_for(session, raw, kind).user


def needs_touch(token: Token, now: datetime | None = None) -> bool:
    """Whether the token's last use is older than TOUCH_EVERY (then ``touch`` writes it)."""
    last = token.last_used_at
    return last is None or last <= (now or utcnow()) - TOUCH_EVERY


def touch(factory: sessionmaker[Session], token_id: int) -> None:
    """Write a token's last use, in a transaction of its own after the answer was sent (so a
    reading request stays reading); at most once per TOUCH_EVERY, whichever process asks."""
    now = utcnow()
    try:
        with factory() as session:
            session.execute(
                update(Token)
                .where(
                    Token.id == token_id,
                    or_(Token.last_used_at.is_(None), Token.last_used_at <= now - TOUCH_EVERY),
                )
                .values(last_used_at=now)
            )
            session.commit()
    except OperationalError as exc:  # busy: the next use within a minute writes it
        log.info("token %s: last use not written: %s", token_id, exc.orig)


def revoke_token(session: Session, raw: str) -> None:
    token = session.scalar(select(Token).where(Token.token_hash == token_hash(raw)))
    if token is not None:
        token.revoked_at = utcnow()


def sign_in(session: Session, name: str, password: str, days: int, address: str) -> str:
    """Check the password and open a browser sign-in; the cookie value is returned.

    Throttled per user name and per address (``server.accounts.throttle``): while either must
    wait, TooManyTries (429) without checking the password. A failure is flushed, so the route
    commits it before answering."""
    wait = throttle.seconds_to_wait(session, name, address)
    if wait:
        raise TooManyTries(
            f"too many failed sign-ins in a row: wait {wait} s before trying again, or ask an "
            "admin to clear them",
            retry_after=wait,
        )
    user = session.scalar(select(User).where(User.name == name.strip()))
    if user is None or not check_password(password, user.password_hash):
        wait = throttle.failed(session, name, address)
        if wait:
            raise TooManyTries(
                f"wrong user name or password, too many times in a row: wait {wait} s before "
                "trying again",
                retry_after=wait,
            )
        raise NotSignedIn("wrong user name or password")
    if user.disabled_at is not None:
        raise NotSignedIn(f"{user.name} is disabled; an admin can enable them again")
    throttle.succeeded(session, name, address)
    return create_token(
        session, user, "browser sign-in", TokenKind.browser, lifetime=timedelta(days=days)
    )


def require_role(user: User, role: Role) -> None:
    if ROLE_RANK[user.role] < ROLE_RANK[role]:
        raise Forbidden(f"this needs the {role.value} role; {user.name} is {user.role.value}")
