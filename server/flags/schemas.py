"""Request and response shapes for flags and installation events."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from pydantic import AwareDatetime, BaseModel, ConfigDict, Field

from server.flags.models import EventKind, FlagKind, Severity


class FlagRead(BaseModel):
    """A flag on a unit. ``open``: its condition still holds (acknowledging does not close it)."""

    id: int
    unit: str = Field(description="the unit's serial")
    kind: FlagKind
    severity: Severity
    message: str = Field(description="one line, with units")
    detail: str = Field(description="the same line as message (the API sketch's name)")
    evidence: dict[str, Any] = Field(description="the numbers behind the flag, value units")
    raised_at: datetime
    open: bool
    closed_at: datetime | None
    acknowledged_by: str | None
    acknowledged_at: datetime | None
    note: str | None = Field(description="the acknowledgement's note")


class Acknowledge(BaseModel):
    """What was done or decided about a flag."""

    model_config = ConfigDict(extra="forbid")

    note: str = Field(min_length=1, max_length=2000)


class EventCreate(BaseModel):
    """A unit installed at a location, or removed from where it was."""

    model_config = ConfigDict(extra="forbid")

    kind: EventKind
    location: str | None = Field(
        None, max_length=128, description="where it went in; needed when installed"
    )
    at: AwareDatetime = Field(description="when, with a time zone")
    note: str | None = Field(None, max_length=2000)


class EventRead(BaseModel):
    id: int
    unit: str
    kind: EventKind
    location: str | None
    at: datetime
    recorded_by: str | None
    note: str | None
