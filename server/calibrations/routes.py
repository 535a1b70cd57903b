"""JSON API for calibration sessions (/api/v1)."""

from __future__ import annotations

import io
from datetime import datetime
from typing import Annotated

from fastapi import APIRouter, Depends, File, Form, Header, Query, Response, UploadFile
from fastapi.responses import JSONResponse
from pydantic import ValidationError
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from server import idempotency
from server.accounts.deps import ApiTechnician, ApiViewer
from server.accounts.models import User
from server.calibrations import service
from server.calibrations.csvfile import MAX_BYTES, parse_points_csv
from server.calibrations.history import import_history
from server.calibrations.history_csv import read_history
from server.calibrations.models import SessionKind, latest_session
from server.calibrations.schemas import (
    CalibrationCreate,
    CalibrationPreviewRead,
    CalibrationRead,
    CalibrationSummaryRead,
    CurrentCalibrationRead,
    HistoryImportRead,
    HistoryProblemRead,
    VoidCreate,
)
from server.db import RowId, SessionDep
from server.errors import Invalid
from server.flags.schemas import FlagRead
from server.flags.service import flag_read, flags_of, recompute_flags
from server.fleet.models import Unit
from server.fleet.service import get_unit
from server.idempotency.models import IdempotentResponse
from server.pagination import Page, PageParams, page_params

router = APIRouter(prefix="/api/v1", tags=["calibrations"])

HISTORY_MAX_BYTES = 50_000_000  # larger histories: `sensorledger import-history`

BudgetReading = Annotated[
    float | None,
    Query(
        allow_inf_nan=False,
        description="reading (reading units, inside the valid range) at which to state the "
        "uncertainty budget; default: the middle of the valid range",
    ),
]


IdempotencyKey = Annotated[
    str | None,
    Header(
        alias=idempotency.HEADER,
        description="any unique text (e.g. a UUID) per session; a retry of the same POST with "
        "the same key stores nothing twice and answers what the first one answered",
    ),
]


@router.post("/units/{serial}/calibrations/preview", response_model=CalibrationPreviewRead)
def preview_calibration(
    serial: str, data: CalibrationCreate, session: SessionDep, user: ApiTechnician
) -> CalibrationPreviewRead:
    """Fit and judge the points as a save would, and store nothing: a bench script shows this
    before it asks to save."""
    return service.preview_read(get_unit(session, serial), data)


@router.post(
    "/units/{serial}/calibrations",
    status_code=201,
    response_model=CalibrationRead,
    responses={201: {"headers": {"Idempotency-Replayed": {"description": "true on a replay"}}}},
)
def create_calibration(
    serial: str,
    data: CalibrationCreate,
    session: SessionDep,
    user: ApiTechnician,
    idempotency_key: IdempotencyKey = None,
) -> Response:
    """Store a calibration session, fit it server-side and judge it against the tolerance.
    The unit's own flags come back at once; the comparison with its siblings follows within
    seconds (a background job)."""
    return _store(serial, data, session, user, idempotency_key, data.model_dump_json().encode())


def _store(
    serial: str,
    data: CalibrationCreate,
    session: Session,
    user: User,
    key: str | None,
    request_body: bytes,
) -> Response:
    key = idempotency.check_key(key)
    route = f"POST /api/v1/units/{serial}/calibrations"
    digest = idempotency.digest(request_body)
    if key is not None:
        earlier = idempotency.find(session, user.name, key, route, digest)
        if earlier is not None:
            return _replay(earlier)
    unit = get_unit(session, serial, lock=True)
    if key is not None:
        # a request with the same key may have committed while this one waited for the unit
        # (PostgreSQL's row lock; each statement sees what was committed before it)
        earlier = idempotency.find(session, user.name, key, route, digest)
        if earlier is not None:
            return _replay(earlier)
    record = service.run_calibration(session, unit, data, recorded_by=user.name)
    recompute_flags(session, unit.sensor_type, units=[unit])
    answer = service.calibration_read(record).model_copy(update={"flags": open_flags(unit)})
    body = answer.model_dump(mode="json")
    try:
        if key is not None:
            idempotency.keep(session, user.name, key, route, digest, 201, body)
        session.commit()
    except IntegrityError:
        if key is None:
            raise
        # the same key, stored by a request that ran at the same time (PostgreSQL raises at the
        # insert, once the other transaction committed): roll this one back and replay that
        session.rollback()
        earlier = idempotency.find(session, user.name, key, route, digest)
        if earlier is None:
            raise
        return _replay(earlier)
    return JSONResponse(body, 201)


def _replay(earlier: IdempotentResponse) -> JSONResponse:
    """The answer stored for an earlier request with the same Idempotency-Key."""
    return JSONResponse(earlier.body, earlier.status_code, headers={"Idempotency-Replayed": "true"})


@router.post("/units/{serial}/calibrations/csv", status_code=201, response_model=CalibrationRead)
def create_calibration_from_csv(
    serial: str,
    session: SessionDep,
    user: ApiTechnician,
    file: Annotated[
        UploadFile,
        File(
            description="CSV with a header row: reference_value,reading [,excluded,exclude_reason]"
        ),
    ],
    performed_at: Annotated[datetime, Form()],
    operator: Annotated[str, Form()],
    reference: Annotated[str | None, Form(description="free text; or reference_standard")] = None,
    reference_standard: Annotated[
        str | None, Form(description="a standard of the register, instead of reference")
    ] = None,
    kind: Annotated[SessionKind, Form()] = SessionKind.periodic,
    family: Annotated[str | None, Form()] = None,
    ambient: Annotated[str | None, Form()] = None,
    notes: Annotated[str | None, Form()] = None,
    reference_expanded_u: Annotated[
        float | None, Form(description="U of the reference standard, value units")
    ] = None,
    reference_k: Annotated[float | None, Form(description="coverage factor of that U")] = None,
    extra_u: Annotated[
        float | None, Form(description="one more standard uncertainty, value units")
    ] = None,
    extra_label: Annotated[str | None, Form(description="what extra_u is")] = None,
    idempotency_key: IdempotencyKey = None,
) -> Response:
    """The same as posting JSON, with the points in an uploaded CSV file."""
    raw = file.file.read(MAX_BYTES + 1)
    points = parse_points_csv(raw)
    try:
        data = CalibrationCreate(
            performed_at=performed_at,
            operator=operator,
            reference=reference or None,
            reference_standard=reference_standard or None,
            kind=kind,
            family=family or None,
            ambient=ambient,
            notes=notes,
            reference_expanded_u=reference_expanded_u,
            **({"reference_k": reference_k} if reference_k is not None else {}),
            extra_u=extra_u,
            extra_label=extra_label,
            points=points,
        )
    except ValidationError as exc:
        first = exc.errors()[0]
        field = ".".join(str(p) for p in first["loc"])
        raise Invalid(f"{field}: {first['msg']}", field=field) from exc
    return _store(
        serial, data, session, user, idempotency_key, b"csv\n" + data.model_dump_json().encode()
    )


@router.get("/units/{serial}/calibrations")
def list_calibrations(
    serial: str,
    session: SessionDep,
    user: ApiViewer,
    page: Annotated[PageParams, Depends(page_params)],
) -> Page[CalibrationSummaryRead]:
    """The unit's calibration sessions, newest first, voided ones included."""
    unit = get_unit(session, serial)
    records = sorted(unit.sessions, key=lambda s: (s.performed_at, s.id), reverse=True)
    current = latest_session(unit.sessions)
    return Page(
        items=[
            service.summary_read(r, current)
            for r in records[page.offset : page.offset + page.per_page]
        ],
        total=len(records),
        page=page.page,
        per_page=page.per_page,
    )


@router.get("/units/{serial}/calibrations/{session_id}")
def get_calibration(
    serial: str,
    session_id: RowId,
    session: SessionDep,
    user: ApiViewer,
    reading: BudgetReading = None,
) -> CalibrationRead:
    """One calibration session of the unit, voided or not: points, current fit, decision,
    ranking, diagnostics, budget, and every fit it has had."""
    unit = get_unit(session, serial)
    return service.calibration_read(service.get_session_of(unit, session_id), reading)


@router.post("/units/{serial}/calibrations/{session_id}/void")
def void_calibration(
    serial: str, session_id: RowId, data: VoidCreate, session: SessionDep, user: ApiTechnician
) -> CalibrationRead:
    """Void a mistaken calibration with a reason: it is kept (and shown struck out) but no longer
    counts; the unit's flags, due date and current calibration follow."""
    unit = get_unit(session, serial, lock=True)
    record = service.get_session_of(unit, session_id)
    service.void_session(session, record, data.reason, user.name)
    recompute_flags(session, unit.sensor_type, units=[unit])
    session.commit()
    return service.calibration_read(record)


@router.get("/units/{serial}/calibration")
def current_calibration(
    serial: str,
    session: SessionDep,
    user: ApiViewer,
    reading: BudgetReading = None,
) -> CurrentCalibrationRead:
    """The unit's current calibration: fit, decision, ranking, diagnostics, budget, due date,
    open flags."""
    unit = get_unit(session, serial)
    found = service.current_calibration(unit, reading)
    found.calibration.flags = open_flags(unit)
    return found


@router.post("/history")
def import_history_file(
    session: SessionDep,
    user: ApiTechnician,
    file: Annotated[
        UploadFile,
        File(
            description="CSV, one row per point, with a header row: serial, sensor_type, "
            "performed_at, operator, reference, reference_value, reading [, kind, notes]"
        ),
    ],
) -> HistoryImportRead:
    """Store a whole calibration history from one long CSV file (at most 50 MB; for more, or to
    watch the progress, use `sensorledger import-history` on the server). Rows with the same
    serial, performed_at, operator and reference form one session; missing units are created;
    each session is fitted as a single upload would be and stored whole or not at all; sessions
    stored already are skipped. Rows that cannot be stored are listed in ``problems`` by line
    number. Committed in batches as it goes (a failure keeps the batches stored before it)."""
    if file.size is not None and file.size > HISTORY_MAX_BYTES:
        raise Invalid(
            f"the file is larger than {HISTORY_MAX_BYTES // 1_000_000} MB; import it with "
            f"`sensorledger import-history` on the server",
            field="file",
        )
    parsed = read_history(io.TextIOWrapper(file.file, encoding="utf-8-sig", newline=""))
    result = import_history(session, parsed, actor=user.name, source=file.filename or "upload")
    return HistoryImportRead(
        source=result.source,
        rows=result.rows,
        sessions=result.sessions,
        stored=result.stored,
        points=result.points,
        skipped=result.skipped,
        rejected=result.rejected,
        rejected_rows=result.rejected_rows,
        units_created=result.units_created,
        flag_types=result.flag_types,
        problems=[
            HistoryProblemRead(
                line=p.line,
                session_lines=p.session_lines,
                serial=p.serial,
                performed_at=p.performed_at,
                reason=p.reason,
            )
            for p in result.problems
        ],
        summary=result.summary(),
    )


def open_flags(unit: Unit) -> list[FlagRead]:
    return [flag_read(f) for f in flags_of(unit) if f.open]
