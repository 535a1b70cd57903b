"""JSON API for sensor types and units (/api/v1)."""

from __future__ import annotations

from enum import StrEnum
from typing import Annotated

from fastapi import APIRouter, Depends, Query, Request
from pydantic import BaseModel, Field

from server.accounts.deps import ApiAdmin, ApiTechnician, ApiViewer
from server.calibrations import refits
from server.calibrations.schemas import JobRead
from server.db import RowId, SessionDep
from server.flags.models import FlagKind
from server.flags.service import recompute_flags
from server.fleet import service
from server.fleet.models import UnitStatus
from server.fleet.schemas import (
    SensorTypeCreate,
    SensorTypeRead,
    SensorTypeUpdate,
    UnitCreate,
    UnitRead,
    UnitUpdate,
)
from server.jobs import service as jobs
from server.pagination import Page, PageParams, page_params

router = APIRouter(prefix="/api/v1", tags=["fleet"])


class FlagFilter(StrEnum):
    """A flag kind, or any open flag."""

    any = "any"
    drift = FlagKind.drift.value
    out_of_tolerance_in_service = FlagKind.out_of_tolerance_in_service.value
    fleet_outlier = FlagKind.fleet_outlier.value
    failed_acceptance = FlagKind.failed_acceptance.value
    overdue = FlagKind.overdue.value
    reference_suspect = FlagKind.reference_suspect.value


class SensorTypeChanged(BaseModel):
    """The type after an edit, what changed, and the refit job the edit started (if any)."""

    sensor_type: SensorTypeRead
    changed: list[str] = Field(description="the fields whose value changed")
    flags_recomputed: bool = Field(description="flags and due dates were recomputed at once")
    job: JobRead | None = Field(description="the refit started; poll GET /api/v1/jobs/{id}")


@router.post("/sensor-types", status_code=201)
def create_sensor_type(
    data: SensorTypeCreate, session: SessionDep, user: ApiAdmin
) -> SensorTypeRead:
    """Create a sensor type (admin)."""
    created = service.create_sensor_type(session, data, actor=user.name)
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


@router.patch("/sensor-types/{name}")
def update_sensor_type(
    name: str, data: SensorTypeUpdate, request: Request, session: SessionDep, user: ApiAdmin
) -> SensorTypeChanged:
    """Change how a type is fitted, judged or scheduled (admin). A change to fitting or
    acceptance refits every calibration of the type as a background job."""
    sensor_type = service.get_sensor_type(session, name)
    change = service.update_sensor_type(session, sensor_type, data, actor=user.name)
    job = refits.follow_type_change(session, sensor_type, change, user.name)
    session.commit()
    if job is not None:
        request.app.state.jobs.submit(job.id)
    return SensorTypeChanged(
        sensor_type=SensorTypeRead.model_validate(sensor_type),
        changed=list(change.changed),
        flags_recomputed=job is None and change.needs_recompute,
        job=refits.job_read(job) if job is not None else None,
    )


@router.post("/sensor-types/{name}/refit", status_code=202)
def refit_sensor_type(name: str, request: Request, session: SessionDep, user: ApiAdmin) -> JobRead:
    """Refit every calibration of a type with its current settings and engine (admin); the
    previous fits are kept."""
    sensor_type = service.get_sensor_type(session, name)
    job = refits.start_refit(session, sensor_type, "refit requested", user.name)
    session.commit()
    request.app.state.jobs.submit(job.id)
    return refits.job_read(job)


@router.get("/jobs/{job_id}")
def get_job(job_id: RowId, session: SessionDep, user: ApiViewer) -> JobRead:
    """A background job's state and progress (``done`` of ``total``)."""
    return refits.job_read(jobs.get_job(session, job_id))


@router.post("/units", status_code=201)
def create_unit(data: UnitCreate, session: SessionDep, user: ApiTechnician) -> UnitRead:
    """Register a unit received into stock."""
    unit = service.create_unit(session, data, actor=user.name)
    session.commit()
    return service.get_unit_read(session, unit.serial)


@router.get("/units")
def list_units(
    session: SessionDep,
    user: ApiViewer,
    page: Annotated[PageParams, Depends(page_params)],
    sensor_type: str | None = None,
    status: UnitStatus | None = None,
    q: Annotated[str | None, Query(description="part of a serial")] = None,
    flag: Annotated[
        FlagFilter | None,
        Query(description="units with an open flag of this kind, or 'any'"),
    ] = None,
) -> Page[UnitRead]:
    """Units by serial, filtered by type, status, part of the serial and open flags."""
    rows, total = service.list_units(
        session, page, sensor_type=sensor_type, status=status, q=q, flag=flag
    )
    return Page(
        items=[row.read for row in rows],
        total=total,
        page=page.page,
        per_page=page.per_page,
    )


@router.get("/units/{serial}")
def get_unit(serial: str, session: SessionDep, user: ApiViewer) -> UnitRead:
    """One unit with its calibration summary."""
    return service.get_unit_read(session, serial)


@router.patch("/units/{serial}")
def update_unit(
    serial: str, data: UnitUpdate, session: SessionDep, user: ApiTechnician
) -> UnitRead:
    """Quarantine, retire or return a unit to stock, or change its notes; a status change
    recomputes the flags of its type (a retired unit leaves the fleet statistics)."""
    unit = service.get_unit(session, serial)
    changed = service.update_unit(session, unit, data, actor=user.name)
    if "status" in changed:
        recompute_flags(session, unit.sensor_type, units=[unit])
    session.commit()
    return service.get_unit_read(session, serial)
