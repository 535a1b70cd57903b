"""Browser pages of the exports: the same downloads as the API for a signed-in user, and the
printable calibration report of one session."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, Response

from server.accounts.deps import PageViewer
from server.db import RowId, SessionDep
from server.exports import service
from server.exports.routes import LutMaxError, TableParams, download_response, table_response
from server.fleet.pages import unit_url
from server.fleet.service import get_unit
from server.htmx import render

router = APIRouter(include_in_schema=False)


@router.get("/units/{serial}/table.csv")
def table_csv(serial: str, session: SessionDep, user: PageViewer, query: TableParams) -> Response:
    """The conversion table as CSV, for the unit page's download button."""
    return table_response(get_unit(session, serial), "csv", query)


@router.get("/units/{serial}/table.json")
def table_json(serial: str, session: SessionDep, user: PageViewer, query: TableParams) -> Response:
    """The conversion table as JSON, for the unit page's download button."""
    return table_response(get_unit(session, serial), "json", query)


@router.get("/units/{serial}/firmware.h")
def firmware_h(
    serial: str,
    session: SessionDep,
    user: PageViewer,
    lut_max_error: LutMaxError = None,
) -> Response:
    """The firmware header, for the unit page's download button."""
    unit = get_unit(session, serial)
    return download_response(service.firmware_header(unit, lut_max_error))


@router.get("/units/{serial}/calibrations/{session_id}/report")
def report(
    request: Request, serial: str, session_id: RowId, session: SessionDep, user: PageViewer
) -> HTMLResponse:
    """The printable report of one calibration session of this unit."""
    unit = get_unit(session, serial)
    ctx = service.report_context(unit, session_id)
    return render(request, "reports/page.html", block="report", unit_url=unit_url(serial), **ctx)
