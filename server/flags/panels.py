"""What the unit page shows of flags and installations (kept here so the page stays small)."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from sqlalchemy.orm import object_session

from server.flags import service
from server.flags.models import EventKind
from server.fleet.models import Unit

DATETIME_LOCAL = "%Y-%m-%dT%H:%M"


@dataclass(frozen=True, slots=True)
class EventForm:
    """The installation form's typed text, kept on a re-render."""

    kind: str
    location: str = ""
    at: str = ""
    note: str = ""
    error: str | None = None
    error_field: str | None = None


def blank_event_form(unit: Unit) -> EventForm:
    """Remove when installed, else install; now (UTC)."""
    kind = EventKind.removed if unit.status.value == "installed" else EventKind.installed
    return EventForm(kind=kind.value, at=datetime.now(UTC).strftime(DATETIME_LOCAL))


def unit_panels(unit: Unit, form: EventForm | None = None) -> dict[str, Any]:
    """The unit's flags and installation events, and the installation form."""
    session = object_session(unit)
    events = service.list_events(session, unit) if session is not None else []
    return {
        "unit_flags": service.flags_of(unit),
        "events": list(reversed(events)),
        "event_form": form or blank_event_form(unit),
        "flag_titles": service.TITLES,
    }
