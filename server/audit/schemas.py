"""Response shape of the audit log."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from pydantic import BaseModel, ConfigDict, Field


class AuditRead(BaseModel):
    model_config = ConfigDict(from_attributes=True)

    id: int
    at: datetime
    actor: str | None = Field(description="who; null for the server itself (a background job)")
    action: str = Field(description="e.g. calibration.saved, sensor_type.updated")
    subject_kind: str = Field(description="unit, sensor_type, calibration, flag or user")
    subject: str = Field(description="the serial, type name or id")
    summary: str
    detail: dict[str, Any]
