"""The audit log: who changed what, when; rows are only ever added."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import JSON, String
from sqlalchemy.orm import Mapped, mapped_column

from server.db import Base, UTCDateTime, utcnow


class AuditEntry(Base):
    """One change: ``action`` (e.g. ``calibration.saved``) done by ``actor`` to the subject
    ``subject_kind``/``subject`` (e.g. ``unit``/``IR-2506-03``), with the numbers in ``detail``."""

    __tablename__ = "audit_entry"

    id: Mapped[int] = mapped_column(primary_key=True)
    at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow, index=True)
    actor: Mapped[str | None] = mapped_column(String(64))  # None: the server itself (a job)
    action: Mapped[str] = mapped_column(String(48), index=True)
    subject_kind: Mapped[str] = mapped_column(String(32))
    subject: Mapped[str] = mapped_column(String(128), index=True)
    summary: Mapped[str] = mapped_column(String(500))
    detail: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
