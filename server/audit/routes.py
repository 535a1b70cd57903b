"""JSON API of the audit log (/api/v1/audit)."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Query

from server.accounts.deps import ApiViewer
from server.audit import service
from server.audit.schemas import AuditRead
from server.db import SessionDep
from server.pagination import Page, PageParams, page_params

router = APIRouter(prefix="/api/v1", tags=["audit"])


@router.get("/audit")
def list_audit(
    session: SessionDep,
    user: ApiViewer,
    page: Annotated[PageParams, Depends(page_params)],
    subject_kind: Annotated[
        str | None, Query(description="unit, sensor_type, calibration, flag or user")
    ] = None,
    subject: Annotated[str | None, Query(description="a serial, type name or id")] = None,
    actor: Annotated[str | None, Query(description="who made the change")] = None,
    action: Annotated[str | None, Query(description="e.g. calibration.saved")] = None,
) -> Page[AuditRead]:
    """Who changed what and when, newest first. Entries are only ever added."""
    entries, total = service.list_entries(
        session, page, subject_kind=subject_kind, subject=subject, actor=actor, action=action
    )
    return Page(
        items=[AuditRead.model_validate(e) for e in entries],
        total=total,
        page=page.page,
        per_page=page.per_page,
    )
