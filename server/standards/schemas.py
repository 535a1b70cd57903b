"""Request and response shapes for reference standards, their checks and the units they vouch
for."""

from __future__ import annotations

from datetime import date, datetime
from typing import Annotated, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    StringConstraints,
    ValidationInfo,
    field_validator,
)

Name = Annotated[str, StringConstraints(strip_whitespace=True, min_length=1, max_length=64)]
ShortText = Annotated[str, StringConstraints(strip_whitespace=True, min_length=1, max_length=16)]
Text128 = Annotated[str, StringConstraints(strip_whitespace=True, min_length=1, max_length=128)]

Standing = Literal["ok", "due_soon", "overdue", "suspect"]


def _no_slash(name: str) -> str:
    if "/" in name:
        raise ValueError("a standard's name cannot contain '/' (it is part of its address)")
    return name


class StandardCreate(BaseModel):
    """A reference standard of the lab: what it realises, its certificate, its expanded
    uncertainty U (value units) with coverage factor k, and when it is due for recalibration."""

    model_config = ConfigDict(extra="forbid")

    name: Name = Field(description="unique, e.g. the label on the standard (scanned or typed)")
    description: str | None = Field(None, max_length=2000)
    quantity: Name = Field(description="physical quantity, e.g. distance")
    value_unit: ShortText = Field(description="unit of U and of the values it realises, e.g. mm")
    expanded_u: float = Field(
        gt=0, allow_inf_nan=False, description="expanded uncertainty U, value units"
    )
    k: float = Field(2.0, gt=0, le=10, allow_inf_nan=False, description="coverage factor of U")
    certificate: Text128 = Field(description="the certificate's number or reference")
    calibrated_on: date = Field(description="date of the certificate's calibration")
    due_on: date = Field(description="date the standard is due for its next calibration")

    _name_has_no_slash = field_validator("name")(_no_slash)

    @field_validator("due_on")
    @classmethod
    def _due_after_calibrated(cls, due_on: date, info: ValidationInfo) -> date:
        calibrated_on = info.data.get("calibrated_on")
        if calibrated_on is not None and due_on <= calibrated_on:
            raise ValueError(f"must be later than calibrated_on ({calibrated_on.isoformat()})")
        return due_on


class CheckCreate(BaseModel):
    """One check (recalibration) of the standard itself."""

    model_config = ConfigDict(extra="forbid")

    checked_on: date
    in_tolerance: bool = Field(
        description="false: the standard was found out of tolerance; every unit whose current "
        "calibration used it since its last in-tolerance check gets a reference_suspect flag"
    )
    note: str | None = Field(None, max_length=2000)
    due_on: date | None = Field(
        None,
        description="the standard's new due date, when the check renews it (in tolerance only)",
    )


class CheckRead(BaseModel):
    id: int
    checked_on: date
    in_tolerance: bool
    note: str | None
    recorded_by: str | None
    created_at: datetime


class StandardRead(BaseModel):
    """A standard as lists show it. ``standing``: ``suspect`` (its latest check found it out of
    tolerance), ``overdue`` (past its due date), ``due_soon`` (due within 30 days) or ``ok``."""

    name: str
    description: str | None
    quantity: str
    value_unit: str
    expanded_u: float
    k: float
    certificate: str
    calibrated_on: date
    due_on: date
    standing: Standing
    last_check_on: date | None
    last_check_in_tolerance: bool | None
    created_at: datetime


class DependentRead(BaseModel):
    """A unit whose current calibration was performed against the standard."""

    serial: str
    sensor_type: str
    status: str
    installed_in: str | None
    calibration_id: int
    calibrated_at: datetime
    passed: bool | None
    since_last_good_check: bool = Field(
        description="performed after the standard's last in-tolerance check (or its "
        "certificate, when it has none): at risk if the standard is found out of tolerance"
    )


class StandardDetailRead(StandardRead):
    """A standard with its checks (oldest first) and the units whose current calibration used
    it (by serial)."""

    checks: list[CheckRead]
    units: list[DependentRead]


class CheckResultRead(BaseModel):
    """A check recorded, the standard after it, and the units it flagged (serials)."""

    check: CheckRead
    standard: StandardRead
    flagged: list[str] = Field(
        description="units that got a reference_suspect flag (empty for an in-tolerance check)"
    )
