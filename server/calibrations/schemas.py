"""Request and response shapes for calibration sessions, points, fits and decisions."""

from __future__ import annotations

from datetime import date, datetime
from typing import Annotated, Any

from pydantic import AwareDatetime, BaseModel, ConfigDict, Field, StringConstraints

from server.calibrations.models import SessionKind

Text64 = Annotated[str, StringConstraints(strip_whitespace=True, min_length=1, max_length=64)]
Text128 = Annotated[str, StringConstraints(strip_whitespace=True, min_length=1, max_length=128)]


class PointIn(BaseModel):
    model_config = ConfigDict(extra="forbid")

    reference_value: float = Field(allow_inf_nan=False, description="reference, value units")
    reading: float = Field(allow_inf_nan=False, description="what the unit read")
    excluded: bool = False
    exclude_reason: str | None = Field(None, max_length=500)


class CalibrationCreate(BaseModel):
    """One calibration session: who, when, against what, and the points."""

    model_config = ConfigDict(extra="forbid")

    performed_at: AwareDatetime
    operator: Text64
    reference: Text128 = Field(description="the reference instrument or jig used")
    kind: SessionKind = SessionKind.periodic
    family: str | None = Field(None, description="one of the type's families; default: its first")
    ambient: str | None = Field(None, max_length=128, description="e.g. 22 degC, 45 %RH")
    notes: str | None = Field(None, max_length=2000)
    points: list[PointIn] = Field(min_length=2, max_length=100_000)


class PointRead(BaseModel):
    reference_value: float
    reading: float
    repeat_index: int
    used: bool
    excluded_reason: str | None
    residual: float


class FitRead(BaseModel):
    family: str
    formula: str
    options: dict[str, Any]
    params: dict[str, float]
    stderr: dict[str, float]
    covariance: list[list[float]]
    rse: float
    dof: int
    sigma_source: str
    valid_range: tuple[float, float]
    monotone: bool
    engine_version: str
    fitted_at: datetime


class DecisionRead(BaseModel):
    passed: bool
    rule: str
    reasons: list[str]
    worst_error: float
    worst_error_at: float
    allowed_at_worst: float
    max_expanded_uncertainty: float
    tur_required: float
    tur_achieved: float


class CalibrationRead(BaseModel):
    id: int
    unit: str
    sensor_type: str
    performed_at: datetime
    operator: str
    reference: str
    kind: SessionKind
    ambient: str | None
    notes: str | None
    recorded_by: str | None
    voided: bool
    points: list[PointRead]
    fit: FitRead
    decision: DecisionRead
    flags: list[dict[str, Any]] = Field(default_factory=list)


class CurrentCalibrationRead(BaseModel):
    unit: str
    due_on: date | None
    calibration: CalibrationRead
