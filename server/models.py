"""Every ORM model, imported once so that Base.metadata is complete (Alembic, tests)."""

from server.accounts.models import SigninThrottle, Token, User
from server.audit.models import AuditEntry
from server.calibrations.models import CalibrationSession, FitRecord, Point
from server.db import Base
from server.flags.models import Flag, InstallationEvent
from server.fleet.models import SensorType, Unit
from server.idempotency.models import IdempotentResponse
from server.jobs.models import Job
from server.standards.models import ReferenceStandard, StandardCheck

__all__ = [
    "AuditEntry",
    "Base",
    "CalibrationSession",
    "FitRecord",
    "Flag",
    "IdempotentResponse",
    "InstallationEvent",
    "Job",
    "Point",
    "ReferenceStandard",
    "SensorType",
    "SigninThrottle",
    "StandardCheck",
    "Token",
    "Unit",
    "User",
]
