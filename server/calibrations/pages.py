"""Browser pages of a unit: its current constants, plots, history, and adding a calibration."""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from typing import Annotated, Any, Protocol

from fastapi import APIRouter, Depends, Form, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from pydantic import ValidationError
from sqlalchemy.orm import object_session

import shared
from server.accounts.deps import PageTechnician, PageViewer
from server.accounts.models import ROLE_RANK, Role, User
from server.audit import service as audit
from server.calibrations import charts, service
from server.calibrations.models import SessionKind, latest_session
from server.calibrations.schemas import CalibrationCreate, DecisionRead, PointIn
from server.db import RowId, SessionDep
from server.errors import Conflict, Invalid
from server.exports.service import default_step, header_problem
from server.flags import fleet
from server.flags.charts import drift_history_figure
from server.flags.panels import unit_panels
from server.flags.service import recompute_flags
from server.fleet.models import SensorType, Unit, UnitStatus
from server.fleet.pages import unit_url
from server.fleet.schemas import UnitUpdate
from server.fleet.service import (
    NotComparable,
    drift_history,
    due_basis,
    due_on,
    get_unit,
    unit_due,
    update_unit,
)
from server.formatting import residual_decimals
from server.htmx import redirect, render
from server.standards.service import all_names

router = APIRouter(include_in_schema=False)

EARLIER_SHOWN = 5  # earlier calibrations overlaid on the curve plot
STATUS_MOVES = {  # where a unit can go from the unit page (installing is an installation event)
    UnitStatus.in_stock: [UnitStatus.quarantined, UnitStatus.retired],
    UnitStatus.quarantined: [UnitStatus.in_stock, UnitStatus.retired],
    UnitStatus.retired: [UnitStatus.in_stock],
    UnitStatus.installed: [],
}
SEPARATORS = re.compile(r"[,;\t ]+")
HEADER = re.compile(r"[A-Za-z]{2,}")  # words, not an exponent such as 1e3
DATETIME_LOCAL = "%Y-%m-%dT%H:%M"
FIELD_LABELS = {  # the form's words for the API's field names, in error messages
    "reference_expanded_u": "reference U",
    "reference_k": "coverage factor k",
    "extra_u": "extra standard uncertainty",
    "extra_label": "what the extra uncertainty is",
}
CHOSEN_BECAUSE = {
    "requested": "picked when the calibration was saved",
    "recommended": "the ranking's recommendation",
    "fallback": "nothing was recommended, so the type's first family that could be fitted",
}


@dataclass(frozen=True, slots=True)
class CalibrationForm:
    """What the "add a calibration" form holds: typed text, kept as is on a re-render."""

    performed_at: str
    operator: str
    reference: str
    kind: str
    family: str = ""
    reference_standard: str = ""  # a standard of the register, picked or scanned
    ambient: str = ""
    notes: str = ""
    points: str = ""
    reference_expanded_u: str = ""
    reference_k: str = "2"
    extra_u: str = ""
    extra_label: str = ""
    error: str | None = None
    error_field: str | None = None


def blank_form(unit: Unit, user: User) -> CalibrationForm:
    """Now (UTC), the signed-in user, and the reference (with its U and k) used last time on this
    unit; the family left to the ranking."""
    last = max(unit.sessions, key=lambda s: (s.performed_at, s.id), default=None)
    if last is not None and last.reference_standard_id is not None:
        # a standard of the register: its name; U and k come from the register when saving
        return CalibrationForm(
            performed_at=datetime.now(UTC).strftime(DATETIME_LOCAL),
            operator=user.name,
            reference="",
            reference_standard=last.reference,
            kind=SessionKind.periodic.value,
            family="",
        )
    return CalibrationForm(
        performed_at=datetime.now(UTC).strftime(DATETIME_LOCAL),
        operator=user.name,
        reference=last.reference if last else "",
        kind=(SessionKind.periodic if unit.sessions else SessionKind.incoming).value,
        family="",
        reference_expanded_u=_number_text(last.reference_expanded_u) if last else "",
        reference_k=_number_text(last.reference_k) if last else "2",
    )


def _number_text(x: float | None) -> str:
    return "" if x is None else f"{x:g}"


def _optional_number(text: str, field: str, what: str) -> float | None:
    """A typed number, or None for a blank field; Invalid naming the field otherwise."""
    stripped = text.strip()
    if not stripped:
        return None
    try:
        number = float(stripped)
    except ValueError:
        raise Invalid(
            f"{what}: “{stripped}” is not a number (use a point as the decimal mark)", field=field
        ) from None
    if not math.isfinite(number):
        raise Invalid(f"{what}: “{stripped}” is not a finite number", field=field)
    return number


def parse_points(text: str) -> list[PointIn]:
    """Pasted lines of "reference_value, reading" (comma, tab, semicolon or spaces between).

    Blank lines and lines starting with # are skipped, and so is a first line with words in it
    (a header). Any other line that is not two finite numbers is an error naming the line.
    """
    points: list[PointIn] = []
    seen_content = False
    for number, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if not stripped or stripped.startswith("#"):
            continue
        fields = [f for f in SEPARATORS.split(stripped) if f]
        if not seen_content and HEADER.search(stripped) and not all(map(_is_float, fields)):
            seen_content = True  # a header line such as "reference_value, reading"
            continue
        seen_content = True
        if len(fields) != 2:
            hint = " (use a point as the decimal mark)" if "," in stripped else ""
            raise Invalid(
                f"line {number}: expected two numbers, the reference value then the "
                f"reading; found {len(fields)} field(s) in “{stripped}”{hint}",
                field="points",
            )
        values = []
        for field in fields:
            if not _is_float(field):
                raise Invalid(
                    f"line {number}: “{field}” is not a number (in “{stripped}”)", field="points"
                )
            value = float(field)
            if not math.isfinite(value):
                raise Invalid(
                    f"line {number}: “{field}” is not a finite number (in “{stripped}”)",
                    field="points",
                )
            values.append(value)
        points.append(PointIn(reference_value=values[0], reading=values[1]))
    if len(points) < 2:
        raise Invalid(
            f"paste at least two points, one per line as “reference value, reading”; "
            f"found {len(points)}",
            field="points",
        )
    return points


def _is_float(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _performed_at(text: str) -> datetime:
    """A datetime-local value (no zone) read as UTC; a value with an offset keeps it."""
    try:
        when = datetime.fromisoformat(text.strip())
    except ValueError:
        raise Invalid(
            "give the date and time of the calibration (UTC), e.g. 2026-03-14T09:30",
            field="performed_at",
        ) from None
    return when.replace(tzinfo=UTC) if when.tzinfo is None else when


def calibration_from_form(form: CalibrationForm) -> CalibrationCreate:
    """The API's CalibrationCreate from the form's text, or Invalid naming the field at fault."""
    performed_at = _performed_at(form.performed_at)
    if not form.operator.strip():
        raise Invalid("who did the calibration? give the operator", field="operator")
    standard = form.reference_standard.strip() or None
    if standard is None and not form.reference.strip():
        raise Invalid(
            "name the reference instrument or jig used, or pick a standard of the register",
            field="reference",
        )
    if form.kind not in SessionKind.__members__:
        raise Invalid(f"unknown kind {form.kind!r}", field="kind")
    reference_expanded_u = _optional_number(
        form.reference_expanded_u, "reference_expanded_u", "reference U"
    )
    reference_k = _optional_number(form.reference_k, "reference_k", "coverage factor k")
    extra_u = _optional_number(form.extra_u, "extra_u", "extra standard uncertainty")
    points = parse_points(form.points)
    try:
        return CalibrationCreate(
            performed_at=performed_at,
            operator=form.operator,
            reference=form.reference.strip() or None,
            reference_standard=standard,
            kind=SessionKind(form.kind),
            family=form.family or None,
            ambient=form.ambient.strip() or None,
            notes=form.notes.strip() or None,
            reference_expanded_u=reference_expanded_u,
            # with a standard of the register, k is its own unless a U is typed beside it
            **(
                {"reference_k": 2.0 if reference_k is None else reference_k}
                if standard is None or reference_expanded_u is not None
                else {}
            ),
            extra_u=extra_u,
            extra_label=form.extra_label.strip() or None,
            points=points,
        )
    except ValidationError as exc:
        first = exc.errors()[0]
        field = ".".join(str(p) for p in first["loc"])
        message = str(first["msg"]).removeprefix("Value error, ")
        raise Invalid(
            f"{FIELD_LABELS.get(field, field)}: {message}", field=field.split(".")[0]
        ) from None


def _catching_up(unit: Unit) -> bool:
    session = object_session(unit)
    return session is not None and fleet.catching_up(session, unit.sensor_type)


def unit_context(
    unit: Unit,
    user: User,
    form: CalibrationForm,
    saved: int | None = None,
    reading: str | None = None,
) -> dict[str, Any]:
    """Everything units/page.html shows: constants, figures, checks, budget, history, the form.

    ``reading`` is the text typed into the budget form (None: the middle of the valid range).
    """
    sensor_type = unit.sensor_type
    axes = charts.Axes(sensor_type.quantity, sensor_type.value_unit, sensor_type.reading_unit)
    current = latest_session(unit.sessions)
    ctx: dict[str, Any] = {
        "unit": unit,
        "sensor_type": sensor_type,
        "current": current,
        "due": due_on(unit),
        "due_basis": due_basis(unit),
        "today": datetime.now(UTC).date(),
        "form": form,
        "saved": saved,
        "kinds": list(SessionKind),
        "unit_url": unit_url(unit.serial),
        "can_calibrate": ROLE_RANK[user.role] >= ROLE_RANK[Role.technician],
        "fleet_catching_up": _catching_up(unit),
        "fit": None,
        "decision": None,
        "constants": [],
        "formula": None,
        "value_range": None,
        "residual_format": "%g",
        "curve_json": None,
        "residual_json": None,
        "points": [],
        "ranking": None,
        "model_rows": [],
        "chosen_because": None,
        "suspects": [],
        "lack_of_fit": None,
        "budget": None,
        "budget_error": None,
        "budget_reading": (reading or "").strip(),
        "header_problem": header_problem(sensor_type),
        "table_step": default_step(sensor_type),
    }
    history: list[dict[str, Any]] = []
    for record in sorted(unit.sessions, key=lambda s: (s.performed_at, s.id), reverse=True):
        stored = record.current_fit
        history.append(
            {
                "record": record,
                "fit": stored,
                "rse": stored.result["rse"] if stored else None,
                "n_points": len(stored.result["reading"]) if stored else None,
            }
        )
    ctx["history"] = history
    ctx["void_error"] = None
    ctx["void_for"] = None
    ctx["status_moves"] = STATUS_MOVES.get(unit.status, [])
    ctx["status_error"] = None
    db = object_session(unit)
    ctx["changes"] = audit.entries_of_unit(db, unit.serial) if db is not None else []
    ctx["standard_names"] = all_names(db) if db is not None else []
    ctx.update(drift_context(unit))
    ctx.update(unit_panels(unit))
    ctx["just_saved"] = next((h for h in history if h["record"].id == saved), None)
    if current is None:
        return ctx

    fit, stored = service.fit_of(current)
    decision = DecisionRead(**stored.decision)
    earlier = [
        (f"{s.performed_at:%Y-%m-%d}", service.fit_of(s)[0])
        for s in sorted(unit.sessions, key=lambda s: (s.performed_at, s.id), reverse=True)
        if s is not current
        and s.voided_at is None
        and s.current_fit is not None
        and (s.performed_at, s.id) < (current.performed_at, current.id)
    ][:EARLIER_SHOWN]
    stderr = fit.stderr
    diagnostics = service.stored_diagnostics(fit, stored)
    suspects = {int(s["index"]): str(s["reason"]) for s in diagnostics["suspects"]}
    ranking = stored.ranking
    ctx.update(
        fit=fit,
        decision=decision,
        noise_check=stored.noise_check,
        formula=shared.get_family(fit.family).formula,
        constants=[(name, value, stderr[name]) for name, value in fit.params.items()],
        value_range=tuple(float(v) for v in fit.to_value(list(fit.valid_range))),
        earlier_count=len(earlier),
        curve_json=charts.curve_figure(fit, axes, earlier).to_json(),
        residual_json=charts.residual_figure(
            fit,
            axes,
            tolerance_abs=sensor_type.tolerance_abs,
            tolerance_rel=sensor_type.tolerance_rel,
            suspects=suspects,
        ).to_json(),
        points=point_rows(current.points, fit, sensor_type, suspects),
        residual_format=f"%.{residual_decimals(fit.rse)}f",
        suspects=sorted(suspects.items()),
        lack_of_fit=diagnostics["lack_of_fit"],
        ranking=ranking,
        model_rows=model_rows(ranking) if ranking else [],
        chosen_because=CHOSEN_BECAUSE.get(ranking["chosen_because"]) if ranking else None,
    )
    try:
        ctx["budget"] = service.budget_of(current, fit, _budget_reading(reading, sensor_type))
    except Invalid as exc:
        ctx["budget_error"] = exc.message
    return ctx


def drift_context(unit: Unit) -> dict[str, Any]:
    """The drift history plot (2 or more valid calibrations), else the sentence saying why not."""
    try:
        history = drift_history(unit)
    except NotComparable as exc:
        return {"drift_json": None, "drift_note": f"No drift history: {exc}."}
    if len(history) < 2:
        have = "one valid calibration" if history else "no valid calibration"
        return {
            "drift_json": None,
            "drift_note": f"Drift history needs a second calibration (this unit has {have}).",
        }
    st = unit.sensor_type
    due = unit_due(unit, history=history)
    figure = drift_history_figure(
        history,
        value_unit=st.value_unit,
        reading_unit=st.reading_unit,
        drift_limit=st.drift_limit_abs or None,
        threshold=due.threshold if due and (st.tolerance_abs or st.tolerance_rel) else None,
        due=due,
    )
    return {"drift_json": figure.to_json() if figure else None, "drift_note": None}


class _PointLike(Protocol):
    reference_value: float
    reading: float


def point_rows(
    points: Sequence[_PointLike],
    fit: shared.Fit,
    sensor_type: SensorType,
    suspects: Mapping[int, str],
) -> list[dict[str, Any]]:
    """The points table of a fit (unit page, /calibrate preview): each point with its residual,
    whether it was used, outside the tolerance, excluded (why) or suspect (why), and the
    statistics of the samples its reading averages, when it has them."""
    reasons = dict(fit.excluded)
    return [
        {
            "reference_value": p.reference_value,
            "reading": p.reading,
            "residual": float(fit.residuals[i]),
            "used": bool(fit.used[i]),
            "outside": bool(fit.used[i])
            and abs(fit.residuals[i])
            > charts.allowed_error(
                p.reference_value, sensor_type.tolerance_abs, sensor_type.tolerance_rel
            ),
            "reason": reasons.get(i),
            "suspect": suspects.get(i),
            # a reading that is the mean of samples (stored point, or a point read from a CSV)
            "sd": getattr(p, "sample_sd", getattr(p, "sd", None)),
            "n": getattr(p, "sample_n", getattr(p, "n", None)),
            "rejected": getattr(p, "sample_rejected", getattr(p, "rejected", None)),
        }
        for i, p in enumerate(points)
    ]


def model_rows(ranking: dict[str, Any]) -> list[dict[str, Any]]:
    """The stored ranking's candidates, with which one is recommended and which is in use."""
    return [
        {
            **c,
            "recommended": c["label"] == ranking["recommended"],
            "in_use": c["label"] == ranking.get("chosen"),
        }
        for c in ranking["candidates"]
    ]


def _budget_reading(text: str | None, sensor_type: SensorType) -> float | None:
    """The reading typed into the budget form; None (the middle of the range) when blank."""
    if text is None or not text.strip():
        return None
    return _optional_number(text, "reading", f"reading ({sensor_type.reading_unit})")


@router.get("/units/{serial}")
def unit_page(
    request: Request,
    serial: str,
    session: SessionDep,
    user: PageViewer,
    saved: int | None = None,
    reading: str | None = None,
) -> HTMLResponse:
    """One unit: the constants to use, its curve and residuals, checks, uncertainty budget (at
    ``reading``, else mid-range), history, and the form. htmx asking with ``reading`` gets the
    budget block alone; a reading that cannot be used answers 422 with the reason."""
    unit = get_unit(session, serial)
    ctx = unit_context(unit, user, blank_form(unit, user), saved, reading)
    return render(
        request,
        "units/page.html",
        block="budget" if reading is not None else "unit",
        status_code=422 if ctx["budget_error"] else 200,
        **ctx,
    )


@router.post("/units/{serial}/calibrations/{session_id}/void")
def void_calibration(
    request: Request,
    serial: str,
    session_id: RowId,
    session: SessionDep,
    user: PageTechnician,
    reason: Annotated[str, Form()] = "",
) -> Response:
    """Void a mistaken calibration with a reason (kept, struck out); the page again, or the
    page with the reason to fix (422)."""
    unit = get_unit(session, serial)
    record = service.get_session_of(unit, session_id)
    try:
        service.void_session(session, record, reason, user.name)
    except (Invalid, Conflict) as exc:
        session.rollback()
        unit = get_unit(session, serial)
        ctx = unit_context(unit, user, blank_form(unit, user))
        ctx.update(void_error=exc.message, void_for=session_id)
        return render(request, "units/page.html", block="unit", status_code=422, **ctx)
    recompute_flags(session, unit.sensor_type, units=[unit])
    session.commit()
    return RedirectResponse(f"{unit_url(unit.serial)}#history", status_code=303)


@router.post("/units/{serial}/status")
def change_status(
    request: Request,
    serial: str,
    session: SessionDep,
    user: PageTechnician,
    status: Annotated[str, Form()] = "",
) -> Response:
    """Quarantine, retire or return the unit to stock; flags of its type follow."""
    unit = get_unit(session, serial)
    try:
        moves = STATUS_MOVES.get(unit.status, [])
        if status not in {m.value for m in moves}:
            raise Invalid(
                f"{unit.serial} is {unit.status.value.replace('_', ' ')}; it can go to "
                + (", ".join(m.value.replace("_", " ") for m in moves) or "nothing from here")
                + (" (record its removal under Installations first)" if not moves else ""),
                field="status",
            )
        changed = update_unit(session, unit, UnitUpdate(status=UnitStatus(status)), user.name)
    except Invalid as exc:
        session.rollback()
        unit = get_unit(session, serial)
        ctx = unit_context(unit, user, blank_form(unit, user))
        ctx["status_error"] = exc.message
        return render(request, "units/page.html", block="unit", status_code=422, **ctx)
    if changed:
        recompute_flags(session, unit.sensor_type, units=[unit])
    session.commit()
    return RedirectResponse(unit_url(unit.serial), status_code=303)


def form_fields(
    performed_at: Annotated[str, Form()] = "",
    operator: Annotated[str, Form()] = "",
    reference: Annotated[str, Form()] = "",
    reference_standard: Annotated[str, Form()] = "",
    kind: Annotated[str, Form()] = "",
    family: Annotated[str, Form()] = "",
    ambient: Annotated[str, Form()] = "",
    notes: Annotated[str, Form()] = "",
    points: Annotated[str, Form()] = "",
    reference_expanded_u: Annotated[str, Form()] = "",
    reference_k: Annotated[str, Form()] = "",
    extra_u: Annotated[str, Form()] = "",
    extra_label: Annotated[str, Form()] = "",
) -> CalibrationForm:
    """The calibration form's fields as typed (the unit page's form and /calibrate's)."""
    return CalibrationForm(
        performed_at=performed_at,
        operator=operator,
        reference=reference,
        reference_standard=reference_standard,
        kind=kind,
        family=family,
        ambient=ambient,
        notes=notes,
        points=points,
        reference_expanded_u=reference_expanded_u,
        reference_k=reference_k,
        extra_u=extra_u,
        extra_label=extra_label,
    )


FormFields = Annotated[CalibrationForm, Depends(form_fields)]


@router.post("/units/{serial}/calibrations")
def add_calibration(
    request: Request,
    serial: str,
    session: SessionDep,
    user: PageTechnician,
    form: FormFields,
) -> Response:
    """Store a calibration typed into the unit page; a form to fix (422) when it cannot be."""
    unit = get_unit(session, serial)
    try:
        record = service.run_calibration(
            session, unit, calibration_from_form(form), recorded_by=user.name
        )
        recompute_flags(session, unit.sensor_type, units=[unit])
    except Invalid as exc:
        session.rollback()
        unit = get_unit(session, serial)
        failed = replace(form, error=exc.message, error_field=(exc.field or "").split(".")[0])
        return render(
            request,
            "units/page.html",
            block="calibration_form",
            status_code=422,
            **unit_context(unit, user, failed),
        )
    session.commit()
    target = f"{unit_url(unit.serial)}?saved={record.id}"
    return redirect(request, target)
