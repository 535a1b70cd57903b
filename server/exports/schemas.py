"""Shapes of the exports in the OpenAPI schema: the JSON conversion table, and errors."""

from __future__ import annotations

from pydantic import BaseModel, Field


class TableRowRead(BaseModel):
    reading: float = Field(description="reading units")
    value: float | None = Field(description="value units; null outside the valid range")
    expanded_uncertainty: float | None = Field(
        description="U = k u, value units; null outside the valid range"
    )
    in_range: bool


class CoverageRead(BaseModel):
    k: float
    level: float | None = Field(description="null for the k = 2 convention")


class ConversionTableRead(BaseModel):
    """The conversion table of a unit's current calibration (shared.exports.table_to_json)."""

    family: str
    engine_version: str
    reading_unit: str
    value_unit: str
    valid_range: tuple[float, float]
    coverage: CoverageRead
    rows: list[TableRowRead]


class ProblemRead(BaseModel):
    """An error: what is wrong, and the input at fault when there is one."""

    detail: str
    field: str | None


ERRORS: dict[int | str, dict[str, object]] = {
    401: {"model": ProblemRead, "description": "no or a wrong API token"},
    404: {"model": ProblemRead, "description": "unknown unit, or no current calibration"},
    422: {"model": ProblemRead, "description": "an input that cannot be used, with the reason"},
}
