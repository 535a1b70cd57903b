"""Managing people and tokens: list, password, role, disable/enable, revoke, clear a sign-in lock.
Shared by the command line and /admin/people; every change is audited with its actor. Services
flush, never commit."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

from sqlalchemy import func, select, update
from sqlalchemy.orm import Session, selectinload

from server.accounts import service, throttle
from server.accounts.models import Role, ThrottleKind, Token, TokenKind, User
from server.audit import service as audit
from server.db import utcnow
from server.errors import Conflict, Invalid, NotFound


@dataclass(frozen=True, slots=True)
class Person:
    user: User
    api_tokens: int  # usable API tokens
    sessions: int  # usable browser sign-ins
    last_seen: datetime | None  # the newest last use of any of their tokens
    lock: throttle.Lock | None  # their user name's failed sign-ins, if any remembered


def token_state(token: Token, now: datetime) -> str:
    if token.revoked_at is not None:
        return "revoked"
    if token.expires_at is not None and token.expires_at <= now:
        return "expired"
    return "active"


def list_people(session: Session) -> list[Person]:
    now = utcnow()
    users = session.scalars(select(User).options(selectinload(User.tokens)).order_by(User.name))
    locks = {
        lock.key: lock
        for lock in throttle.list_locks(session, now)
        if lock.kind is ThrottleKind.user
    }
    people = []
    for user in users:
        usable = [t for t in user.tokens if token_state(t, now) == "active"]
        used = [t.last_used_at for t in user.tokens if t.last_used_at is not None]
        people.append(
            Person(
                user=user,
                api_tokens=sum(t.kind is TokenKind.api for t in usable),
                sessions=sum(t.kind is TokenKind.browser for t in usable),
                last_seen=max(used, default=None),
                lock=locks.get(throttle.key_of(ThrottleKind.user, user.name)),
            )
        )
    return people


def list_tokens(
    session: Session, *, user: str | None = None, include_ended: bool = False
) -> list[Token]:
    """Tokens (API tokens and browser sign-ins), newest first; without ``include_ended`` only
    those still usable."""
    now = utcnow()
    query = select(Token).options(selectinload(Token.user)).order_by(Token.id.desc())
    if user is not None:
        query = query.where(Token.user_id == service.get_user(session, user).id)
    if not include_ended:
        query = query.where(
            Token.revoked_at.is_(None), (Token.expires_at.is_(None)) | (Token.expires_at > now)
        )
    return list(session.scalars(query))


def _enabled_admins(session: Session) -> int:
    return int(
        session.scalar(
            select(func.count())
            .select_from(User)
            .where(User.role == Role.admin, User.disabled_at.is_(None))
        )
        or 0
    )


def _end_tokens(session: Session, user: User, kind: TokenKind | None, keep: int | None) -> int:
    """Revoke the user's usable tokens (of ``kind``; all but the token id ``keep``)."""
    query = update(Token).where(Token.user_id == user.id, Token.revoked_at.is_(None))
    if kind is not None:
        query = query.where(Token.kind == kind)
    if keep is not None:
        query = query.where(Token.id != keep)
    result = session.execute(query.values(revoked_at=utcnow()))
    session.expire(user, ["tokens"])
    return int(getattr(result, "rowcount", 0) or 0)


def set_role(session: Session, actor: str, name: str, role: Role) -> User:
    user = service.get_user(session, name)
    before = user.role
    if before == role:
        return user
    if before is Role.admin and user.disabled_at is None and _enabled_admins(session) <= 1:
        raise Conflict(f"{user.name} is the only admin left; make another admin first")
    user.role = role
    audit.record(
        session, actor, "user.role_changed", "user", user.name,
        f"{user.name}: role {before.value} -> {role.value}", before=before.value, after=role.value,
    )  # fmt: skip
    return user


def set_password(
    session: Session, actor: str, name: str, password: str, *, keep_token: int | None = None
) -> int:
    """A new password; the user's browser sign-ins end (all but ``keep_token``: the admin's own
    current one), their API tokens stay. Returns the sign-ins ended."""
    user = service.get_user(session, name)
    service.set_password(session, user, password)
    ended = _end_tokens(session, user, TokenKind.browser, keep_token)
    throttle.clear(session, ThrottleKind.user, user.name)
    audit.record(
        session, actor, "user.password_changed", "user", user.name,
        f"{user.name}: password changed; {ended} browser sign-in(s) ended", sessions_ended=ended,
    )  # fmt: skip
    return ended


def disable(session: Session, actor: str, name: str) -> int:
    """The user can no longer sign in; every token and sign-in of theirs ends at once. Returns
    the tokens ended."""
    user = service.get_user(session, name)
    if user.disabled_at is not None:
        raise Conflict(f"{user.name} is disabled already", field="name")
    if user.role is Role.admin and _enabled_admins(session) <= 1:
        raise Conflict(f"{user.name} is the only admin left; make another admin first")
    user.disabled_at = utcnow()
    ended = _end_tokens(session, user, None, None)
    audit.record(
        session, actor, "user.disabled", "user", user.name,
        f"{user.name} disabled; {ended} token(s) and sign-in(s) ended", tokens_ended=ended,
    )  # fmt: skip
    return ended


def enable(session: Session, actor: str, name: str) -> User:
    """The user may sign in again; their old tokens stay revoked (create new ones)."""
    user = service.get_user(session, name)
    if user.disabled_at is None:
        raise Conflict(f"{user.name} is not disabled", field="name")
    user.disabled_at = None
    throttle.clear(session, ThrottleKind.user, user.name)
    audit.record(session, actor, "user.enabled", "user", user.name, f"{user.name} enabled")
    return user


def revoke(session: Session, actor: str, token_id: int) -> Token:
    token = session.get(Token, token_id)
    if token is None:
        raise NotFound(f"token {token_id} not found", field="token")
    if token.revoked_at is not None:
        raise Conflict(f"token {token_id} is revoked already", field="token")
    token.revoked_at = utcnow()
    what = "API token" if token.kind is TokenKind.api else "browser sign-in"
    audit.record(
        session, actor, "token.revoked", "user", token.user.name,
        f"{what} {token.id} ({token.name!r}) of {token.user.name} revoked",
        token=token.id, kind=token.kind.value, label=token.name,
    )  # fmt: skip
    session.flush()
    return token


def unlock(session: Session, actor: str, kind: ThrottleKind, key: str) -> None:
    """Clear the failed sign-ins of a user name or an address."""
    if not throttle.clear(session, kind, key):
        raise NotFound(f"no failed sign-ins are counted for the {kind.value} {key!r}", field="key")
    audit.record(
        session, actor, "signin.unlocked", kind.value, throttle.key_of(kind, key),
        f"failed sign-ins of the {kind.value} {key} cleared",
    )  # fmt: skip


def created_user(session: Session, actor: str, user: User) -> None:
    audit.record(
        session, actor, "user.created", "user", user.name,
        f"{user.name} added ({user.role.value})", role=user.role.value,
    )  # fmt: skip


def created_token(session: Session, actor: str, user: User, label: str) -> None:
    if not label.strip():
        raise Invalid("a token needs a label", field="label")
    audit.record(
        session, actor, "token.created", "user", user.name,
        f"API token {label!r} created for {user.name}", label=label,
    )  # fmt: skip
