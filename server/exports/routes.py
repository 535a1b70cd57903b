"""JSON API: exports of a unit's current calibration (/api/v1)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Annotated

from fastapi import APIRouter, Depends, Query
from fastapi.responses import Response

from server.accounts.deps import ApiViewer
from server.db import SessionDep
from server.exports import service
from server.exports.schemas import ERRORS, ConversionTableRead
from server.fleet.models import Unit
from server.fleet.service import get_unit

router = APIRouter(prefix="/api/v1", tags=["exports"])

Step = Annotated[
    float | None,
    Query(
        gt=0,
        allow_inf_nan=False,
        description="reading units between rows; default: 1 (every code) for a type read in "
        "whole codes, else the smallest 1-2-5 step giving at most 200 rows",
    ),
]
ReadingMin = Annotated[
    float | None,
    Query(allow_inf_nan=False, description="first row; default: the sensor type's reading_min"),
]
ReadingMax = Annotated[
    float | None,
    Query(allow_inf_nan=False, description="last row; default: the sensor type's reading_max"),
]
Level = Annotated[
    float | None,
    Query(
        gt=0,
        lt=1,
        description="coverage level of the expanded uncertainty (Student t); default k = 2",
    ),
]
LutMaxError = Annotated[
    float | None,
    Query(
        gt=0,
        allow_inf_nan=False,
        description="worst error the lookup table may make, value units; default "
        "max(rse / 10, 0.002)",
    ),
]


@dataclass(frozen=True)
class TableQuery:
    """The query of a conversion-table download (API and page alike)."""

    step: Step = None
    reading_min: ReadingMin = None
    reading_max: ReadingMax = None
    level: Level = None


TableParams = Annotated[TableQuery, Depends()]


def table_response(unit: Unit, fmt: str, query: TableQuery) -> Response:
    found = service.table_download(
        unit, fmt, query.step, query.reading_min, query.reading_max, query.level
    )
    return download_response(found)


def download_response(found: service.Download) -> Response:
    return Response(found.content, media_type=found.media_type, headers=found.headers)


def _text(media_type: str, description: str) -> dict[int | str, dict[str, object]]:
    return {
        200: {"content": {media_type: {"schema": {"type": "string"}}}, "description": description},
        **ERRORS,
    }


@router.get(
    "/units/{serial}/table.csv",
    response_class=Response,
    responses=_text("text/csv", "reading, value, expanded uncertainty, status; one row a reading"),
)
def table_csv(serial: str, session: SessionDep, user: ApiViewer, query: TableParams) -> Response:
    """The conversion table of the unit's current calibration, as CSV (an attachment)."""
    return table_response(get_unit(session, serial), "csv", query)


@router.get(
    "/units/{serial}/table.json",
    response_class=Response,
    responses={200: {"model": ConversionTableRead, "description": "the table"}, **ERRORS},
)
def table_json(serial: str, session: SessionDep, user: ApiViewer, query: TableParams) -> Response:
    """The conversion table of the unit's current calibration, as JSON (an attachment)."""
    return table_response(get_unit(session, serial), "json", query)


@router.get(
    "/units/{serial}/firmware.h",
    response_class=Response,
    responses=_text("text/x-c", "a C99 header: float, integer-only and lookup-table forms"),
)
def firmware_h(
    serial: str, session: SessionDep, user: ApiViewer, lut_max_error: LutMaxError = None
) -> Response:
    """A C header converting the unit's reading codes to values (integer reading spans only:
    otherwise 422 with the reason)."""
    unit = get_unit(session, serial)
    return download_response(service.firmware_header(unit, lut_max_error))
