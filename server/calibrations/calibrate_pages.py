"""The /calibrate page: pick (or scan) a unit, enter its points by pasting or as a CSV file, see
the fit previewed as they are typed (nothing is stored), then save it as the unit page's form does.

Without JavaScript the preview is a submit button that answers with the whole page, the preview
filled in; with htmx the form's fields post to the same preview URL as they are typed and get the
``preview`` block alone.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from datetime import UTC, datetime
from typing import Annotated, Any

import numpy as np
from fastapi import APIRouter, Depends, File, Form, Request, UploadFile
from fastapi.responses import HTMLResponse, Response
from pydantic import ValidationError
from sqlalchemy.orm import object_session

import shared
from server.accounts.deps import PageTechnician
from server.calibrations import charts, service
from server.calibrations.csvfile import MAX_BYTES, parse_points_csv
from server.calibrations.models import SessionKind, latest_session
from server.calibrations.pages import (
    CHOSEN_BECAUSE,
    CalibrationForm,
    FormFields,
    blank_form,
    calibration_from_form,
    model_rows,
    parse_points,
    point_rows,
)
from server.calibrations.schemas import CalibrationCreate, PointIn
from server.db import SessionDep
from server.errors import Invalid
from server.flags.service import recompute_flags
from server.fleet.models import SensorType, Unit
from server.fleet.pages import unit_url
from server.fleet.receiving import awaiting_first_calibration
from server.fleet.service import due_on, find_unit_by_serial, get_unit
from server.formatting import residual_decimals
from server.htmx import redirect, render
from server.standards.service import all_names

router = APIRouter(include_in_schema=False)

TEMPLATE = "calibrations/calibrate.html"
AWAITING_SHOWN = 12  # units waiting for a first calibration, listed on the picker
# what the fit does not depend on: stood in for while previewing, checked before saving
SESSION_STAND_INS = {
    "performed_at": "2000-01-01T00:00",
    "operator": "preview",
    "reference": "preview",
    "kind": SessionKind.periodic.value,
    "ambient": "",
    "notes": "",
}
STAND_IN_POINTS = "0, 0\n1, 1"  # replaced by the points read from the paste or the file
PREVIEW_BECAUSE = {**CHOSEN_BECAUSE, "requested": "the family picked in the form"}


@dataclass(frozen=True, slots=True)
class Entry:
    """What the form posted: the unit, the session fields, the points pasted or uploaded."""

    serial: str
    form: CalibrationForm
    upload: UploadFile | None
    csv_text: str  # a CSV uploaded earlier, kept in the page re-rendered without JavaScript
    csv_name: str


@dataclass(frozen=True, slots=True)
class Points:
    """The points read, and where from."""

    points: list[PointIn]
    source: str  # "pasted" or the file's name
    csv_text: str = ""  # the file's text, to keep on a re-render ("" for pasted points)
    csv_name: str = ""


def entry(
    form: FormFields,
    unit: Annotated[str, Form()] = "",
    file: Annotated[UploadFile | None, File()] = None,
    csv_text: Annotated[str, Form()] = "",
    csv_name: Annotated[str, Form()] = "",
) -> Entry:
    return Entry(
        serial=unit,
        form=form,
        upload=file if file is not None and file.filename else None,
        csv_text=csv_text,
        csv_name=csv_name,
    )


EntryDep = Annotated[Entry, Depends(entry)]


def find_unit(session: Any, serial: str) -> Unit:
    """The unit with this serial (any case, as a scanner types it), with its history; Invalid
    saying what to do when there is none."""
    typed = serial.strip()
    if not typed:
        raise Invalid("scan or type the serial of the unit to calibrate", field="unit")
    found = find_unit_by_serial(session, typed)
    if found is None:
        raise Invalid(
            f"no unit “{typed[:80]}” is registered: check the serial, or receive the unit first",
            field="unit",
        )
    return get_unit(session, found.serial)


def read_points(entered: Entry) -> Points | None:
    """The points from a new file, else the pasted text, else a file kept from an earlier
    preview; None when nothing was given yet. A new file and pasted text together are refused."""
    if entered.upload is not None:
        if entered.form.points.strip():
            raise Invalid(
                "points are pasted and a CSV file is chosen: clear the pasted points, "
                "or choose no file",
                field="points",
            )
        data = entered.upload.file.read(MAX_BYTES + 1)
        points = parse_points_csv(data)
        name = entered.upload.filename or "the file"
        return Points(points, name, data.decode("utf-8-sig"), name)
    if entered.form.points.strip():
        return Points(parse_points(entered.form.points), "pasted")
    if entered.csv_text.strip():
        name = entered.csv_name or "the file"
        points = parse_points_csv(entered.csv_text.encode("utf-8"))
        return Points(points, name, entered.csv_text, name)
    return None


def calibration_of(form: CalibrationForm, points: list[PointIn]) -> CalibrationCreate:
    """calibration_from_form's checks of every field, with the points read already (pasted or
    from a file); Invalid naming the field at fault."""
    checked = calibration_from_form(replace(form, points=STAND_IN_POINTS))
    try:
        return CalibrationCreate.model_validate(
            {
                **checked.model_dump(exclude={"points"}, exclude_unset=True),
                "points": [p.model_dump() for p in points],
            }
        )
    except ValidationError as exc:
        first = exc.errors()[0]
        message = str(first["msg"]).removeprefix("Value error, ")
        raise Invalid(f"points: {message}", field="points") from None


def _with_standard(
    sensor_type: SensorType, form: CalibrationForm, data: CalibrationCreate
) -> tuple[CalibrationCreate, str | None, str | None]:
    """The previewed body with the register's U and k when the form names a standard, why that
    standard cannot vouch for a session at the typed time (or None), and what is wrong with the
    standard as named (reported as still needed before saving; the fit is previewed anyway)."""
    db = object_session(sensor_type)
    if data.reference_standard is None or db is None:
        return data, None, None
    try:
        when = calibration_from_form(replace(form, points=STAND_IN_POINTS)).performed_at
    except Invalid:
        when = datetime.now(UTC)
    try:
        filled, named = service.named_standard(
            db, sensor_type, data.model_copy(update={"reference": None, "performed_at": when})
        )
    except Invalid as exc:
        return data, None, exc.message
    return filled, named.problem if named is not None else None, None


def preview_of(sensor_type: SensorType, form: CalibrationForm, read: Points) -> dict[str, Any]:
    """The fit of the points as saving would make it (nothing stored), judged, and drawn."""
    data = calibration_of(replace(form, **SESSION_STAND_INS), read.points)
    data, problem, standard_error = _with_standard(sensor_type, form, data)
    outcome = service.fit_points(
        sensor_type,
        data.points,
        data.family,
        service.type_b_of(
            sensor_type,
            data.reference_expanded_u,
            data.reference_k,
            data.extra_u,
            data.extra_label,
        ),
    )
    outcome = service.with_standard_problem(outcome, problem)
    try:
        calibration_of(form, read.points)
        still_needed = standard_error
    except Invalid as exc:  # only a session field can fail now: the fit needs none of them
        still_needed = exc.message
    fit, decision = outcome.fit, outcome.decision
    axes = charts.Axes(sensor_type.quantity, sensor_type.value_unit, sensor_type.reading_unit)
    suspects = {int(s["index"]): str(s["reason"]) for s in outcome.diagnostics["suspects"]}
    reasons = dict(fit.excluded)
    stderr = fit.stderr
    ranking = outcome.ranking
    used = np.flatnonzero(fit.used)
    at = int(used[np.argmax(np.abs(fit.residuals[used]))])
    largest = {
        "residual": float(fit.residuals[at]),
        "reference_value": float(fit.value[at]),
        "allowed": float(
            charts.allowed_error(
                fit.value[at], sensor_type.tolerance_abs, sensor_type.tolerance_rel
            )
        ),
    }
    return {
        "fit": fit,
        "decision": decision,
        "formula": shared.get_family(fit.family).formula,
        "constants": [(name, value, stderr[name]) for name, value in fit.params.items()],
        "value_range": tuple(float(v) for v in fit.to_value(list(fit.valid_range))),
        "curve_json": charts.curve_figure(fit, axes).to_json(),
        "residual_json": charts.residual_figure(
            fit,
            axes,
            tolerance_abs=sensor_type.tolerance_abs,
            tolerance_rel=sensor_type.tolerance_rel,
            suspects=suspects,
        ).to_json(),
        "points": point_rows(read.points, fit, sensor_type, suspects),
        "residual_format": f"%.{residual_decimals(fit.rse)}f",
        "largest": largest,
        "suspects": sorted(suspects.items()),
        "excluded": sorted(reasons.items()),
        "lack_of_fit": outcome.diagnostics["lack_of_fit"],
        "ranking": ranking,
        "model_rows": model_rows(ranking),
        "chosen_because": PREVIEW_BECAUSE.get(ranking["chosen_because"]),
        "source": read.source,
        "still_needed": still_needed,
    }


def page_context(
    *,
    unit: Unit | None,
    form: CalibrationForm | None,
    read: Points | None = None,
    preview: dict[str, Any] | None = None,
    preview_error: str | None = None,
    serial: str = "",
    pick_error: str | None = None,
    session: Any = None,
) -> dict[str, Any]:
    """Everything calibrations/calibrate.html shows: the picker, or the unit's form and preview."""
    ctx: dict[str, Any] = {
        "unit": unit,
        "sensor_type": unit.sensor_type if unit else None,
        "form": form,
        "kinds": list(SessionKind),
        "csv_text": read.csv_text if read else "",
        "csv_name": read.csv_name if read else "",
        "preview": preview,
        "preview_error": preview_error,
        "serial": serial,
        "pick_error": pick_error,
        "unit_url": unit_url,
        "awaiting": [],
        "awaiting_total": 0,
        "last": None,
        "due": None,
        "today": datetime.now(UTC).date(),
    }
    ctx["standard_names"] = []
    if unit is not None:
        ctx["last"] = latest_session(unit.sessions)
        ctx["due"] = due_on(unit)
        db = object_session(unit)
        ctx["standard_names"] = all_names(db) if db is not None else []
    if session is not None:
        ctx["awaiting"], ctx["awaiting_total"] = awaiting_first_calibration(session, AWAITING_SHOWN)
    return ctx


def try_preview(
    unit: Unit, form: CalibrationForm, entered: Entry
) -> tuple[Points | None, dict[str, Any] | None, Invalid | None]:
    """The points read, the preview, or the reason there is none (nothing stored either way)."""
    read: Points | None = None
    try:
        read = read_points(entered)
        if read is None:
            return None, None, None
        return read, preview_of(unit.sensor_type, form, read), None
    except Invalid as exc:
        return read, None, exc


@router.get("/calibrate")
def calibrate_page(
    request: Request, session: SessionDep, user: PageTechnician, unit: str | None = None
) -> HTMLResponse:
    """Pick a unit (a scanner types its serial and Enter); with ``unit``, its calibration form.
    An unknown serial comes back to the picker (422) saying so."""
    if unit is None:
        return render(
            request,
            TEMPLATE,
            block="calibrate",
            **page_context(unit=None, form=None, session=session),
        )
    try:
        found = find_unit(session, unit)
    except Invalid as exc:
        return render(
            request,
            TEMPLATE,
            block="calibrate",
            status_code=422,
            **page_context(
                unit=None, form=None, serial=unit, pick_error=exc.message, session=session
            ),
        )
    return render(
        request,
        TEMPLATE,
        block="calibrate",
        **page_context(unit=found, form=blank_form(found, user), serial=found.serial),
    )


@router.post("/calibrate/preview")
def preview(
    request: Request, session: SessionDep, user: PageTechnician, entered: EntryDep
) -> HTMLResponse:
    """Fit the points as typed, store nothing: the preview block for htmx, else the whole page
    with the preview filled in; 422 with the reason when the points cannot be fitted."""
    found = find_unit(session, entered.serial)
    read, shown, problem = try_preview(found, entered.form, entered)
    form = entered.form
    if problem is not None:
        form = replace(form, error_field=(problem.field or "").split(".")[0])
    return render(
        request,
        TEMPLATE,
        block="preview",
        status_code=422 if problem is not None else 200,
        **page_context(
            unit=found,
            form=form,
            read=read,
            preview=shown,
            preview_error=problem.message if problem else None,
            serial=found.serial,
        ),
    )


@router.post("/calibrate")
def save(
    request: Request, session: SessionDep, user: PageTechnician, entered: EntryDep
) -> Response:
    """Fit, judge and store the calibration, recompute the type's flags, and go to the unit page
    (303, ``?saved=``); the page again (422) saying what to fix, with nothing stored."""
    found = find_unit(session, entered.serial)
    read: Points | None = None
    try:
        read = read_points(entered)
        if read is None:
            raise Invalid(
                "no points: paste them, one per line, or choose a CSV file", field="points"
            )
        record = service.run_calibration(
            session, found, calibration_of(entered.form, read.points), recorded_by=user.name
        )
        recompute_flags(session, found.sensor_type, units=[found])
    except Invalid as exc:
        session.rollback()
        return _not_saved(request, session, entered, read, exc)
    session.commit()
    target = f"{unit_url(found.serial)}?saved={record.id}"
    return redirect(request, target)


def _not_saved(
    request: Request,
    session: Any,
    entered: Entry,
    read: Points | None,
    exc: Invalid,
) -> HTMLResponse:
    """The page as posted, the reason on top of the form and the preview of what was given."""
    found = find_unit(session, entered.serial)
    form = replace(entered.form, error=exc.message, error_field=(exc.field or "").split(".")[0])
    shown, preview_error = None, None
    if read is not None:
        try:
            shown = preview_of(found.sensor_type, entered.form, read)
        except Invalid as problem:
            preview_error = problem.message
    return render(
        request,
        TEMPLATE,
        block="calibrate",
        status_code=422,
        **page_context(
            unit=found,
            form=form,
            read=read,
            preview=shown,
            preview_error=preview_error,
            serial=found.serial,
        ),
    )
