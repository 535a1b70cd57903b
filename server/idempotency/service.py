"""Replays for retried POSTs (the ``Idempotency-Key`` request header).

A bench script that times out does not know whether its session was stored; it sends the same
POST again with the same key. The first request stores its answer under (user, key) in the same
transaction as the session itself, so either both are stored or neither. A retry finds that
answer and gets it again (same status and body, header ``Idempotency-Replayed: true``); nothing
is stored twice. The same key with a different request body is refused (422 naming the header):
the key was reused by mistake. Two requests with one key at the same moment: the second waits for
the first (SQLite's write lock; PostgreSQL's unique index), then replays its answer.
"""

from __future__ import annotations

import hashlib
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from server.db import json_safe
from server.errors import Invalid
from server.idempotency.models import IdempotentResponse

HEADER = "Idempotency-Key"
MAX_KEY = 128


def digest(payload: bytes) -> str:
    return hashlib.sha256(payload).hexdigest()


def check_key(key: str | None) -> str | None:
    if key is None:
        return None
    key = key.strip()
    if not key or len(key) > MAX_KEY or not key.isprintable():
        raise Invalid(f"{HEADER} must be 1 to {MAX_KEY} printable characters", field=HEADER.lower())
    return key


def find(
    session: Session, actor: str, key: str, route: str, request_digest: str
) -> IdempotentResponse | None:
    """The stored answer for (actor, key), if any; a different request under it is refused."""
    found = session.scalar(
        select(IdempotentResponse).where(
            IdempotentResponse.actor == actor, IdempotentResponse.key == key
        )
    )
    if found is not None and (found.route != route or found.request_digest != request_digest):
        raise Invalid(
            f"{HEADER} {key!r} was used for a different request ({found.route}); "
            "use a new key for a new request",
            field=HEADER.lower(),
        )
    return found


def keep(
    session: Session,
    actor: str,
    key: str,
    route: str,
    request_digest: str,
    status_code: int,
    body: dict[str, Any],
) -> None:
    """Store the answer in the caller's transaction (the route commits both together)."""
    session.add(
        IdempotentResponse(
            actor=actor,
            key=key,
            route=route,
            request_digest=request_digest,
            status_code=status_code,
            body=json_safe(body),
        )
    )
    session.flush()
