"""Browser pages of sensor types: the list, one type's fleet view (every unit's curve and the
spread of its constants), its settings (editable by admins), and the progress of its refit jobs
(polled by htmx while one runs)."""

from __future__ import annotations

import json
from dataclasses import dataclass, field, replace
from typing import Annotated, Any
from urllib.parse import quote

from fastapi import APIRouter, Depends, Form, Query, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from pydantic import ValidationError
from sqlalchemy import func, select
from sqlalchemy.orm import selectinload

import shared
from server.accounts.deps import PageAdmin, PageViewer
from server.accounts.models import ROLE_RANK, Role, User
from server.calibrations import refits
from server.calibrations.charts import Axes
from server.calibrations.models import CalibrationSession, FitRecord, latest_session, stored_fit
from server.db import ID_MAX, RowId, SessionDep
from server.errors import Conflict, Invalid
from server.flags import fleet as fleet_comparison
from server.flags.models import Flag, FlagKind
from server.fleet import charts, service
from server.fleet.models import NoiseIn, SensorType, Unit, UnitStatus
from server.fleet.schemas import SensorTypeCreate, SensorTypeUpdate
from server.htmx import is_partial, render
from server.jobs import service as jobs
from shared.fleet import MIN_UNITS

router = APIRouter(include_in_schema=False)

NUMBER_FIELDS = {  # form field -> words for errors
    "tolerance_abs": "absolute tolerance",
    "tolerance_rel": "relative tolerance",
    "drift_limit_abs": "drift limit",
    "tur": "required TUR",
    "reading_resolution": "reading resolution",
    "guard_multiple": "guard band multiple",
}


def type_url(name: str) -> str:
    return f"/types/{quote(name, safe='')}"


@dataclass(frozen=True, slots=True)
class TypeForm:
    """The settings form as typed (kept on a re-render)."""

    families: list[str]
    family_options: str
    tolerance_abs: str
    tolerance_rel: str
    drift_limit_abs: str
    interval_days: str
    tur: str
    noise_in: str
    reading_resolution: str
    decision_rule: str = "simple"
    guard_multiple: str = "1"
    error: str | None = None
    error_field: str | None = None
    changed: list[str] = field(default_factory=list)

    @classmethod
    def of(cls, st: SensorType) -> TypeForm:
        def text(x: float | None) -> str:
            return "" if x is None else f"{x:g}"

        return cls(
            families=list(st.families),
            family_options=json.dumps(st.family_options) if st.family_options else "",
            tolerance_abs=text(st.tolerance_abs),
            tolerance_rel=text(st.tolerance_rel),
            drift_limit_abs=text(st.drift_limit_abs),
            interval_days=str(st.interval_days),
            tur=text(st.tur),
            noise_in=st.noise_in.value,
            reading_resolution=text(st.reading_resolution),
            decision_rule=st.decision_rule,
            guard_multiple=text(st.guard_multiple),
        )


def _number(text: str, name: str) -> float | None:
    text = text.strip()
    if not text:
        return None
    try:
        return float(text)
    except ValueError:
        raise Invalid(
            f"{NUMBER_FIELDS.get(name, name)}: {text!r} is not a number", field=name
        ) from None


def update_from_form(form: TypeForm) -> SensorTypeUpdate:
    """The form as an update of every editable field; Invalid naming the field at fault."""
    try:
        options = json.loads(form.family_options) if form.family_options.strip() else {}
    except json.JSONDecodeError as exc:
        raise Invalid(f"family options are not JSON: {exc.msg}", field="family_options") from exc
    if not isinstance(options, dict):
        raise Invalid(
            'family options are a JSON object, e.g. {"polynomial": {"degree": 2}}',
            field="family_options",
        )
    if not form.families:
        raise Invalid("check at least one family to fit", field="families")
    interval = form.interval_days.strip()
    if interval and not interval.isdigit():
        raise Invalid(
            f"interval: {interval!r} is not a whole number of days", field="interval_days"
        )
    try:
        return SensorTypeUpdate(
            families=form.families or None,
            family_options=options,
            tolerance_abs=_number(form.tolerance_abs, "tolerance_abs"),
            tolerance_rel=_number(form.tolerance_rel, "tolerance_rel"),
            drift_limit_abs=_number(form.drift_limit_abs, "drift_limit_abs"),
            interval_days=int(interval) if interval else None,
            tur=_number(form.tur, "tur"),
            noise_in=NoiseIn(form.noise_in)
            if form.noise_in in {n.value for n in NoiseIn}
            else None,
            reading_resolution=_number(form.reading_resolution, "reading_resolution"),
            decision_rule="guarded" if form.decision_rule == "guarded" else "simple",
            guard_multiple=_number(form.guard_multiple, "guard_multiple") or 1.0,
        )
    except ValidationError as exc:
        first = exc.errors()[0]
        name = ".".join(str(p) for p in first["loc"])
        what = NUMBER_FIELDS.get(name, name.replace("_", " ")) or "settings"
        raise Invalid(f"{what}: {first['msg']}", field=name or None) from exc


def _catalog_order(chosen: list[str]) -> list[str]:
    """The type's families in its order, then the rest of the catalog by name (a name not in
    the catalog, from a crafted form, is left out: the error names it)."""
    known = [name for name in chosen if name in shared.FAMILIES]
    return known + sorted(set(shared.FAMILIES) - set(known))


def _settings(form: TypeForm) -> dict[str, Any]:
    """What fleet/settings_fields.html needs besides the units: the form and the catalog."""
    return {
        "form": form,
        "families": _catalog_order(form.families),
        "formulas": {name: shared.get_family(name).formula for name in shared.FAMILIES},
        "noise_choices": list(NoiseIn),
    }


def _context(
    session: Any, st: SensorType, user: User, form: TypeForm, job_id: int | None = None
) -> dict[str, Any]:
    units = session.scalar(select(func.count()).where(Unit.sensor_type_id == st.id)) or 0
    return {
        **_settings(form),
        "sensor_type": st,
        "units": units,
        "jobs": refits.jobs_of(session, st),
        "just_started": job_id,
        "fleet_catching_up": fleet_comparison.catching_up(session, st),
        "can_edit": ROLE_RANK[user.role] >= ROLE_RANK[Role.admin],
        "type_url": type_url(st.name),
        "noise_tally": noise_tally(session, st),
    }


def noise_tally(session: Any, st: SensorType) -> dict[str, int]:
    """Of the type's units with a checked current calibration, how many points support each
    noise model (shared.noise_check) and how many disagree with the type's setting."""
    rows = session.execute(
        select(
            CalibrationSession.unit_id,
            CalibrationSession.performed_at,
            CalibrationSession.id,
            FitRecord.noise_check,
        )
        .join(FitRecord, FitRecord.session_id == CalibrationSession.id)
        .join(Unit, Unit.id == CalibrationSession.unit_id)
        .where(
            Unit.sensor_type_id == st.id,
            FitRecord.is_current.is_(True),
            CalibrationSession.voided_at.is_(None),
        )
    ).all()
    latest: dict[int, tuple[Any, int, dict[str, Any] | None]] = {}
    for unit_id, when, sid, check in rows:
        if unit_id not in latest or (when, sid) > latest[unit_id][:2]:
            latest[unit_id] = (when, sid, check)
    tally = {"checked": 0, "value": 0, "reading": 0, "either": 0, "disagree": 0}
    for _, _, check in latest.values():
        if not check:
            continue
        tally["checked"] += 1
        tally[str(check.get("supported", "either"))] += 1
        tally["disagree"] += bool(check.get("disagrees"))
    return tally


def fleet_view(session: Any, st: SensorType) -> dict[str, Any]:
    """The type's fleet card: every calibrated, unretired unit's current curve overlaid, each
    unit's difference from the fleet median against the tolerance, the spread of the most used
    family's constants, and the units with an open fleet_outlier flag.
    From the stored fits only (nothing is refitted)."""
    units = session.scalars(
        select(Unit)
        .where(Unit.sensor_type_id == st.id, Unit.status != UnitStatus.retired)
        .options(selectinload(Unit.sessions).selectinload(CalibrationSession.fits))
        .order_by(Unit.serial)
    ).all()
    flags = {
        f.unit_id: f
        for f in session.scalars(
            select(Flag)
            .join(Flag.unit)
            .where(
                Unit.sensor_type_id == st.id,
                Flag.kind == FlagKind.fleet_outlier,
                Flag.open.is_(True),
            )
            .order_by(Flag.id)
        )
    }
    members = []
    outliers = []
    for unit in units:
        last = latest_session(unit.sessions)
        flag = flags.get(unit.id)
        z = (flag.evidence or {}).get("z") if flag else None
        if flag is not None:
            evidence = flag.evidence or {}
            outliers.append(
                {
                    "serial": unit.serial,
                    "severity": flag.severity.value,
                    "z": z,
                    "at_reading": evidence.get("at_reading"),
                    "value": evidence.get("value"),
                    "center": evidence.get("center"),
                }
            )
        if last is not None:
            members.append(
                charts.Member(
                    serial=unit.serial,
                    fit=stored_fit(last),
                    severity=flag.severity.value if flag else None,
                    z=float(z) if isinstance(z, int | float) else None,
                )
            )
    outliers.sort(key=lambda o: -abs(o["z"]) if isinstance(o["z"], int | float) else 0.0)
    view: dict[str, Any] = {
        "calibrated": len(members),
        "outliers": outliers,
        "curves_json": None,
        "differences_json": None,
        "families": None,
        "parameters": [],
        "more_parameters": 0,
        "min_units": MIN_UNITS,
    }
    if len(members) < 2:
        return view
    axes = Axes(st.quantity, st.value_unit, st.reading_unit)
    families = charts.families_of(members, st.families)
    grid = charts.fleet_grid([m.fit for m in members])  # evaluated once, drawn twice
    differences = charts.difference_figure(
        members, axes, grid, tolerance_abs=st.tolerance_abs, tolerance_rel=st.tolerance_rel
    )
    view.update(
        curves_json=charts.curves_figure(members, axes, grid).to_json(),
        differences_json=differences.to_json() if differences is not None else None,
        families=families,
        parameters=[
            {"name": spread.name, "json": fig.to_json(), "spread": spread}
            for fig, spread in charts.parameter_figures(families)
        ],
        more_parameters=max(0, len(families.param_names) - charts.MAX_PARAMETER_PLOTS),
    )
    return view


@router.get("/types")
def types_page(request: Request, session: SessionDep, user: PageViewer) -> HTMLResponse:
    """Every sensor type with its tolerance, limits and interval, and how many units."""
    counts = dict(
        session.execute(
            select(Unit.sensor_type_id, func.count()).group_by(Unit.sensor_type_id)
        ).all()
    )
    rows = [
        {"type": st, "units": counts.get(st.id, 0), "url": type_url(st.name)}
        for st in service.list_sensor_types(session)
    ]
    return render(request, "fleet/types.html", block="main", rows=rows)


@dataclass(frozen=True, slots=True)
class NewType:
    """The new-type form as typed: what the type is, and its settings."""

    name: str = ""
    quantity: str = ""
    value_unit: str = ""
    reading_unit: str = ""
    reading_min: str = ""
    reading_max: str = ""


NEW_SETTINGS = TypeForm(
    families=[],
    family_options="",
    tolerance_abs="",
    tolerance_rel="",
    drift_limit_abs="",
    interval_days="365",
    tur="4",
    noise_in=NoiseIn.value.value,
    reading_resolution="",
)


def _new_context(new: NewType, form: TypeForm) -> dict[str, Any]:
    return {
        **_settings(form),
        "new": new,
        "value_unit": new.value_unit or "value units",
        "reading_unit": new.reading_unit or "reading units",
    }


@router.get("/types/new")
def new_type_page(request: Request, user: PageAdmin) -> HTMLResponse:
    """A form for a new sensor type (admin)."""
    return render(
        request, "fleet/type_new.html", block="main", **_new_context(NewType(), NEW_SETTINGS)
    )


@router.post("/types")
def create_type(
    request: Request,
    session: SessionDep,
    user: PageAdmin,
    form: SettingsForm,
    name: Annotated[str, Form()] = "",
    quantity: Annotated[str, Form()] = "",
    value_unit: Annotated[str, Form()] = "",
    reading_unit: Annotated[str, Form()] = "",
    reading_min: Annotated[str, Form()] = "",
    reading_max: Annotated[str, Form()] = "",
) -> Response:
    """Create the type and open its page; the form to fix (422) when it cannot be."""
    new = NewType(name, quantity, value_unit, reading_unit, reading_min, reading_max)
    try:
        settings = update_from_form(form)
        try:
            data = SensorTypeCreate(
                name=name,
                quantity=quantity,
                value_unit=value_unit,
                reading_unit=reading_unit,
                reading_min=_required_number(reading_min, "reading_min", "lowest reading"),
                reading_max=_required_number(reading_max, "reading_max", "highest reading"),
                **settings.model_dump(exclude_none=True),
            )
        except ValidationError as exc:
            first = exc.errors()[0]
            field_name = ".".join(str(p) for p in first["loc"])
            message = str(first["msg"]).removeprefix("Value error, ")
            if not field_name:  # a rule across fields
                field_name = "reading_max" if "reading_max" in message else "tolerance_abs"
                raise Invalid(message, field=field_name) from exc
            raise Invalid(f"{field_name.replace('_', ' ')}: {message}", field=field_name) from exc
        created = service.create_sensor_type(session, data, actor=user.name)
    except (Invalid, Conflict) as exc:
        session.rollback()
        bad = replace(form, error=exc.message, error_field=exc.field)
        return render(
            request,
            "fleet/type_new.html",
            block="main",
            status_code=422,
            **_new_context(new, bad),
        )
    session.commit()
    return RedirectResponse(type_url(created.name), status_code=303)


def _required_number(text: str, name: str, words: str) -> float:
    value = _number(text, name)
    if value is None:
        raise Invalid(f"{words}: give a number", field=name)
    return value


@router.get("/types/{name}")
def type_page(
    request: Request,
    name: str,
    session: SessionDep,
    user: PageViewer,
    job: Annotated[int | None, Query(ge=1, le=ID_MAX)] = None,
) -> HTMLResponse:
    """One type: its fleet (curves, constants, outliers), refit jobs and settings (a form for
    admins)."""
    st = service.get_sensor_type(session, name)
    return render(
        request,
        "fleet/type.html",
        block="main",
        fleet=fleet_view(session, st),
        **_context(session, st, user, TypeForm.of(st), job),
    )


def settings_form(
    families: Annotated[list[str] | None, Form()] = None,
    family_options: Annotated[str, Form()] = "",
    tolerance_abs: Annotated[str, Form()] = "",
    tolerance_rel: Annotated[str, Form()] = "",
    drift_limit_abs: Annotated[str, Form()] = "",
    interval_days: Annotated[str, Form()] = "",
    tur: Annotated[str, Form()] = "",
    noise_in: Annotated[str, Form()] = "",
    reading_resolution: Annotated[str, Form()] = "",
    decision_rule: Annotated[str, Form()] = "simple",
    guard_multiple: Annotated[str, Form()] = "1",
) -> TypeForm:
    """The settings fields as typed (a type's settings form and the new-type form)."""
    return TypeForm(
        families=list(families or []),
        family_options=family_options,
        tolerance_abs=tolerance_abs,
        tolerance_rel=tolerance_rel,
        drift_limit_abs=drift_limit_abs,
        interval_days=interval_days,
        tur=tur,
        noise_in=noise_in,
        reading_resolution=reading_resolution,
        decision_rule=decision_rule,
        guard_multiple=guard_multiple,
    )


SettingsForm = Annotated[TypeForm, Depends(settings_form)]


@router.post("/types/{name}")
def edit_type(
    request: Request, name: str, session: SessionDep, user: PageAdmin, form: SettingsForm
) -> Response:
    """Save the settings; a change to fitting or acceptance starts a refit job, which the page
    then shows; a form to fix (422) when the settings cannot be used."""
    st = service.get_sensor_type(session, name)
    try:
        change = service.update_sensor_type(session, st, update_from_form(form), actor=user.name)
    except Invalid as exc:
        session.rollback()
        st = service.get_sensor_type(session, name)
        bad = replace(form, error=exc.message, error_field=exc.field)
        return render(
            request,
            "fleet/type.html",
            block="main",
            status_code=422,
            fleet=fleet_view(session, st),
            **_context(session, st, user, bad),
        )
    job = refits.follow_type_change(session, st, change, user.name)
    session.commit()
    if job is not None:
        request.app.state.jobs.submit(job.id)
    where = type_url(st.name) + (f"?job={job.id}" if job else "?saved=1")
    return RedirectResponse(where, status_code=303)


@router.post("/types/{name}/refit")
def refit_type(request: Request, name: str, session: SessionDep, user: PageAdmin) -> Response:
    """Refit every calibration of the type with its current settings (previous fits kept)."""
    st = service.get_sensor_type(session, name)
    job = refits.start_refit(session, st, "refit requested", user.name)
    session.commit()
    request.app.state.jobs.submit(job.id)
    return RedirectResponse(f"{type_url(st.name)}?job={job.id}", status_code=303)


@router.get("/types/{name}/jobs/{job_id}")
def job_status(
    request: Request, name: str, job_id: RowId, session: SessionDep, user: PageViewer
) -> HTMLResponse:
    """One job's progress: the ``job`` block for htmx polling, the type page otherwise."""
    st = service.get_sensor_type(session, name)
    job = jobs.get_job(session, job_id)
    if job.sensor_type_id != st.id:
        raise Invalid(f"job {job_id} is not a refit of {st.name}", field="job")
    return render(
        request,
        "fleet/type.html",
        block="job",
        job=job,
        fleet=None if is_partial(request) else fleet_view(session, st),
        **_context(session, st, user, TypeForm.of(st), job_id),
    )
