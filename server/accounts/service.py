"""Users, password checks and tokens. Tokens are random, shown once, stored as SHA-256."""

from __future__ import annotations

import hashlib
import hmac
import secrets
from datetime import datetime, timedelta

from sqlalchemy import select
from sqlalchemy.orm import Session, joinedload

from server.accounts.models import ROLE_RANK, Role, Token, TokenKind, User
from server.db import utcnow
from server.errors import Conflict, Forbidden, Invalid, NotFound, NotSignedIn

SCRYPT = {"n": 2**14, "r": 8, "p": 1}


def hash_password(password: str) -> str:
    salt = secrets.token_bytes(16)
    digest = hashlib.scrypt(password.encode(), salt=salt, **SCRYPT)
    return f"scrypt${salt.hex()}${digest.hex()}"


def check_password(password: str, stored: str | None) -> bool:
    if not stored or not stored.startswith("scrypt$"):
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


def user_for_token(session: Session, raw: str, kind: TokenKind) -> User:
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
    return token.user


def revoke_token(session: Session, raw: str) -> None:
    token = session.scalar(select(Token).where(Token.token_hash == token_hash(raw)))
    if token is not None:
        token.revoked_at = utcnow()


def sign_in(session: Session, name: str, password: str, days: int) -> str:
    """Check the password and open a browser sign-in; the cookie value is returned."""
    user = session.scalar(select(User).where(User.name == name.strip()))
    if user is None or not check_password(password, user.password_hash):
        raise NotSignedIn("wrong user name or password")
    return create_token(
        session, user, "browser sign-in", TokenKind.browser, lifetime=timedelta(days=days)
    )


def require_role(user: User, role: Role) -> None:
    if ROLE_RANK[user.role] < ROLE_RANK[role]:
        raise Forbidden(f"this needs the {role.value} role; {user.name} is {user.role.value}")
