"""JSON API for the register of reference standards (/api/v1/reference-standards)."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Query

from server.accounts.deps import ApiTechnician, ApiViewer
from server.db import SessionDep
from server.pagination import Page, PageParams, page_params
from server.standards import service, suspect
from server.standards.schemas import (
    CheckCreate,
    CheckResultRead,
    StandardCreate,
    StandardDetailRead,
    StandardRead,
)

router = APIRouter(prefix="/api/v1", tags=["reference standards"])


@router.post("/reference-standards", status_code=201)
def create_standard(
    data: StandardCreate, session: SessionDep, user: ApiTechnician
) -> StandardDetailRead:
    """Register a reference standard (technician): its certificate, U and k, due date."""
    standard = service.create_standard(session, data, user.name)
    session.commit()
    return service.detail_read(session, standard)


@router.get("/reference-standards")
def list_standards(
    session: SessionDep,
    user: ApiViewer,
    page: Annotated[PageParams, Depends(page_params)],
    q: Annotated[str | None, Query(description="part of the name")] = None,
) -> Page[StandardRead]:
    """The register, soonest due first, each with its standing (ok, due_soon, overdue,
    suspect)."""
    standards, total = service.list_standards(session, page, q)
    return Page(
        items=[service.standard_read(s) for s in standards],
        total=total,
        page=page.page,
        per_page=page.per_page,
    )


@router.get("/reference-standards/{name}")
def get_standard(name: str, session: SessionDep, user: ApiViewer) -> StandardDetailRead:
    """One standard (name ignoring case) with its checks and the units whose current
    calibration used it, newest first, marked when performed since its last good check."""
    return service.detail_read(session, service.get_standard(session, name))


@router.post("/reference-standards/{name}/checks", status_code=201)
def create_check(
    name: str, data: CheckCreate, session: SessionDep, user: ApiTechnician
) -> CheckResultRead:
    """Record a check (recalibration) of the standard (technician). Out of tolerance: every
    unit whose current calibration used it since its last in-tolerance check gets an open
    ``reference_suspect`` flag; an in-tolerance check clears none."""
    standard = service.get_standard(session, name, lock="update")
    check, flagged = suspect.check_standard(session, standard, data, user.name)
    session.commit()
    return CheckResultRead(
        check=service.check_read(check),
        standard=service.standard_read(standard),
        flagged=flagged,
    )
