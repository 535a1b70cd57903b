"""The answer given to a POST that carried an ``Idempotency-Key`` header, kept for replays."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import JSON, Integer, String, UniqueConstraint
from sqlalchemy.orm import Mapped, mapped_column

from server.db import Base, UTCDateTime, utcnow


class IdempotentResponse(Base):
    """What ``actor`` was answered for ``key``, with a digest of the request it answered."""

    __tablename__ = "idempotent_response"
    __table_args__ = (UniqueConstraint("actor", "key"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    actor: Mapped[str] = mapped_column(String(64))
    key: Mapped[str] = mapped_column(String(128))
    route: Mapped[str] = mapped_column(String(256))
    request_digest: Mapped[str] = mapped_column(String(64))
    status_code: Mapped[int] = mapped_column(Integer)
    body: Mapped[dict[str, Any]] = mapped_column(JSON)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
