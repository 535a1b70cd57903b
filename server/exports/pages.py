"""Browser pages of the exports: the same downloads as the API for a signed-in user, and the
printable calibration report of one session."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Query, Request
from fastapi.responses import HTMLResponse, Response

from server.accounts.deps import PageViewer
from server.db import SessionDep
from server.exports import service
from server.exports.routes import Level, ReadingMax, ReadingMin, Step
from server.fleet.pages import unit_url
from server.fleet.service import get_unit
from server.htmx import render

router = APIRouter(include_in_schema=False)


def _download(found: service.Download) -> Response:
    return Response(found.content, media_type=found.media_type, headers=found.headers)


@router.get("/units/{serial}/table.csv")
def table_csv(
    serial: str,
    session: SessionDep,
    user: PageViewer,
    step: Step = 1,
    reading_min: ReadingMin = None,
    reading_max: ReadingMax = None,
    level: Level = None,
) -> Response:
    """The conversion table as CSV, for the unit page's download button."""
    unit = get_unit(session, serial)
    return _download(service.table_csv(unit, step, reading_min, reading_max, level))


@router.get("/units/{serial}/table.json")
def table_json(
    serial: str,
    session: SessionDep,
    user: PageViewer,
    step: Step = 1,
    reading_min: ReadingMin = None,
    reading_max: ReadingMax = None,
    level: Level = None,
) -> Response:
    """The conversion table as JSON, for the unit page's download button."""
    unit = get_unit(session, serial)
    return _download(service.table_json(unit, step, reading_min, reading_max, level))


@router.get("/units/{serial}/firmware.h")
def firmware_h(
    serial: str,
    session: SessionDep,
    user: PageViewer,
    lut_max_error: Annotated[float | None, Query(gt=0, allow_inf_nan=False)] = None,
) -> Response:
    """The firmware header, for the unit page's download button."""
    unit = get_unit(session, serial)
    return _download(service.firmware_header(unit, lut_max_error))


@router.get("/units/{serial}/calibrations/{session_id}/report")
def report(
    request: Request, serial: str, session_id: int, session: SessionDep, user: PageViewer
) -> HTMLResponse:
    """The printable report of one calibration session of this unit."""
    unit = get_unit(session, serial)
    ctx = service.report_context(unit, session_id)
    return render(request, "reports/page.html", block="report", unit_url=unit_url(serial), **ctx)
