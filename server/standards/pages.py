"""Browser pages of the register: /standards (the list, and a form to register one) and
/standards/{name} (certificate, checks, the units that depend on it, a form to record a check),
with the dependent units as a CSV download."""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from functools import partial
from typing import Annotated, Any
from urllib.parse import quote, urlencode

from fastapi import APIRouter, Depends, Form, Query, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from pydantic import ValidationError

from server.accounts.deps import PageTechnician, PageViewer
from server.accounts.models import ROLE_RANK, Role
from server.db import SessionDep
from server.errors import Conflict, Invalid
from server.fleet.pages import unit_url
from server.htmx import render
from server.pagination import PageParams, page_params
from server.standards import service, suspect
from server.standards.models import ReferenceStandard
from server.standards.schemas import CheckCreate, StandardCreate

router = APIRouter(include_in_schema=False)

DEFAULT_PER_PAGE = PageParams().per_page
STANDING_WORDS = {
    "ok": "In date",
    "due_soon": "Due soon",
    "overdue": "Overdue",
    "suspect": "Out of tolerance",
}
CSV_COLUMNS = (
    "serial",
    "sensor_type",
    "status",
    "installed_in",
    "calibration_id",
    "calibrated_at",
    "passed",
    "since_last_good_check",
)


def standard_url(name: str) -> str:
    return f"/standards/{quote(name, safe='')}"


def _list_url(q: str = "", page: int = 1, per_page: int = DEFAULT_PER_PAGE) -> str:
    query = {
        "q": q.strip(),
        "page": page if page != 1 else "",
        "per_page": per_page if per_page != DEFAULT_PER_PAGE else "",
    }
    encoded = urlencode({k: v for k, v in query.items() if v != ""})
    return f"/standards?{encoded}" if encoded else "/standards"


@dataclass(frozen=True, slots=True)
class StandardForm:
    """The "register a standard" form as typed, kept on a re-render."""

    name: str = ""
    description: str = ""
    quantity: str = ""
    value_unit: str = ""
    expanded_u: str = ""
    k: str = "2"
    certificate: str = ""
    calibrated_on: str = ""
    due_on: str = ""
    error: str | None = None
    error_field: str | None = None


@dataclass(frozen=True, slots=True)
class CheckForm:
    """The "record a check" form as typed."""

    checked_on: str = ""
    in_tolerance: str = ""
    note: str = ""
    due_on: str = ""
    error: str | None = None
    error_field: str | None = None


def _invalid(exc: ValidationError) -> Invalid:
    """The first problem of a form checked by a schema, naming its field."""
    first = exc.errors()[0]
    field = ".".join(str(p) for p in first["loc"])
    message = str(first["msg"]).removeprefix("Value error, ")
    return Invalid(f"{field.replace('_', ' ')}: {message}", field=field)


def _can_edit(user: Any) -> bool:
    return bool(ROLE_RANK[user.role] >= ROLE_RANK[Role.technician])


def _list_context(
    session: Any, user: Any, page: PageParams, q: str, form: StandardForm
) -> dict[str, Any]:
    today = datetime.now(UTC).date()
    standards, total = service.list_standards(session, page, q)
    last = page.offset + len(standards)
    link = partial(_list_url, q=q, per_page=page.per_page)
    return {
        "rows": [(s, service.standing_of(s, today)) for s in standards],
        "total": total,
        "first": page.offset + 1 if standards else 0,
        "last": last,
        "q": q,
        "prev_url": link(page=page.page - 1) if page.page > 1 else None,
        "next_url": link(page=page.page + 1) if last < total else None,
        "words": STANDING_WORDS,
        "today": today,
        "form": form,
        "can_edit": _can_edit(user),
        "standard_url": standard_url,
        "due_soon_days": service.DUE_SOON_DAYS,
    }


@router.get("/standards")
def standards_page(
    request: Request,
    session: SessionDep,
    user: PageViewer,
    page: Annotated[PageParams, Depends(page_params)],
    q: Annotated[str, Query(description="part of a name")] = "",
) -> HTMLResponse:
    """The register, soonest due first; overdue, due-soon and suspect standards marked."""
    today = datetime.now(UTC).date()
    form = StandardForm(calibrated_on=today.isoformat())
    return render(
        request,
        "standards/list.html",
        block="results",
        **_list_context(session, user, page, q, form),
    )


@router.get("/standards/find")
def find_standard(
    session: SessionDep, user: PageViewer, q: Annotated[str, Query()] = ""
) -> RedirectResponse:
    """A scanned (or typed) name + Enter: the standard on an exact match, else the list."""
    found = service.find_standard(session, q) if q.strip() else None
    if found is not None:
        return RedirectResponse(standard_url(found.name), status_code=303)
    return RedirectResponse(_list_url(q=q), status_code=303)


@router.post("/standards")
def register_standard(
    request: Request,
    session: SessionDep,
    user: PageTechnician,
    name: Annotated[str, Form()] = "",
    description: Annotated[str, Form()] = "",
    quantity: Annotated[str, Form()] = "",
    value_unit: Annotated[str, Form()] = "",
    expanded_u: Annotated[str, Form()] = "",
    k: Annotated[str, Form()] = "2",
    certificate: Annotated[str, Form()] = "",
    calibrated_on: Annotated[str, Form()] = "",
    due_on: Annotated[str, Form()] = "",
) -> Response:
    """Register a standard; its page, or the form to fix (422) naming what is wrong."""
    form = StandardForm(
        name=name,
        description=description,
        quantity=quantity,
        value_unit=value_unit,
        expanded_u=expanded_u,
        k=k,
        certificate=certificate,
        calibrated_on=calibrated_on,
        due_on=due_on,
    )
    try:
        try:
            data = StandardCreate.model_validate(
                {
                    "name": name,
                    "description": description.strip() or None,
                    "quantity": quantity,
                    "value_unit": value_unit,
                    "expanded_u": expanded_u.strip() or None,
                    "k": k.strip() or "2",
                    "certificate": certificate,
                    "calibrated_on": calibrated_on.strip() or None,
                    "due_on": due_on.strip() or None,
                }
            )
        except ValidationError as exc:
            raise _invalid(exc) from None
        standard = service.create_standard(session, data, user.name)
    except (Invalid, Conflict) as exc:
        session.rollback()
        failed = replace(form, error=exc.message, error_field=exc.field)
        return render(
            request,
            "standards/list.html",
            block="results",
            status_code=exc.status_code,
            **_list_context(session, user, PageParams(), "", failed),
        )
    session.commit()
    return RedirectResponse(standard_url(standard.name), status_code=303)


def _detail_context(
    session: Any, user: Any, standard: ReferenceStandard, form: CheckForm, flagged: int | None
) -> dict[str, Any]:
    today = datetime.now(UTC).date()
    since = service.last_good_on(standard, today)
    units = service.dependents(session, standard)
    return {
        "standard": standard,
        "standing": service.standing_of(standard, today),
        "words": STANDING_WORDS,
        "checks": list(reversed(standard.checks)),
        "units": units,
        "since": since,
        "at_risk": sum(1 for u in units if u.calibrated_at.date() >= since),
        "form": form,
        "flagged": flagged,
        "can_edit": _can_edit(user),
        "unit_url": unit_url,
        "standard_url": standard_url,
        "today": today,
    }


@router.get("/standards/{name}")
def standard_page(
    request: Request,
    name: str,
    session: SessionDep,
    user: PageViewer,
    flagged: Annotated[int | None, Query(ge=0, description="units flagged by the check")] = None,
) -> HTMLResponse:
    """A standard: certificate, U and k, due date, checks, and every unit whose current
    calibration used it (where installed, whether since its last good check)."""
    standard = service.get_standard(session, name)
    form = CheckForm(checked_on=datetime.now(UTC).date().isoformat())
    return render(
        request,
        "standards/page.html",
        block="main",
        **_detail_context(session, user, standard, form, flagged),
    )


@router.post("/standards/{name}/checks")
def record_check(
    request: Request,
    name: str,
    session: SessionDep,
    user: PageTechnician,
    checked_on: Annotated[str, Form()] = "",
    in_tolerance: Annotated[str, Form()] = "",
    note: Annotated[str, Form()] = "",
    due_on: Annotated[str, Form()] = "",
) -> Response:
    """Record a check of the standard; back to its page (with how many units a failed check
    flagged), or the form to fix (422)."""
    standard = service.get_standard(session, name, lock="update")
    form = CheckForm(checked_on=checked_on, in_tolerance=in_tolerance, note=note, due_on=due_on)
    try:
        if in_tolerance not in ("yes", "no"):
            raise Invalid("say whether the standard was found in tolerance", field="in_tolerance")
        try:
            data = CheckCreate.model_validate(
                {
                    "checked_on": checked_on.strip() or None,
                    "in_tolerance": in_tolerance == "yes",
                    "note": note.strip() or None,
                    "due_on": due_on.strip() or None,
                }
            )
        except ValidationError as exc:
            raise _invalid(exc) from None
        _, flagged = suspect.check_standard(session, standard, data, user.name)
    except Invalid as exc:
        session.rollback()
        standard = service.get_standard(session, name)
        failed = replace(form, error=exc.message, error_field=exc.field)
        return render(
            request,
            "standards/page.html",
            block="main",
            status_code=422,
            **_detail_context(session, user, standard, failed, None),
        )
    session.commit()
    url = standard_url(standard.name)
    if not data.in_tolerance:
        url += f"?flagged={len(flagged)}"
    return RedirectResponse(url + "#checks", status_code=303)


@router.get("/standards/{name}/units.csv")
def dependent_units_csv(name: str, session: SessionDep, user: PageViewer) -> Response:
    """The units whose current calibration used the standard, as CSV (one row per unit)."""
    standard = service.get_standard(session, name)
    since = service.last_good_on(standard, datetime.now(UTC).date())
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for d in service.dependents(session, standard):
        writer.writerow(
            [
                d.serial,
                d.sensor_type,
                d.status.value,
                d.installed_in or "",
                d.calibration_id,
                d.calibrated_at.isoformat(),
                "" if d.passed is None else ("yes" if d.passed else "no"),
                "yes" if d.calibrated_at.date() >= since else "no",
            ]
        )
    filename = "".join(c if c.isalnum() or c in "-_." else "_" for c in standard.name)
    return Response(
        out.getvalue(),
        media_type="text/csv; charset=utf-8",
        headers={"Content-Disposition": f'attachment; filename="{filename}-units.csv"'},
    )
