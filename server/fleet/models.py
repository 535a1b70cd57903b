"""Sensor types and units."""

from __future__ import annotations

import enum
from datetime import date, datetime
from typing import TYPE_CHECKING, Any

from sqlalchemy import JSON, Enum, Float, ForeignKey, Index, Integer, String, Text
from sqlalchemy.orm import Mapped, mapped_column, relationship

from server.db import Base, UTCDateTime, utcnow

if TYPE_CHECKING:
    from server.calibrations.models import CalibrationSession


class UnitStatus(enum.StrEnum):
    in_stock = "in_stock"
    installed = "installed"
    quarantined = "quarantined"
    retired = "retired"


class NoiseIn(enum.StrEnum):
    """Where a type's calibration scatter is (see shared.fitting): in the value or the reading."""

    value = "value"
    reading = "reading"


class SensorType(Base):
    __tablename__ = "sensor_type"

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(64), unique=True)
    quantity: Mapped[str] = mapped_column(String(64))
    value_unit: Mapped[str] = mapped_column(String(16))
    reading_unit: Mapped[str] = mapped_column(String(16))
    reading_min: Mapped[float] = mapped_column(Float)
    reading_max: Mapped[float] = mapped_column(Float)
    families: Mapped[list[str]] = mapped_column(JSON)
    family_options: Mapped[dict[str, dict[str, Any]]] = mapped_column(JSON, default=dict)
    tolerance_abs: Mapped[float | None] = mapped_column(Float)
    tolerance_rel: Mapped[float | None] = mapped_column(Float)  # percent of value
    drift_limit_abs: Mapped[float | None] = mapped_column(Float)
    interval_days: Mapped[int] = mapped_column(Integer, default=365)
    tur: Mapped[float] = mapped_column(Float, default=4.0)
    noise_in: Mapped[NoiseIn] = mapped_column(
        Enum(NoiseIn, native_enum=False, length=16, validate_strings=True),
        default=NoiseIn.value,
        server_default=NoiseIn.value.value,
    )
    reading_resolution: Mapped[float | None] = mapped_column(Float)  # one step, reading units
    # the decision rule (shared.acceptance, ILAC-G8:2019): "simple" (with the TUR) or "guarded"
    # (acceptance limit = allowed - guard_multiple x U)
    decision_rule: Mapped[str] = mapped_column(
        String(16), default="simple", server_default="simple"
    )
    guard_multiple: Mapped[float] = mapped_column(Float, default=1.0, server_default="1.0")
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    # the fleet comparison (server.flags.fleet): the probe readings it last used, and when it
    # last finished; a queued or running fleet job means it is catching up
    fleet_probes: Mapped[list[float] | None] = mapped_column(JSON)
    fleet_checked_at: Mapped[datetime | None] = mapped_column(UTCDateTime)

    units: Mapped[list[Unit]] = relationship(back_populates="sensor_type")


class Unit(Base):
    __tablename__ = "unit"
    # a type's units in serial order without a sort (type pages, the fleet list filtered by
    # type); it serves lookups by sensor_type_id alone too
    __table_args__ = (Index("ix_unit_type_serial", "sensor_type_id", "serial"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    serial: Mapped[str] = mapped_column(String(64), unique=True)
    sensor_type_id: Mapped[int] = mapped_column(ForeignKey("sensor_type.id"))
    status: Mapped[UnitStatus] = mapped_column(
        Enum(UnitStatus, native_enum=False, length=16, validate_strings=True),
        default=UnitStatus.in_stock,
    )
    installed_in: Mapped[str | None] = mapped_column(String(128))
    received_on: Mapped[date | None]
    notes: Mapped[str | None] = mapped_column(Text)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    # the due date and its basis as last computed (server.fleet.service.unit_due), stored at flag
    # recomputation so the fleet list need not compare calibrations; None until then
    due_on: Mapped[date | None]
    due_basis: Mapped[str | None] = mapped_column(Text)
    # what the fleet comparison needs of the current calibration, kept with each change of it
    # (server.flags.fleet.keep_curve) so that comparing 10,000 units reloads no fit: the session
    # and fit, the fit's valid range, and {"probes": [...], "values": [...]} (the curve at the
    # type's probe readings) when the range covers them
    fleet_session_id: Mapped[int | None] = mapped_column(Integer)
    fleet_fit_id: Mapped[int | None] = mapped_column(Integer)
    fleet_lo: Mapped[float | None] = mapped_column(Float)
    fleet_hi: Mapped[float | None] = mapped_column(Float)
    fleet_values: Mapped[dict[str, Any] | None] = mapped_column(JSON)

    sensor_type: Mapped[SensorType] = relationship(back_populates="units")
    sessions: Mapped[list[CalibrationSession]] = relationship(
        back_populates="unit", order_by="CalibrationSession.performed_at"
    )
