"""Calibration sessions (immutable once saved), their points and their fits."""

from __future__ import annotations

import enum
from datetime import datetime
from typing import TYPE_CHECKING, Any

from sqlalchemy import JSON, Boolean, Enum, Float, ForeignKey, Index, Integer, String, Text
from sqlalchemy.orm import Mapped, mapped_column, relationship

import shared
from server.db import Base, UTCDateTime, utcnow

if TYPE_CHECKING:
    from server.fleet.models import Unit


class SessionKind(enum.StrEnum):
    incoming = "incoming"
    as_found = "as_found"
    as_left = "as_left"
    periodic = "periodic"


class CalibrationSession(Base):
    __tablename__ = "calibration_session"
    # a unit's sessions newest first without a sort (its latest valid one, for every row of a
    # unit list); it serves lookups by unit_id alone too
    __table_args__ = (
        Index("ix_calibration_session_unit_performed", "unit_id", "performed_at", "id"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    unit_id: Mapped[int] = mapped_column(ForeignKey("unit.id"))
    performed_at: Mapped[datetime] = mapped_column(UTCDateTime)
    operator: Mapped[str] = mapped_column(String(64))
    reference: Mapped[str] = mapped_column(String(128))
    # type B inputs of the session, value units: the reference standard's expanded uncertainty
    # U with its coverage factor k, and one stated extra standard uncertainty with its label
    reference_expanded_u: Mapped[float | None] = mapped_column(Float)
    reference_k: Mapped[float] = mapped_column(Float, default=2.0, server_default="2")
    # the register's standard the session named (its U and k copied above, its name in
    # ``reference``); None for a free-text reference. ``reference_standard_problem``: why the
    # standard could not vouch for the session when it was performed (overdue, or found out of
    # tolerance by its latest check), which makes the session fail, refits included
    reference_standard_id: Mapped[int | None] = mapped_column(
        ForeignKey("reference_standard.id"), index=True
    )
    reference_standard_problem: Mapped[str | None] = mapped_column(Text)
    extra_u: Mapped[float | None] = mapped_column(Float)
    extra_label: Mapped[str | None] = mapped_column(String(128))
    kind: Mapped[SessionKind] = mapped_column(
        Enum(SessionKind, native_enum=False, length=16, validate_strings=True)
    )
    ambient: Mapped[str | None] = mapped_column(String(128))
    notes: Mapped[str | None] = mapped_column(Text)
    recorded_by: Mapped[str | None] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    voided_at: Mapped[datetime | None] = mapped_column(UTCDateTime)
    void_reason: Mapped[str | None] = mapped_column(Text)
    voided_by: Mapped[str | None] = mapped_column(String(64))

    unit: Mapped[Unit] = relationship(back_populates="sessions")
    points: Mapped[list[Point]] = relationship(
        back_populates="session", order_by="Point.seq", cascade="all, delete-orphan"
    )
    fits: Mapped[list[FitRecord]] = relationship(
        back_populates="session", order_by="FitRecord.id", cascade="all, delete-orphan"
    )

    @property
    def current_fit(self) -> FitRecord | None:
        return next((f for f in self.fits if f.is_current), None)


class Point(Base):
    __tablename__ = "point"

    id: Mapped[int] = mapped_column(primary_key=True)
    session_id: Mapped[int] = mapped_column(ForeignKey("calibration_session.id"), index=True)
    seq: Mapped[int] = mapped_column(Integer)
    reference_value: Mapped[float] = mapped_column(Float)
    reading: Mapped[float] = mapped_column(Float)
    repeat_index: Mapped[int] = mapped_column(Integer, default=0)
    excluded: Mapped[bool] = mapped_column(Boolean, default=False)
    exclude_reason: Mapped[str | None] = mapped_column(Text)
    # when the point is the mean of many samples (``sensorledger capture``): their SD (reading
    # units), how many were kept and how many rejected as spikes; None for a single reading
    sample_sd: Mapped[float | None] = mapped_column(Float)
    sample_n: Mapped[int | None] = mapped_column(Integer)
    sample_rejected: Mapped[int | None] = mapped_column(Integer)

    session: Mapped[CalibrationSession] = relationship(back_populates="points")


class FitRecord(Base):
    """One fit of a session; refits add rows and move ``is_current``, never overwrite."""

    __tablename__ = "fit"

    id: Mapped[int] = mapped_column(primary_key=True)
    session_id: Mapped[int] = mapped_column(ForeignKey("calibration_session.id"), index=True)
    family: Mapped[str] = mapped_column(String(32))
    options: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    result: Mapped[dict[str, Any]] = mapped_column(JSON)  # shared.Fit.to_dict()
    decision: Mapped[dict[str, Any]] = mapped_column(JSON)  # shared.Decision.to_dict()
    # shared.ranking.Ranking.to_dict() of the type's families on the same points, plus which one
    # was kept and why ("chosen", "chosen_because"); None for fits stored before revision 0002
    ranking: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    # {"suspects": [{index, t, reason}], "lack_of_fit": {...} | None}; None before revision 0002
    diagnostics: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    # shared.noise_check.NoiseCheck.to_dict(): which noise model the points support; None for
    # fits stored before revision 0009
    noise_check: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    passed: Mapped[bool] = mapped_column(Boolean)
    is_current: Mapped[bool] = mapped_column(Boolean, default=True)
    engine_version: Mapped[str] = mapped_column(String(32))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)

    session: Mapped[CalibrationSession] = relationship(back_populates="fits")


def valid_sessions(sessions: list[CalibrationSession]) -> list[CalibrationSession]:
    """Sessions that count: not voided, with a current fit; oldest first."""
    valid = [s for s in sessions if s.voided_at is None and s.current_fit is not None]
    return sorted(valid, key=lambda s: (s.performed_at, s.id))


def latest_session(sessions: list[CalibrationSession]) -> CalibrationSession | None:
    """The newest session that is not voided and has a current fit."""
    valid = valid_sessions(sessions)
    return valid[-1] if valid else None


def stored_fit(record: CalibrationSession) -> shared.Fit:
    """The session's current fit, rebuilt from what was stored (nothing is refitted)."""
    current = record.current_fit
    if current is None:
        raise LookupError(f"calibration {record.id} has no current fit")
    return shared.Fit.from_dict(current.result)
