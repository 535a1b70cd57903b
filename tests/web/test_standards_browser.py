"""The register's pages in Chromium, at a bench laptop's width and a phone's (390 px, no sideways
scroll): the list with an overdue standard marked in words and an icon, a failed check recorded
through the standard's page flagging the unit that depends on it, the CSV download, the picker in
the calibration form, and Needs attention naming the standard.

The module adds its own standards and unit to the shared browser database and takes its flags and
standards away afterwards (the unit stays, with no flags)."""

from __future__ import annotations

import csv
import io
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import delete, select, update

from server.calibrations import service as calibrations
from server.calibrations.models import CalibrationSession, SessionKind
from server.calibrations.schemas import CalibrationCreate, PointIn
from server.db import make_engine, make_sessionmaker
from server.flags.models import Flag, FlagKind
from server.fleet import service as fleet
from server.fleet.models import UnitStatus
from server.fleet.schemas import UnitCreate
from server.standards import service as standards
from server.standards.models import ReferenceStandard, StandardCheck
from server.standards.schemas import StandardCreate
from tests.web.seed import POT_TYPE, TECHNICIAN, Fleet

pytestmark = pytest.mark.browser
GOOD, LATE = "BR-HEAD-1", "BR-HEAD-LATE"
SERIAL = "POT-STD-01"
PHONE = {"width": 390, "height": 844}
LAPTOP = {"width": 1366, "height": 768}


def _standard(name: str, due_in_days: int) -> StandardCreate:
    today = datetime.now(UTC).date()
    return StandardCreate(
        name=name,
        description="invented indexing head for the browser tests",
        quantity="angle",
        value_unit="deg",
        expanded_u=0.1,
        k=2,
        certificate=f"BR-{name}",
        calibrated_on=today - timedelta(days=300),
        due_on=today + timedelta(days=due_in_days),
    )


@pytest.fixture(scope="module")
def register(live_db: tuple[str, Fleet]) -> Iterator[str]:
    """Two standards (one overdue) and a unit installed in "kit 09 / arm" whose current
    calibration used the good one; the database URL."""
    url, _ = live_db
    engine = make_engine(url)
    factory = make_sessionmaker(engine)
    with factory() as session:
        standards.create_standard(session, _standard(GOOD, 200), TECHNICIAN[0])
        standards.create_standard(session, _standard(LATE, -5), TECHNICIAN[0])
        unit = fleet.create_unit(session, UnitCreate(serial=SERIAL, sensor_type=POT_TYPE))
        unit.status, unit.installed_in = UnitStatus.installed, "kit 09 / arm"
        calibrations.run_calibration(
            session,
            unit,
            CalibrationCreate(
                performed_at=datetime.now(UTC) - timedelta(days=3),
                operator=TECHNICIAN[0],
                reference_standard=GOOD,
                kind=SessionKind.incoming,
                # value = angle, reading = 3.7 angle + 12 counts (common practice, no source)
                points=[
                    PointIn(reference_value=a, reading=3.7 * a + 12) for a in range(0, 271, 30)
                ],
            ),
            recorded_by=TECHNICIAN[0],
        )
        session.commit()
    try:
        yield url
    finally:
        with factory() as session:
            session.execute(delete(Flag).where(Flag.kind == FlagKind.reference_suspect))
            ids = list(session.scalars(select(ReferenceStandard.id)))
            session.execute(
                update(CalibrationSession)
                .where(CalibrationSession.reference_standard_id.in_(ids))
                .values(reference_standard_id=None)
            )
            session.execute(delete(StandardCheck))
            session.execute(delete(ReferenceStandard))
            session.commit()
        engine.dispose()


def no_sideways_scroll(page: Any) -> None:
    width = page.evaluate("document.documentElement.scrollWidth")
    assert width <= page.viewport_size["width"], f"page is {width} px wide"


def test_the_list_marks_an_overdue_standard_in_words_and_an_icon(
    page: Any, register: str, artifacts: Path
) -> None:
    for size, name in ((LAPTOP, "standards.png"), (PHONE, "standards-390.png")):
        page.set_viewport_size(size)
        page.goto("/standards")
        row = page.locator("tr", has=page.locator(f"a:text-is('{LATE}')"))
        standing = row.locator(".standing")
        assert standing.inner_text().strip() == "⚠ Overdue"
        assert standing.locator(".standing-icon").get_attribute("aria-hidden") == "true"
        good = page.locator("tr", has=page.locator(f"a:text-is('{GOOD}')")).locator(".standing")
        assert "In date" in good.inner_text()
        no_sideways_scroll(page)
        page.screenshot(path=artifacts / name, full_page=True)
    # a scanned name + Enter in the search box opens the standard
    page.set_viewport_size(LAPTOP)
    page.fill("#standard-q", GOOD.lower())
    page.press("#standard-q", "Enter")
    page.wait_for_url(f"**/standards/{GOOD}")


def test_a_failed_check_flags_the_unit_and_its_csv_names_where_it_is(
    page: Any, register: str, artifacts: Path
) -> None:
    page.set_viewport_size(LAPTOP)
    page.goto(f"/standards/{GOOD}")
    table = page.locator("table.dependents")
    assert SERIAL in table.inner_text() and "kit 09 / arm" in table.inner_text()
    with page.expect_download() as download:
        page.click("text=Download CSV")
    rows = list(csv.DictReader(io.StringIO(Path(download.value.path()).read_text())))
    assert [(r["serial"], r["installed_in"]) for r in rows] == [(SERIAL, "kit 09 / arm")]

    page.fill("#check-on", datetime.now(UTC).date().isoformat())
    page.check("input[name=in_tolerance][value=no]")
    page.fill("#check-note", "plate chipped at 90 deg")
    page.click("text=Record the check")
    page.wait_for_url("**flagged=1**")
    assert "1 unit calibrated against it" in page.locator("#flagged-note").inner_text()
    assert page.locator("h1 .standing").inner_text().strip() == "✗ Out of tolerance"
    checks = page.locator("table.checks").inner_text()
    assert "out of tolerance" in checks and "plate chipped" in checks
    page.set_viewport_size(PHONE)
    no_sideways_scroll(page)
    page.screenshot(path=artifacts / "standard-390.png", full_page=True)

    page.goto("/attention?kind=reference_suspect")
    page.wait_for_load_state("networkidle")
    card = page.locator(".flag-card", has=page.locator(f"a:text-is('{SERIAL}')"))
    text = card.inner_text()
    assert GOOD in text and "kit 09 / arm" in text
    standards_card = page.locator("#standards-attention").inner_text()
    assert GOOD in standards_card and LATE in standards_card
    # the register's parts fit a phone (the counts table above them is the page's own)
    for part in (page.locator("#standards-attention"), card):
        box = part.bounding_box()
        assert box is not None and box["x"] + box["width"] <= PHONE["width"]
    page.screenshot(path=artifacts / "attention-standards-390.png", full_page=True)
    page.set_viewport_size(LAPTOP)


def test_the_calibration_form_picks_a_standard_by_scan(page: Any, register: str) -> None:
    page.set_viewport_size(PHONE)
    page.goto(f"/calibrate?unit={SERIAL}")
    picker = page.locator("#reference_standard")
    assert picker.get_attribute("list") == "reference-standards"
    options = page.locator("#reference-standards option")
    assert {options.nth(i).get_attribute("value") for i in range(options.count())} >= {GOOD, LATE}
    assert picker.input_value() == GOOD  # the standard of the unit's last calibration
    url = page.url
    picker.fill(LATE)
    picker.press("Enter")  # a scanner's Enter: on to the next field, nothing submitted
    page.wait_for_timeout(300)
    assert page.url == url
    assert page.evaluate("document.activeElement.id") != "reference_standard"
    no_sideways_scroll(page)
    page.set_viewport_size(LAPTOP)
