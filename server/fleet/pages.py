"""Browser pages of the fleet: the unit list (search, filter, pages) and the scanner's jump."""

from __future__ import annotations

from datetime import UTC, datetime
from functools import partial
from typing import Annotated
from urllib.parse import quote, urlencode

from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import HTMLResponse, RedirectResponse

from server.accounts.deps import PageViewer
from server.db import SessionDep
from server.errors import Invalid
from server.flags.models import FlagKind
from server.flags.service import ABBREVIATIONS, TITLES, open_kinds_by_unit
from server.fleet import service
from server.fleet.models import UnitStatus
from server.htmx import render
from server.pagination import PageParams, page_params

router = APIRouter(include_in_schema=False)

DEFAULT_PER_PAGE = PageParams().per_page


def unit_url(serial: str) -> str:
    return f"/units/{quote(serial, safe='')}"


def _status(value: str) -> UnitStatus | None:
    if not value:
        return None
    try:
        return UnitStatus(value)
    except ValueError:
        raise Invalid(
            f"unknown status {value!r}; one of: {', '.join(s.value for s in UnitStatus)}",
            field="status",
        ) from None


def _flag(value: str) -> str | None:
    if not value:
        return None
    if value != "any" and value not in {k.value for k in FlagKind}:
        raise Invalid(
            f"unknown flag {value!r}; one of: any, {', '.join(k.value for k in FlagKind)}",
            field="flag",
        )
    return value


def fleet_url(
    *,
    q: str = "",
    sensor_type: str = "",
    status: str = "",
    flag: str = "",
    page: int = 1,
    per_page: int = DEFAULT_PER_PAGE,
) -> str:
    """The fleet list with these filters; defaults are left out of the query string."""
    query = {
        "q": q.strip(),
        "type": sensor_type,
        "status": status,
        "flag": flag,
        "page": page if page != 1 else "",
        "per_page": per_page if per_page != DEFAULT_PER_PAGE else "",
    }
    encoded = urlencode({k: v for k, v in query.items() if v != ""})
    return f"/?{encoded}" if encoded else "/"


@router.get("/")
def fleet(
    request: Request,
    session: SessionDep,
    user: PageViewer,
    page: Annotated[PageParams, Depends(page_params)],
    q: Annotated[str, Query(description="part of a serial")] = "",
    sensor_type: Annotated[str, Query(alias="type")] = "",
    status: str = "",
    flag: Annotated[str, Query(description="a flag kind the unit has open, or 'any'")] = "",
) -> HTMLResponse:
    """Every unit, filtered by part of the serial, type, status and open flags; ``results`` for
    htmx."""
    units, total = service.list_units(
        session,
        page,
        sensor_type=sensor_type or None,
        status=_status(status),
        q=q,
        flag=_flag(flag),
    )
    serial_of = {u.id: u.read.serial for u in units}
    ids = list(serial_of)
    first = page.offset + 1 if units else 0
    last = page.offset + len(units)
    last_page = max(1, -(-total // page.per_page))
    link = partial(
        fleet_url, q=q, sensor_type=sensor_type, status=status, flag=flag, per_page=page.per_page
    )
    return render(
        request,
        "fleet/page.html",
        block="results",
        rows=[u.read for u in units],
        flags={serial_of[uid]: found for uid, found in open_kinds_by_unit(session, ids).items()},
        flag_abbreviations=ABBREVIATIONS,
        flag_titles=TITLES,
        total=total,
        first=first,
        last=last,
        q=q,
        sensor_type=sensor_type,
        status=status,
        flag=flag,
        flag_kinds=list(FlagKind),
        per_page=page.per_page,
        default_per_page=DEFAULT_PER_PAGE,
        types=[t.name for t in service.list_sensor_types(session)],
        statuses=list(UnitStatus),
        prev_url=link(page=min(page.page - 1, last_page)) if page.page > 1 else None,
        next_url=link(page=page.page + 1) if last < total else None,
        today=datetime.now(UTC).date(),
        unit_url=unit_url,
    )


@router.get("/find")
def find(
    session: SessionDep,
    user: PageViewer,
    serial: Annotated[str, Query(description="a whole serial, as a scanner types it")] = "",
    q: Annotated[str, Query(description="what the search box held")] = "",
    sensor_type: Annotated[str, Query(alias="type")] = "",
    status: str = "",
    flag: str = "",
) -> RedirectResponse:
    """A scanned (or typed) serial + Enter: the unit on an exact match, else the filtered list."""
    text = (serial or q).strip()
    unit = service.find_unit_by_serial(session, text) if text else None
    if unit is not None:
        return RedirectResponse(unit_url(unit.serial), status_code=303)
    return RedirectResponse(
        fleet_url(q=text, sensor_type=sensor_type, status=status, flag=flag), status_code=303
    )
