"""Request and response shapes for sensor types and units."""

from __future__ import annotations

from datetime import date, datetime
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, StringConstraints, model_validator

from server.fleet.models import NoiseIn, UnitStatus

Name = Annotated[str, StringConstraints(strip_whitespace=True, min_length=1, max_length=64)]
ShortText = Annotated[str, StringConstraints(strip_whitespace=True, min_length=1, max_length=16)]


class SensorTypeCreate(BaseModel):
    """A kind of sensor: what it measures, its reading span, how it is fitted and judged."""

    model_config = ConfigDict(extra="forbid")

    name: Name
    quantity: Name = Field(description="physical quantity, e.g. distance")
    value_unit: ShortText = Field(description="unit of the value, e.g. mm")
    reading_unit: ShortText = Field(description="unit of the reading, e.g. counts")
    reading_min: float = Field(allow_inf_nan=False)
    reading_max: float = Field(allow_inf_nan=False)
    families: list[str] = Field(
        min_length=1,
        description="model families to fit, first is the default (see the family catalog)",
    )
    family_options: dict[str, dict[str, Any]] = Field(
        default_factory=dict, description="options per family, e.g. {'polynomial': {'degree': 2}}"
    )
    tolerance_abs: float | None = Field(
        None, ge=0, allow_inf_nan=False, description="absolute tolerance, value units"
    )
    tolerance_rel: float | None = Field(
        None, ge=0, allow_inf_nan=False, description="relative tolerance, percent of value"
    )
    drift_limit_abs: float | None = Field(
        None, gt=0, allow_inf_nan=False, description="largest allowed drift, value units"
    )
    interval_days: int = Field(365, ge=1, le=3650, description="recalibration interval")
    tur: float = Field(4.0, gt=0, description="required test-uncertainty ratio")
    noise_in: NoiseIn = Field(
        NoiseIn.value,
        description="where the scatter of the points is, used for every fit of this type: "
        "'value' (the reference or the physics) or 'reading' (e.g. ADC noise of a rangefinder)",
    )
    reading_resolution: float | None = Field(
        None,
        gt=0,
        allow_inf_nan=False,
        description="one reading step, reading units (e.g. 1 count); a type B input",
    )
    decision_rule: Literal["simple", "guarded"] = Field(
        "simple",
        description="ILAC-G8:2019 decision rule: 'simple' acceptance (within the tolerance, with "
        "the required TUR) or 'guarded' acceptance (within the tolerance less a guard band "
        "w = guard_multiple x U)",
    )
    guard_multiple: float = Field(
        1.0, ge=0, le=10, allow_inf_nan=False, description="r of the guard band w = r U (guarded)"
    )

    @model_validator(mode="after")
    def _consistent(self) -> SensorTypeCreate:
        if self.reading_max <= self.reading_min:
            raise ValueError("reading_max must be greater than reading_min")
        if not (self.tolerance_abs or self.tolerance_rel):
            raise ValueError("give tolerance_abs and/or tolerance_rel")
        return self


class SensorTypeUpdate(BaseModel):
    """A change to a sensor type: only the fields given change (null clears an optional one).

    Its name, quantity, units and reading span stay: records already made in them would change
    meaning (create another type instead). A change to how the type is fitted or judged
    (families, family_options, noise_in, tolerances, tur, reading_resolution, decision_rule,
    guard_multiple) refits every
    calibration of the type as a background job; a change to the drift limit or the interval
    recomputes the type's flags and due dates at once.
    """

    model_config = ConfigDict(extra="forbid")

    families: list[str] | None = Field(None, min_length=1)
    family_options: dict[str, dict[str, Any]] | None = None
    tolerance_abs: float | None = Field(None, ge=0, allow_inf_nan=False)
    tolerance_rel: float | None = Field(None, ge=0, allow_inf_nan=False)
    drift_limit_abs: float | None = Field(None, gt=0, allow_inf_nan=False)
    interval_days: int | None = Field(None, ge=1, le=3650)
    tur: float | None = Field(None, gt=0)
    noise_in: NoiseIn | None = None
    reading_resolution: float | None = Field(None, gt=0, allow_inf_nan=False)
    decision_rule: Literal["simple", "guarded"] | None = None
    guard_multiple: float | None = Field(None, ge=0, le=10, allow_inf_nan=False)

    @model_validator(mode="after")
    def _required_stay_set(self) -> SensorTypeUpdate:
        required = ("families", "family_options", "interval_days", "tur", "noise_in")
        for name in (*required, "decision_rule", "guard_multiple"):
            if name in self.model_fields_set and getattr(self, name) is None:
                raise ValueError(f"{name} cannot be cleared")
        return self


class SensorTypeRead(BaseModel):
    model_config = ConfigDict(from_attributes=True)

    id: int
    name: str
    quantity: str
    value_unit: str
    reading_unit: str
    reading_min: float
    reading_max: float
    families: list[str]
    family_options: dict[str, dict[str, Any]]
    tolerance_abs: float | None
    tolerance_rel: float | None
    drift_limit_abs: float | None
    interval_days: int
    tur: float
    noise_in: NoiseIn
    reading_resolution: float | None
    decision_rule: str
    guard_multiple: float
    created_at: datetime


class UnitCreate(BaseModel):
    """A unit received: its serial and its type (by name)."""

    model_config = ConfigDict(extra="forbid")

    serial: Name
    sensor_type: Name
    received_on: date | None = None
    notes: str | None = Field(None, max_length=2000)


class UnitUpdate(BaseModel):
    """A unit taken out of use (quarantined, retired) or back into stock, or its notes.

    ``installed`` is not set here: installation events record where and when."""

    model_config = ConfigDict(extra="forbid")

    status: UnitStatus | None = None
    notes: str | None = Field(None, max_length=2000)

    @model_validator(mode="after")
    def _not_installed(self) -> UnitUpdate:
        if self.status is UnitStatus.installed:
            raise ValueError(
                "a unit is installed by recording an installation event "
                "(POST /api/v1/units/{serial}/events), which keeps where and when"
            )
        if "status" in self.model_fields_set and self.status is None:
            raise ValueError("status cannot be cleared")
        return self


class UnitRead(BaseModel):
    serial: str
    sensor_type: str
    status: UnitStatus
    installed_in: str | None
    received_on: date | None
    notes: str | None
    calibration_count: int
    last_calibrated_at: datetime | None
    last_passed: bool | None
    due_on: date | None
    due_basis: str | None = None
