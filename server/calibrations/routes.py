"""JSON API for calibration sessions (/api/v1)."""

from __future__ import annotations

from fastapi import APIRouter

from server.accounts.deps import ApiTechnician, ApiViewer
from server.calibrations import service
from server.calibrations.schemas import CalibrationCreate, CalibrationRead, CurrentCalibrationRead
from server.db import SessionDep
from server.fleet.service import get_unit

router = APIRouter(prefix="/api/v1", tags=["calibrations"])


@router.post("/units/{serial}/calibrations", status_code=201)
def create_calibration(serial: str, data: CalibrationCreate, session: SessionDep,
                       user: ApiTechnician) -> CalibrationRead:
    """Store a calibration session, fit it server-side and judge it against the tolerance."""
    unit = get_unit(session, serial)
    record = service.run_calibration(session, unit, data, recorded_by=user.name)
    session.commit()
    return service.calibration_read(record)


@router.get("/units/{serial}/calibration")
def current_calibration(serial: str, session: SessionDep, user: ApiViewer
                        ) -> CurrentCalibrationRead:
    """The unit's current calibration: fit, decision and due date."""
    return service.current_calibration(get_unit(session, serial))
