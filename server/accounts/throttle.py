"""Sign-in throttling: failed sign-ins in a row per user name and per address, in the database
(every server process counts the same failures).

After ``FREE`` failures in a row a name (or an address) must wait ``FIRST_WAIT_S`` seconds before
its next try, doubling with every further failure up to ``MAX_WAIT_S``. A try while waiting is
answered 429 with Retry-After and its password is not even checked (it neither counts nor tells
anything). A successful sign-in clears the name's and the address's count; an admin clears any
(/admin/people, ``sensorledger user unlock``). A count not added to for ``FORGET_AFTER`` starts
again from zero.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime, timedelta

from sqlalchemy import case, delete, or_, select, update
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.orm import Session

from server.accounts.models import SigninThrottle, ThrottleKind
from server.db import utcnow

FREE = {ThrottleKind.user: 5, ThrottleKind.address: 20}  # an address may serve several people
FIRST_WAIT_S = 30
MAX_WAIT_S = 15 * 60
FORGET_AFTER = timedelta(days=1)
KEY_MAX = 128


@dataclass(frozen=True, slots=True)
class Lock:
    kind: ThrottleKind
    key: str
    failures: int
    last_failure_at: datetime
    locked_until: datetime | None


def key_of(kind: ThrottleKind, raw: str) -> str:
    """User names are counted as typed but ignoring case and spaces around them."""
    return (raw.strip().lower() if kind is ThrottleKind.user else raw.strip())[:KEY_MAX]


def wait_after(kind: ThrottleKind, failures: int) -> int:
    """Seconds to wait after ``failures`` failures in a row (0 while under the free count)."""
    over = failures - FREE[kind]
    if over < 0:
        return 0
    return int(min(FIRST_WAIT_S * 2 ** min(over, 30), MAX_WAIT_S))


def _keys(name: str, address: str) -> list[tuple[ThrottleKind, str]]:
    return [
        (ThrottleKind.user, key_of(ThrottleKind.user, name)),
        (ThrottleKind.address, key_of(ThrottleKind.address, address)),
    ]


def _where(keys: list[tuple[ThrottleKind, str]]):  # type: ignore[no-untyped-def]
    return or_(*((SigninThrottle.kind == k) & (SigninThrottle.key == v) for k, v in keys))


def seconds_to_wait(session: Session, name: str, address: str, now: datetime | None = None) -> int:
    """How long the name or the address must still wait before a try (0: it may try now)."""
    now = now or utcnow()
    until = session.scalars(
        select(SigninThrottle.locked_until).where(
            _where(_keys(name, address)), SigninThrottle.locked_until > now
        )
    ).all()
    latest = max((u for u in until if u is not None), default=None)
    return 0 if latest is None else max(1, math.ceil((latest - now).total_seconds()))


def failed(session: Session, name: str, address: str, now: datetime | None = None) -> int:
    """Count one failure for the name and the address; returns the seconds they must now wait."""
    now = now or utcnow()
    forgotten = now - FORGET_AFTER
    session.execute(
        delete(SigninThrottle).where(
            SigninThrottle.last_failure_at < forgotten,
            or_(SigninThrottle.locked_until.is_(None), SigninThrottle.locked_until < now),
        )
    )
    insert = postgresql.insert if session.get_bind().dialect.name == "postgresql" else sqlite.insert
    wait = 0
    for kind, key in _keys(name, address):
        stmt = insert(SigninThrottle).values(kind=kind, key=key, failures=1, last_failure_at=now)
        failures = session.scalar(
            stmt.on_conflict_do_update(
                index_elements=["kind", "key"],
                set_={
                    "failures": case(
                        (SigninThrottle.last_failure_at < forgotten, 1),
                        else_=SigninThrottle.failures + 1,
                    ),
                    "last_failure_at": now,
                },
            ).returning(SigninThrottle.failures)
        )
        seconds = wait_after(kind, int(failures or 1))
        if seconds:
            session.execute(
                update(SigninThrottle)
                .where(SigninThrottle.kind == kind, SigninThrottle.key == key)
                .values(locked_until=now + timedelta(seconds=seconds))
            )
        wait = max(wait, seconds)
    session.flush()
    return wait


def succeeded(session: Session, name: str, address: str) -> None:
    """A successful sign-in clears the counts of its name and its address."""
    session.execute(delete(SigninThrottle).where(_where(_keys(name, address))))


def clear(session: Session, kind: ThrottleKind, key: str) -> bool:
    """An admin clears one count; True when there was one."""
    result = session.execute(
        delete(SigninThrottle).where(
            SigninThrottle.kind == kind, SigninThrottle.key == key_of(kind, key)
        )
    )
    return bool(getattr(result, "rowcount", 0))


def list_locks(session: Session, now: datetime | None = None) -> list[Lock]:
    """Every count of failures still remembered, those that must wait first."""
    now = now or utcnow()
    rows = session.scalars(
        select(SigninThrottle)
        .where(SigninThrottle.last_failure_at >= now - FORGET_AFTER)
        .order_by(
            SigninThrottle.locked_until.desc().nulls_last(),
            SigninThrottle.last_failure_at.desc(),
        )
    ).all()
    return [Lock(r.kind, r.key, r.failures, r.last_failure_at, r.locked_until) for r in rows]
