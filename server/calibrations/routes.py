"""JSON API for calibration sessions (/api/v1)."""

from __future__ import annotations

from datetime import datetime
from typing import Annotated

from fastapi import APIRouter, File, Form, UploadFile
from pydantic import ValidationError

from server.accounts.deps import ApiTechnician, ApiViewer
from server.calibrations import service
from server.calibrations.csvfile import MAX_BYTES, parse_points_csv
from server.calibrations.models import SessionKind
from server.calibrations.schemas import CalibrationCreate, CalibrationRead, CurrentCalibrationRead
from server.db import SessionDep
from server.errors import Invalid
from server.fleet.service import get_unit

router = APIRouter(prefix="/api/v1", tags=["calibrations"])


@router.post("/units/{serial}/calibrations", status_code=201)
def create_calibration(
    serial: str, data: CalibrationCreate, session: SessionDep, user: ApiTechnician
) -> CalibrationRead:
    """Store a calibration session, fit it server-side and judge it against the tolerance."""
    unit = get_unit(session, serial)
    record = service.run_calibration(session, unit, data, recorded_by=user.name)
    session.commit()
    return service.calibration_read(record)


@router.post("/units/{serial}/calibrations/csv", status_code=201)
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
    reference: Annotated[str, Form()],
    kind: Annotated[SessionKind, Form()] = SessionKind.periodic,
    family: Annotated[str | None, Form()] = None,
    ambient: Annotated[str | None, Form()] = None,
    notes: Annotated[str | None, Form()] = None,
) -> CalibrationRead:
    """The same as posting JSON, with the points in an uploaded CSV file."""
    points = parse_points_csv(file.file.read(MAX_BYTES + 1))
    try:
        data = CalibrationCreate(
            performed_at=performed_at,
            operator=operator,
            reference=reference,
            kind=kind,
            family=family or None,
            ambient=ambient,
            notes=notes,
            points=points,
        )
    except ValidationError as exc:
        first = exc.errors()[0]
        raise Invalid(f"{first['msg']}", field=".".join(str(p) for p in first["loc"])) from exc
    return create_calibration(serial, data, session, user)


@router.get("/units/{serial}/calibration")
def current_calibration(
    serial: str, session: SessionDep, user: ApiViewer
) -> CurrentCalibrationRead:
    """The unit's current calibration: fit, decision and due date."""
    return service.current_calibration(get_unit(session, serial))
