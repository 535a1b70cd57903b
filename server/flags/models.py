"""Installation events of a unit, and the flags raised on units (recomputed, acknowledged)."""

from __future__ import annotations

import enum
from datetime import datetime
from typing import TYPE_CHECKING, Any

from sqlalchemy import JSON, Boolean, Enum, ForeignKey, String, Text
from sqlalchemy.orm import Mapped, mapped_column, relationship

from server.db import Base, UTCDateTime, utcnow

if TYPE_CHECKING:
    from server.fleet.models import Unit


class EventKind(enum.StrEnum):
    installed = "installed"
    removed = "removed"


class FlagKind(enum.StrEnum):
    drift = "drift"
    out_of_tolerance_in_service = "out_of_tolerance_in_service"
    fleet_outlier = "fleet_outlier"
    failed_acceptance = "failed_acceptance"
    overdue = "overdue"
    reference_suspect = "reference_suspect"


class Severity(enum.StrEnum):
    warning = "warning"
    action = "action"


class InstallationEvent(Base):
    """A unit put into (``installed``, at ``location``) or taken out of an instrument."""

    __tablename__ = "installation_event"

    id: Mapped[int] = mapped_column(primary_key=True)
    unit_id: Mapped[int] = mapped_column(ForeignKey("unit.id"), index=True)
    kind: Mapped[EventKind] = mapped_column(
        Enum(EventKind, native_enum=False, length=16, validate_strings=True)
    )
    location: Mapped[str | None] = mapped_column(String(128))
    at: Mapped[datetime] = mapped_column(UTCDateTime)
    recorded_by: Mapped[str | None] = mapped_column(String(64))
    note: Mapped[str | None] = mapped_column(Text)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)

    unit: Mapped[Unit] = relationship()


class Flag(Base):
    """A condition found on a unit. ``key`` names the condition (kind + what it is about), so a
    recomputation that finds it again keeps this row and its acknowledgement; ``open`` is whether
    the condition still holds, separate from whether someone acknowledged it."""

    __tablename__ = "flag"

    id: Mapped[int] = mapped_column(primary_key=True)
    unit_id: Mapped[int] = mapped_column(ForeignKey("unit.id"), index=True)
    kind: Mapped[FlagKind] = mapped_column(
        Enum(FlagKind, native_enum=False, length=32, validate_strings=True), index=True
    )
    severity: Mapped[Severity] = mapped_column(
        Enum(Severity, native_enum=False, length=16, validate_strings=True)
    )
    key: Mapped[str] = mapped_column(String(128), unique=True)
    message: Mapped[str] = mapped_column(Text)
    evidence: Mapped[dict[str, Any]] = mapped_column(JSON)
    raised_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    open: Mapped[bool] = mapped_column(Boolean, default=True, index=True)
    closed_at: Mapped[datetime | None] = mapped_column(UTCDateTime)
    acknowledged_by: Mapped[str | None] = mapped_column(String(64))
    acknowledged_at: Mapped[datetime | None] = mapped_column(UTCDateTime)
    acknowledged_note: Mapped[str | None] = mapped_column(Text)

    unit: Mapped[Unit] = relationship()
