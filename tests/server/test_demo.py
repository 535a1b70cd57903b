"""The demo fleet: complete, deterministic, and holding exactly the stories it promises.

Loaded once per backend (a SQLite file, and PostgreSQL when SENSORLEDGER_TEST_PG_URL is set).
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from itertools import pairwise

import numpy as np
import pytest
from sqlalchemy import select
from sqlalchemy.orm import Session, selectinload

import shared
from server.accounts.models import Role, User
from server.accounts.service import check_password
from server.calibrations.models import CalibrationSession, SessionKind
from server.db import make_engine, make_sessionmaker
from server.demo import (
    DEMO_PASSWORD,
    DRIFTED_SERIAL,
    NOISY_SERIAL,
    ODD_SERIAL,
    QUARANTINED_SERIAL,
    DemoSummary,
    load_demo,
)
from server.errors import Conflict
from server.fleet.models import SensorType, Unit, UnitStatus
from server.migrate import upgrade
from tests.conftest import fresh_pg_database

GRID = 400  # points on which two curves are compared


@dataclass
class Demo:
    summary: DemoSummary
    session: Session

    def units(self, type_name: str | None = None) -> list[Unit]:
        query = select(Unit).options(
            selectinload(Unit.sensor_type),
            selectinload(Unit.sessions).selectinload(CalibrationSession.fits),
        )
        if type_name:
            query = query.join(Unit.sensor_type).where(SensorType.name == type_name)
        return list(self.session.scalars(query.order_by(Unit.serial)))

    def types(self) -> list[SensorType]:
        return list(self.session.scalars(select(SensorType).order_by(SensorType.name)))


def _load(url: str) -> DemoSummary:
    engine = make_engine(url)
    upgrade(engine)
    with make_sessionmaker(engine)() as session:
        summary = load_demo(session)
        session.commit()
    engine.dispose()
    return summary


@pytest.fixture(
    scope="module", params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]
)
def demo(
    request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[Demo]:
    """The demo loaded into a fresh database of each backend, read through one session."""

    def opened(url: str) -> Iterator[Demo]:
        summary = _load(url)
        engine = make_engine(url)
        with make_sessionmaker(engine)() as session:
            yield Demo(summary, session)
        engine.dispose()

    if request.param == "sqlite":
        yield from opened(f"sqlite:///{tmp_path_factory.mktemp('demo') / 'demo.db'}")
    else:
        with fresh_pg_database() as url:
            yield from opened(url)


def fits(unit: Unit) -> list[shared.Fit]:
    """The unit's current fits, oldest session first."""
    ordered = sorted(unit.sessions, key=lambda s: (s.performed_at, s.id))
    return [shared.Fit.from_dict(s.current_fit.result) for s in ordered if s.current_fit]


def largest_deviation(old: shared.Fit, new: shared.Fit) -> float:
    """Largest |difference| of two curves over their common valid range, in value units."""
    lo = max(old.valid_range[0], new.valid_range[0])
    hi = min(old.valid_range[1], new.valid_range[1])
    assert lo < hi, "the two calibrations share no range"
    grid = np.linspace(lo, hi, GRID)
    return float(np.max(np.abs(new.to_value(grid) - old.to_value(grid))))


def worst_as_found(old: shared.Fit, new: shared.Fit, sensor_type: SensorType) -> float:
    """The old curve applied to the new points: largest error as a fraction of the tolerance."""
    used = new.used
    error = np.abs(old.to_value(new.reading[used], extrapolate=True) - new.value[used])
    allowed = (sensor_type.tolerance_abs or 0) + (sensor_type.tolerance_rel or 0) / 100 * np.abs(
        new.value[used]
    )
    return float(np.max(error / allowed))


def robust_z(values: np.ndarray) -> np.ndarray:
    """(x - median) / (1.4826 MAD) along the first axis (ISO 13528 style)."""
    median = np.median(values, axis=0)
    mad = 1.4826 * np.median(np.abs(values - median), axis=0)
    return (values - median) / mad


def test_demo_fills_an_empty_database(demo: Demo) -> None:
    types = demo.types()
    units = demo.units()
    assert len(types) == 3 == demo.summary.sensor_types
    assert {t.quantity for t in types} == {"distance", "angle", "force"}
    assert 36 <= len(units) <= 44 and len(units) == demo.summary.units
    assert all(1 <= len(u.sessions) <= 3 for u in units)
    assert all(s.current_fit is not None for u in units for s in u.sessions)
    assert sum(len(u.sessions) for u in units) == demo.summary.sessions
    assert {s.kind for u in units for s in u.sessions} == {
        SessionKind.incoming,
        SessionKind.periodic,
    }
    passed = sum(s.current_fit.passed for u in units for s in u.sessions)
    assert passed == demo.summary.passed
    assert demo.summary.failed >= 1, "a few sessions fail honestly"
    assert passed >= 0.9 * demo.summary.sessions, "most sessions pass"
    by_status = {status: [u for u in units if u.status == status] for status in UnitStatus}
    assert [u.serial for u in by_status[UnitStatus.quarantined]] == [QUARANTINED_SERIAL]
    assert by_status[UnitStatus.installed] and by_status[UnitStatus.in_stock]
    assert all(u.installed_in for u in by_status[UnitStatus.installed])
    users = {u.name: u for u in demo.session.scalars(select(User))}
    assert users["demo"].role == Role.admin
    assert check_password(DEMO_PASSWORD, users["demo"].password_hash)
    assert Role.technician in {u.role for u in users.values()}


def test_the_demo_goes_only_into_an_empty_database(demo: Demo) -> None:
    with pytest.raises(Conflict, match="empty database"):
        load_demo(demo.session)
    demo.session.rollback()


def test_every_rangefinder_session_excludes_its_foldback_points(demo: Demo) -> None:
    rangefinders = [t for t in demo.types() if t.families == ["inverse_offset"]]
    assert len(rangefinders) == 1
    units = demo.units(rangefinders[0].name)
    incoming = [s for u in units for s in u.sessions if s.kind == SessionKind.incoming]
    assert len(incoming) == len(units)
    for session in (s for u in units for s in u.sessions):
        fit = shared.Fit.from_dict(session.current_fit.result)
        assert len(fit.excluded) >= 2, session.unit.serial
        assert all("fold-back" in reason for _, reason in fit.excluded)
        shortest_used = fit.value[fit.used].min()
        assert all(fit.value[i] < shortest_used for i, _ in fit.excluded)


def test_only_the_drifted_unit_moves_past_its_drift_limit(demo: Demo) -> None:
    drifts: dict[str, list[float]] = {}
    limits: dict[str, float] = {}
    for unit in demo.units():
        history = fits(unit)
        drifts[unit.serial] = [largest_deviation(a, b) for a, b in pairwise(history)]
        limits[unit.serial] = unit.sensor_type.drift_limit_abs
    drifted = drifts.pop(DRIFTED_SERIAL)
    assert drifted[-1] > 3 * limits[DRIFTED_SERIAL], drifted
    assert all(d <= limits[DRIFTED_SERIAL] for d in drifted[:-1]), "it drifted only lately"
    compared = {serial: d for serial, d in drifts.items() if d}
    assert len(compared) >= 10, "ordinary units with a history to compare"
    assert all(max(d) <= limits[serial] for serial, d in compared.items()), compared
    assert demo.summary.drifted_serial == DRIFTED_SERIAL


def test_only_the_drifted_unit_was_out_of_tolerance_in_service(demo: Demo) -> None:
    as_found = {}
    for unit in demo.units():
        history = fits(unit)
        if len(history) > 1:
            as_found[unit.serial] = worst_as_found(history[-2], history[-1], unit.sensor_type)
    assert as_found.pop(DRIFTED_SERIAL) > 1.5
    assert max(as_found.values()) < 0.5, as_found


def test_only_the_odd_unit_reads_unlike_its_siblings(demo: Demo) -> None:
    flagged = []
    for sensor_type in demo.types():
        current = {u.serial: fits(u)[-1] for u in demo.units(sensor_type.name)}
        lo = max(f.valid_range[0] for f in current.values())
        hi = min(f.valid_range[1] for f in current.values())
        readings = np.linspace(lo, hi, 7)
        z = robust_z(np.array([f.to_value(readings) for f in current.values()]))
        flagged += [s for s, row in zip(current, z, strict=True) if np.max(np.abs(row)) >= 3]
    assert flagged == [ODD_SERIAL]

    odd_type = next(u.sensor_type.name for u in demo.units() if u.serial == ODD_SERIAL)
    k = {u.serial: fits(u)[-1].params["k"] for u in demo.units(odd_type)}
    siblings = np.array([v for s, v in k.items() if s != ODD_SERIAL])
    median = float(np.median(siblings))
    assert abs(k[ODD_SERIAL] - median) > 0.15 * median
    assert abs(robust_z(np.array(list(k.values())))[list(k).index(ODD_SERIAL)]) > 5


def test_loading_is_deterministic(demo: Demo, tmp_path) -> None:
    """A second load into another database (SQLite) gives identical numbers, bit for bit."""
    url = f"sqlite:///{tmp_path / 'again.db'}"
    _load(url)
    engine = make_engine(url)

    def snapshot(session: Session) -> dict[tuple[str, str], dict[str, float]]:
        rows = session.scalars(
            select(CalibrationSession).options(
                selectinload(CalibrationSession.unit), selectinload(CalibrationSession.fits)
            )
        )
        return {
            (s.unit.serial, s.performed_at.isoformat()): s.current_fit.result["params"]
            for s in rows
        }

    with make_sessionmaker(engine)() as again:
        assert snapshot(again) == snapshot(demo.session)
    engine.dispose()


def test_noise_in_the_reading_type_b_inputs_and_the_ranking(demo: Demo) -> None:
    """Every type fits with the noise in the reading and states its resolution; every session
    records its reference standard; the load cell's two families are ranked, and the only
    failures are the two the story sets up."""
    assert all(t.noise_in == "reading" and t.reading_resolution for t in demo.types())
    for unit in demo.units():
        for s in unit.sessions:
            assert s.reference_expanded_u and s.reference_k == 2.0, unit.serial
            assert s.current_fit.result["noise"] == "reading"
            assert s.current_fit.ranking["chosen_because"] == "recommended"
            assert s.current_fit.diagnostics is not None
    load_cell = next(t for t in demo.types() if t.quantity == "force")
    for unit in demo.units(load_cell.name):
        for s in unit.sessions:
            ranking = s.current_fit.ranking
            assert [c["family"] for c in ranking["candidates"]] == ["polynomial", "line"]
            assert ranking["recommended"] == "polynomial(degree=2)"
    assert set(demo.summary.failed_serials) == {QUARANTINED_SERIAL, NOISY_SERIAL}


def test_the_demo_raises_the_flags_its_story_promises(demo: Demo) -> None:
    """load_demo recomputes flags: the drifted unit has a drift flag (and an out-of-tolerance-
    in-service flag naming its kit), the odd unit a fleet_outlier action flag, and no other unit
    has either."""
    from server.flags.models import Flag

    found = [
        (f.unit.serial, f.kind.value, f.severity.value, f)
        for f in demo.session.scalars(
            select(Flag).options(selectinload(Flag.unit)).where(Flag.open.is_(True))
        )
    ]
    drift = [(s, sev) for s, k, sev, _ in found if k == "drift"]
    assert drift == [(DRIFTED_SERIAL, "action")]
    outliers = [(s, sev) for s, k, sev, _ in found if k == "fleet_outlier"]
    assert (ODD_SERIAL, "action") in outliers
    assert [s for s, sev in outliers if sev == "action"] == [ODD_SERIAL]
    [oot] = [f for s, k, _, f in found if k == "out_of_tolerance_in_service"]
    assert oot.unit.serial == DRIFTED_SERIAL
    assert [p["location"] for p in oot.evidence["installations"]] == ["kit 02 / left bumper"]
    failed = {s for s, k, _, _ in found if k == "failed_acceptance"}
    assert QUARANTINED_SERIAL in failed and NOISY_SERIAL in failed


def test_the_demo_register_and_its_suspect_standard(demo: Demo) -> None:
    """Every session names its type's standard of the register; DW-20, found out of tolerance at
    the end of the story, flags exactly the load cells whose current calibration is on or after
    its last good check (2025-11-03), each with where it is installed."""
    from datetime import date

    from server.flags.models import Flag, FlagKind
    from server.standards.models import ReferenceStandard

    names = {s.name for s in demo.session.scalars(select(ReferenceStandard))}
    assert {"DJ-1", "IH-2", "DW-20", "TH-5"} <= names
    for unit in demo.units():
        for s in unit.sessions:
            assert s.reference_standard_id is not None and s.reference in names, unit.serial
    load_cell = next(t for t in demo.types() if t.quantity == "force")
    expected = {
        u.serial
        for u in demo.units(load_cell.name)
        if max(s.performed_at for s in u.sessions).date() >= date(2025, 11, 3)
    }
    flags = list(
        demo.session.scalars(
            select(Flag)
            .options(selectinload(Flag.unit))
            .where(Flag.kind == FlagKind.reference_suspect, Flag.open.is_(True))
        )
    )
    assert {f.unit.serial for f in flags} == expected and len(expected) >= 5
    assert demo.summary.suspect_flagged == len(expected)
    assert all(f.evidence["standard"] == "DW-20" for f in flags)
    installed = [f for f in flags if f.unit.installed_in]
    assert installed and all(f.evidence["installed_in"] == f.unit.installed_in for f in installed)
