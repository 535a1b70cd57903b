"""create_app(): the FastAPI application, its database and its routes."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from pathlib import Path

import plotly
from fastapi import Depends, FastAPI
from fastapi.responses import FileResponse
from fastapi.staticfiles import StaticFiles

from server import api_docs, errors
from server.accounts import admin_pages, csrf
from server.accounts import pages as account_pages
from server.audit import routes as audit_routes
from server.calibrations import calibrate_pages, refits
from server.calibrations import pages as calibration_pages
from server.calibrations import routes as calibration_routes
from server.config import Settings
from server.db import make_engine, make_sessionmaker
from server.exports import pages as export_pages
from server.exports import routes as export_routes
from server.flags import pages as flag_pages
from server.flags import routes as flag_routes
from server.flags.fleet import run_fleet_job
from server.flags.service import bring_due_dates_up, queue_sweep, run_sweep_job, sweep_overdue
from server.fleet import pages as fleet_pages
from server.fleet import receive_pages, type_pages
from server.fleet import routes as fleet_routes
from server.htmx import WEB
from server.jobs.models import JobKind
from server.jobs.runner import JobRunner
from server.migrate import upgrade
from server.standards import pages as standard_pages
from server.standards import routes as standard_routes

SWEEP_EVERY_S = 3600.0  # how often units that time alone made overdue get their flag
PLOTLY_JS = Path(plotly.__file__).parent / "package_data" / "plotly.min.js"


def create_app(settings: Settings | None = None, *, migrate: bool = True) -> FastAPI:
    """The app for ``settings``. On start the database is upgraded to the newest schema, due
    dates never stored are stored and the overdue flags time alone has brought are raised;
    while it serves, its job runner claims and runs queued jobs (any process may) and an
    overdue sweep is queued hourly."""
    settings = settings or Settings()
    engine = make_engine(settings.database_url, busy_timeout_ms=settings.sqlite_busy_timeout_ms)
    if migrate:
        upgrade(engine)

    factory = make_sessionmaker(engine)
    read_factory = make_sessionmaker(engine, read_only=True)
    if migrate:
        with factory() as session:
            if bring_due_dates_up(session) + sweep_overdue(session):
                session.commit()
    jobs = JobRunner(
        factory,
        read_factory,
        {
            JobKind.refit: refits.run_refit,
            JobKind.fleet: run_fleet_job,
            JobKind.overdue_sweep: run_sweep_job,
        },
        poll_s=settings.job_poll_s,
        stale_after_s=settings.job_stale_after_s,
    )

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        jobs.start()
        jobs.every(SWEEP_EVERY_S, lambda: queue_sweep(factory), "overdue sweep")
        yield
        jobs.shutdown()  # a running job stops and goes back to the queue for the next start
        engine.dispose()

    app = FastAPI(
        title="sensorledger",
        summary="Calibration records, fitting and hand-off for a fleet of sensors",
        version="0.1.0",
        lifespan=lifespan,
        docs_url=None,  # served by server/api_docs.py from vendored files
        redoc_url=None,
        responses=errors.PROBLEMS,
        dependencies=[Depends(csrf.check)],  # every route, pages added later too
    )
    app.state.settings = settings
    app.state.engine = engine
    app.state.sessionmaker = factory
    app.state.read_sessionmaker = read_factory
    app.state.jobs = jobs
    errors.install(app)
    csrf.install(app)
    api_docs.install(app)

    @app.get("/static/vendor/plotly.min.js", include_in_schema=False)
    def plotly_js() -> FileResponse:
        """plotly.js as bundled in the installed plotly package: nothing leaves the machine."""
        return FileResponse(
            PLOTLY_JS,
            media_type="text/javascript",
            headers={"Cache-Control": "public, max-age=86400"},
        )

    app.mount("/static", StaticFiles(directory=WEB / "static"), name="static")
    for module in (
        fleet_routes,
        calibration_routes,
        export_routes,
        flag_routes,
        audit_routes,
        standard_routes,
        account_pages,
        admin_pages,
        fleet_pages,
        type_pages,
        receive_pages,
        calibration_pages,
        calibrate_pages,
        export_pages,
        flag_pages,
        standard_pages,
    ):
        app.include_router(module.router)
    return app
