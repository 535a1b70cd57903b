"""JSON API for flags and installation events (/api/v1)."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Query

from server.accounts.deps import ApiTechnician, ApiViewer
from server.db import RowId, SessionDep
from server.flags import service
from server.flags.models import FlagKind
from server.flags.schemas import Acknowledge, EventCreate, EventRead, FlagRead
from server.fleet.service import get_unit
from server.pagination import Page, PageParams, page_params

router = APIRouter(prefix="/api/v1", tags=["flags"])


@router.get("/flags")
def list_flags(
    session: SessionDep,
    user: ApiViewer,
    page: Annotated[PageParams, Depends(page_params)],
    kind: FlagKind | None = None,
    sensor_type: Annotated[str | None, Query(description="a sensor type's name")] = None,
    open: Annotated[
        bool | None,
        Query(description="true: the condition still holds (acknowledged or not); false: closed"),
    ] = None,
    acknowledged: Annotated[bool | None, Query(description="someone acknowledged it")] = None,
) -> Page[FlagRead]:
    """Flags, open first then newest, filtered by kind, sensor type, open and acknowledged."""
    flags, total = service.list_flags(
        session, page, kind=kind, sensor_type=sensor_type, open_=open, acknowledged=acknowledged
    )
    return Page(
        items=[service.flag_read(f) for f in flags],
        total=total,
        page=page.page,
        per_page=page.per_page,
    )


@router.post("/flags/{flag_id}/acknowledge")
def acknowledge_flag(
    flag_id: RowId, data: Acknowledge, session: SessionDep, user: ApiTechnician
) -> FlagRead:
    """Acknowledge a flag with a note (technician); who and when are kept. It stays open while
    its condition holds."""
    flag = service.acknowledge(session, service.get_flag(session, flag_id), data.note, user.name)
    session.commit()
    return service.flag_read(flag)


@router.post("/units/{serial}/events", status_code=201)
def create_event(
    serial: str, data: EventCreate, session: SessionDep, user: ApiTechnician
) -> EventRead:
    """Record a unit installed at a location or removed (technician); flags are recomputed."""
    unit = get_unit(session, serial)
    event = service.create_event(session, unit, data, recorded_by=user.name)
    service.recompute_flags(session, unit.sensor_type, units=[unit])
    session.commit()
    return service.event_read(event)


@router.get("/units/{serial}/events")
def list_events(
    serial: str,
    session: SessionDep,
    user: ApiViewer,
    page: Annotated[PageParams, Depends(page_params)],
) -> Page[EventRead]:
    """The unit's installation events, oldest first."""
    events = service.list_events(session, get_unit(session, serial))
    return Page(
        items=[service.event_read(e) for e in events[page.offset :][: page.per_page]],
        total=len(events),
        page=page.page,
        per_page=page.per_page,
    )
