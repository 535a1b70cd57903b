"""JSON API for sensor types and units (/api/v1)."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Query

from server.accounts.deps import ApiAdmin, ApiTechnician, ApiViewer
from server.db import SessionDep
from server.fleet import service
from server.fleet.models import UnitStatus
from server.fleet.schemas import SensorTypeCreate, SensorTypeRead, UnitCreate, UnitRead
from server.pagination import Page, PageParams, page_params

router = APIRouter(prefix="/api/v1", tags=["fleet"])


@router.post("/sensor-types", status_code=201)
def create_sensor_type(
    data: SensorTypeCreate, session: SessionDep, user: ApiAdmin
) -> SensorTypeRead:
    """Create a sensor type (admin)."""
    created = service.create_sensor_type(session, data)
    session.commit()
    return SensorTypeRead.model_validate(created)


@router.get("/sensor-types")
def list_sensor_types(
    session: SessionDep, user: ApiViewer, page: Annotated[PageParams, Depends(page_params)]
) -> Page[SensorTypeRead]:
    """Every sensor type, by name."""
    types = service.list_sensor_types(session)
    items = [SensorTypeRead.model_validate(t) for t in types[page.offset :][: page.per_page]]
    return Page(items=items, total=len(types), page=page.page, per_page=page.per_page)


@router.post("/units", status_code=201)
def create_unit(data: UnitCreate, session: SessionDep, user: ApiTechnician) -> UnitRead:
    """Register a unit received into stock."""
    unit = service.create_unit(session, data)
    session.commit()
    return service.unit_read(service.get_unit(session, unit.serial))


@router.get("/units")
def list_units(
    session: SessionDep,
    user: ApiViewer,
    page: Annotated[PageParams, Depends(page_params)],
    sensor_type: str | None = None,
    status: UnitStatus | None = None,
    q: Annotated[str | None, Query(description="part of a serial")] = None,
) -> Page[UnitRead]:
    """Units by serial, filtered by type, status and part of the serial."""
    units, total = service.list_units(session, page, sensor_type=sensor_type, status=status, q=q)
    return Page(
        items=[service.unit_read(u) for u in units],
        total=total,
        page=page.page,
        per_page=page.per_page,
    )


@router.get("/units/{serial}")
def get_unit(serial: str, session: SessionDep, user: ApiViewer) -> UnitRead:
    """One unit with its calibration summary."""
    return service.unit_read(service.get_unit(session, serial))
