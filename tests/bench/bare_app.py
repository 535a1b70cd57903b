"""The pages bench's baseline: a bare FastAPI + SQLAlchemy app reading one unit row.

Served like the real app (``uvicorn --factory tests.bench.bare_app:create_bare_app``, same engine
settings via ``server.db.make_engine``, a session per request from a dependency, a sync route in
the thread pool), on the database named by ``SENSORLEDGER_BENCH_BARE_URL``. No sign-in, no joins:
the floor a unit lookup can approach.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from datetime import date
from typing import Annotated

from fastapi import Depends, FastAPI, HTTPException, Request
from pydantic import BaseModel
from sqlalchemy import select
from sqlalchemy.orm import Session

import server.models  # noqa: F401  (every mapped class, so the relationships resolve)
from server.db import make_engine, make_sessionmaker
from server.fleet.models import Unit

URL_VARIABLE = "SENSORLEDGER_BENCH_BARE_URL"


class BareUnit(BaseModel):
    serial: str
    status: str
    installed_in: str | None
    due_on: date | None


def _session(request: Request) -> Iterator[Session]:
    with request.app.state.sessionmaker() as session:
        yield session


def create_bare_app() -> FastAPI:
    app = FastAPI()
    app.state.sessionmaker = make_sessionmaker(make_engine(os.environ[URL_VARIABLE]))

    @app.get("/units/{serial}")
    def unit(serial: str, session: Annotated[Session, Depends(_session)]) -> BareUnit:
        found = session.scalar(select(Unit).where(Unit.serial == serial))
        if found is None:
            raise HTTPException(404)
        return BareUnit(
            serial=found.serial,
            status=found.status.value,
            installed_in=found.installed_in,
            due_on=found.due_on,
        )

    return app
