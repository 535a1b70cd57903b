"""A background job is a row: what to do, its state, who claimed it and when it last showed life."""

from __future__ import annotations

import enum
from datetime import datetime
from typing import TYPE_CHECKING, Any

from sqlalchemy import JSON, Enum, ForeignKey, Integer, String, Text
from sqlalchemy.orm import Mapped, mapped_column, relationship

from server.db import Base, UTCDateTime, utcnow

if TYPE_CHECKING:
    from server.fleet.models import SensorType


class JobKind(enum.StrEnum):
    refit = "refit"  # fit every calibration of a type again (server.calibrations.refits)
    fleet = "fleet"  # compare the units of a type with each other (server.flags.fleet)
    overdue_sweep = "overdue_sweep"  # raise the overdue flags time alone brought


class JobState(enum.StrEnum):
    queued = "queued"
    running = "running"
    done = "done"
    failed = "failed"


class Job(Base):
    """One job. Any server process may claim a queued job (``server.jobs.service.claim``); the
    claimer writes ``heartbeat_at`` while it works, and a running job whose heartbeat is older
    than the stale limit is taken back into the queue (or failed after ``MAX_ATTEMPTS``).

    ``coalesce_key`` is set while a job is queued for work that a second request would only
    repeat (``fleet:<type id>``, ``overdue_sweep``): a unique column, so there is at most one such
    queued job, and requests made while it waits are folded into it. It is cleared on claim.

    Refit jobs compute first (``done`` of ``total`` sessions) and write in one transaction at
    the end, so a job that fails or is interrupted changes nothing; ``problems`` lists sessions
    that could not be refitted (their fit is kept).
    """

    __tablename__ = "job"

    id: Mapped[int] = mapped_column(primary_key=True)
    kind: Mapped[JobKind] = mapped_column(
        Enum(JobKind, native_enum=False, length=16, validate_strings=True)
    )
    sensor_type_id: Mapped[int | None] = mapped_column(ForeignKey("sensor_type.id"), index=True)
    state: Mapped[JobState] = mapped_column(
        Enum(JobState, native_enum=False, length=16, validate_strings=True),
        default=JobState.queued,
        index=True,
    )
    reason: Mapped[str] = mapped_column(Text)
    requested_by: Mapped[str | None] = mapped_column(String(64))
    coalesce_key: Mapped[str | None] = mapped_column(String(64), unique=True)
    claimed_by: Mapped[str | None] = mapped_column(String(128))
    claim_token: Mapped[str | None] = mapped_column(String(32))
    heartbeat_at: Mapped[datetime | None] = mapped_column(UTCDateTime)
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    done: Mapped[int] = mapped_column(Integer, default=0)
    total: Mapped[int] = mapped_column(Integer, default=0)
    refitted: Mapped[int] = mapped_column(Integer, default=0)
    changed_decisions: Mapped[int] = mapped_column(Integer, default=0)
    problems: Mapped[list[dict[str, Any]]] = mapped_column(JSON, default=list)
    message: Mapped[str | None] = mapped_column(Text)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    started_at: Mapped[datetime | None] = mapped_column(UTCDateTime)
    finished_at: Mapped[datetime | None] = mapped_column(UTCDateTime)

    sensor_type: Mapped[SensorType | None] = relationship()
