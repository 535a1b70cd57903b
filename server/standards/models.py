"""Reference standards of the lab and the checks (recalibrations) of each."""

from __future__ import annotations

from datetime import date, datetime

from sqlalchemy import Boolean, Float, ForeignKey, String, Text
from sqlalchemy.orm import Mapped, mapped_column, relationship

from server.db import Base, UTCDateTime, utcnow


class ReferenceStandard(Base):
    """A reference the lab calibrates against (a rail with stops, a thermometer, a mass set):
    its certificate, its expanded uncertainty U with coverage factor k (value units) and when it
    is due for its own recalibration."""

    __tablename__ = "reference_standard"

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(64), unique=True)
    description: Mapped[str | None] = mapped_column(Text)
    quantity: Mapped[str] = mapped_column(String(64))
    value_unit: Mapped[str] = mapped_column(String(16))
    expanded_u: Mapped[float] = mapped_column(Float)
    k: Mapped[float] = mapped_column(Float, default=2.0)
    certificate: Mapped[str] = mapped_column(String(128))
    calibrated_on: Mapped[date]
    due_on: Mapped[date] = mapped_column(index=True)
    created_by: Mapped[str | None] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)

    checks: Mapped[list[StandardCheck]] = relationship(
        back_populates="standard", order_by="StandardCheck.checked_on, StandardCheck.id"
    )


class StandardCheck(Base):
    """One check of a standard (its own recalibration): in tolerance or not, with a note."""

    __tablename__ = "standard_check"

    id: Mapped[int] = mapped_column(primary_key=True)
    standard_id: Mapped[int] = mapped_column(ForeignKey("reference_standard.id"), index=True)
    checked_on: Mapped[date]
    in_tolerance: Mapped[bool] = mapped_column(Boolean)
    note: Mapped[str | None] = mapped_column(Text)
    recorded_by: Mapped[str | None] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)

    standard: Mapped[ReferenceStandard] = relationship(back_populates="checks")
