"""The front end in real Chromium against a real server: sign in, find, read, calibrate."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import func, select

import shared
from server.calibrations.models import CalibrationSession
from server.db import make_engine
from server.fleet.models import Unit
from shared.budget import TypeB
from tests.web.conftest import sign_in
from tests.web.seed import TECHNICIAN, Fleet, ir_readings, paste_text

pytestmark = pytest.mark.browser


def session_count(url: str, serial: str) -> int:
    engine = make_engine(url)
    try:
        with engine.connect() as conn:
            return int(
                conn.scalar(
                    select(func.count())
                    .select_from(CalibrationSession)
                    .join(Unit)
                    .where(Unit.serial == serial)
                )
                or 0
            )
    finally:
        engine.dispose()


def serials_shown(page: Any) -> list[str]:
    return [s.strip() for s in page.locator("table.units td.serial").all_inner_texts()]


def test_sign_in_through_the_form(anonymous_page: Any, server: str, artifacts: Path) -> None:
    page = anonymous_page
    page.goto("/units/IR-0104")
    page.wait_for_url(re.compile(r"/signin\?next=/units/IR-0104$"))
    page.screenshot(path=artifacts / "signin.png", full_page=True)

    sign_in(page, TECHNICIAN[0], "not-the-password")
    assert "wrong user name or password" in page.locator("#signin-form .alert").inner_text()
    assert page.input_value("#signin-name") == TECHNICIAN[0]

    sign_in(page, *TECHNICIAN)
    page.wait_for_url(f"{server}/units/IR-0104")  # back where the sign-in was asked for
    assert page.locator(".who-name").inner_text() == TECHNICIAN[0]


def test_fleet_lists_the_seeded_units(
    page: Any, live_db: tuple[str, Fleet], artifacts: Path
) -> None:
    _, fleet = live_db
    page.goto("/")
    shown = serials_shown(page)
    for serial in (fleet.calibrated, fleet.failing, fleet.spare, fleet.pot):
        assert serial in shown
    row = page.locator("table.units tbody tr", has_text=fleet.failing)
    assert row.locator(".badge").inner_text().endswith("FAIL")
    assert "overdue" in row.inner_text()
    assert page.locator(".pager .count").inner_text().startswith("units 1–")
    page.screenshot(path=artifacts / "fleet.png", full_page=True)


def test_search_box_filters_live(page: Any, server: str, live_db: tuple[str, Fleet]) -> None:
    _, fleet = live_db
    page.goto("/")
    page.evaluate("window.__same_document = true")
    page.locator("#q").press_sequentially("0104", delay=40)
    page.wait_for_function("document.querySelectorAll('table.units td.serial').length === 1")
    assert serials_shown(page) == [fleet.spare]
    assert page.evaluate("window.__same_document === true"), "the page was reloaded, not swapped"
    page.wait_for_url(re.compile(r"[?&]q=0104"))  # hx-push-url: the filter survives a reload

    page.select_option("#type", label="Rotary pot 270 deg")
    page.fill("#q", "")
    page.wait_for_function(
        "document.querySelector('table.units td.serial')?.innerText === 'POT-0001'"
    )
    # the seeded pot unit, and any other pot unit a test of this session registered; no other type
    assert serials_shown(page)[0] == fleet.pot
    types = page.locator("table.units tbody tr td:nth-child(2)").all_inner_texts()
    assert {t.strip() for t in types} == {"Rotary pot 270 deg"}


def test_scanning_a_serial_lands_on_the_unit(
    page: Any, server: str, live_db: tuple[str, Fleet]
) -> None:
    _, fleet = live_db
    page.goto("/")
    page.locator("#q").press_sequentially(fleet.failing.lower(), delay=10)  # any case
    page.keyboard.press("Enter")
    page.wait_for_url(f"{server}/units/{fleet.failing}")
    assert page.locator("h1.serial-title").inner_text() == fleet.failing

    # the next scan, from the unit page: "/" focuses the box in the top bar
    page.keyboard.press("/")
    page.keyboard.type(fleet.calibrated)
    page.keyboard.press("Enter")
    page.wait_for_url(f"{server}/units/{fleet.calibrated}")


def test_unit_page_draws_plots_and_constants(
    page: Any, live_db: tuple[str, Fleet], artifacts: Path
) -> None:
    _, fleet = live_db
    page.goto(f"/units/{fleet.calibrated}")
    page.wait_for_selector("#curve-plot.js-plotly-plot .main-svg")
    page.wait_for_selector("#residual-plot.js-plotly-plot .main-svg")
    # points, band, fitted curve and one earlier calibration are all drawn
    assert page.locator("#curve-plot .scatterlayer .trace").count() >= 5
    constants = page.locator(".constants table.numbers tbody th").all_inner_texts()
    assert constants == ["k", "r0", "v0"]
    assert "counts" in page.locator(".constants .kv").first.inner_text()
    assert page.locator(".decision .badge").inner_text().endswith("PASS")
    assert page.locator("#history tbody tr").count() == 2
    page.screenshot(path=artifacts / "unit.png", full_page=True)


def test_add_a_calibration_through_the_form(
    page: Any, server: str, live_db: tuple[str, Fleet]
) -> None:
    url, fleet = live_db
    points = ir_readings(201_000, 29, 15, seed=18)
    # the seeded type: noise in the reading, one count of resolution
    fitted = shared.fit(
        "inverse_offset", [r for _, r in points], [v for v, _ in points], noise="reading"
    )
    expected = "PASS" if shared.decide(fitted, 3, 2, type_b=TypeB(resolution=1)).passed else "FAIL"
    before = session_count(url, fleet.fresh)

    page.goto(f"/units/{fleet.fresh}")
    assert page.input_value("#operator") == TECHNICIAN[0]
    page.fill("#performed_at", "2026-11-30T10:15")
    page.fill("#reference", "distance jig DJ-2")
    page.select_option("#kind", "incoming")
    page.fill("#points", paste_text(points))
    page.click("#calibrate button[type=submit]")

    page.wait_for_url(re.compile(rf"/units/{fleet.fresh}\?saved=\d+$"))
    row = page.locator("#history tbody tr.just-saved")
    assert "2026-11-30 10:15 UTC" in row.inner_text()
    assert row.locator(".badge").inner_text().endswith(expected)
    assert page.locator(".notice").inner_text().startswith("Calibration of 2026-11-30 10:15 UTC")
    page.wait_for_selector("#curve-plot.js-plotly-plot .main-svg")
    assert session_count(url, fleet.fresh) == before + 1


def test_bad_paste_names_the_line_and_stores_nothing(
    page: Any, live_db: tuple[str, Fleet], artifacts: Path
) -> None:
    url, fleet = live_db
    before = session_count(url, fleet.fresh)
    pasted = "reference_mm, reading\n100, 2709\n150, 1505\n200; 1O51\n250, 830"
    page.goto(f"/units/{fleet.fresh}")
    page.evaluate("window.__same_document = true")
    page.fill("#reference", "distance jig DJ-2")
    page.fill("#points", pasted)
    with page.expect_response(lambda r: r.request.method == "POST") as answer:
        page.click("#calibrate button[type=submit]")
    assert answer.value.status == 422
    error = page.locator("#calibration-error")
    error.wait_for()
    assert "line 4" in error.inner_text()
    assert "1O51" in error.inner_text()
    assert page.input_value("#points") == pasted  # what was typed is kept
    assert page.input_value("#reference") == "distance jig DJ-2"
    assert page.get_attribute("#points", "aria-invalid") == "true"
    assert page.evaluate("window.__same_document === true")  # swapped in place by htmx
    assert session_count(url, fleet.fresh) == before
    page.locator("#calibrate").scroll_into_view_if_needed()
    page.screenshot(path=artifacts / "form-error.png", full_page=True)


def test_budget_reading_changes_in_place(
    page: Any, server: str, live_db: tuple[str, Fleet], artifacts: Path
) -> None:
    _, fleet = live_db
    page.goto(f"/units/{fleet.calibrated}")
    page.wait_for_selector("#residual-plot.js-plotly-plot .main-svg")
    page.evaluate("window.__same_document = true")
    assert "1636.5 counts" in page.locator(".budget-result").inner_text()
    page.fill("#budget-reading", "400")
    page.click("#budget button[type=submit]")
    page.wait_for_function(
        "document.querySelector('.budget-result')?.innerText.includes('400 counts')"
    )
    assert page.evaluate("window.__same_document === true"), "swapped, not reloaded"
    page.wait_for_url(re.compile(r"[?&]reading=400"))  # the reading survives a reload
    rows = page.locator("table.budget tbody th").all_inner_texts()
    assert rows[0].startswith("calibration curve") and len(rows) == 4
    page.locator("#budget").screenshot(path=artifacts / "unit-budget.png")

    page.fill("#budget-reading", "5000")
    page.click("#budget button[type=submit]")
    page.locator("#budget-error").wait_for()
    assert "outside the valid range" in page.locator("#budget-error").inner_text()
    assert page.get_attribute("#budget-reading", "aria-invalid") == "true"


def test_failing_unit_shows_suspects_and_model_choice(
    page: Any, live_db: tuple[str, Fleet], artifacts: Path
) -> None:
    _, fleet = live_db
    page.goto(f"/units/{fleet.failing}")
    page.wait_for_selector("#residual-plot.js-plotly-plot .main-svg")
    assert "1 suspect point" in page.locator(".suspects").inner_text()
    assert page.locator("#residual-plot .scatterlayer .trace text").all_text_contents() == ["#6"]
    assert page.locator("details.points").get_attribute("open") is not None
    assert page.locator("#model-choice tr.in-use code").inner_text() == "inverse_offset"
    page.screenshot(path=artifacts / "unit-failing.png", full_page=True)
    page.goto(f"/units/{fleet.pot}")
    page.locator("#model-choice").screenshot(path=artifacts / "unit-model-choice.png")


def pdf_text(data: bytes) -> tuple[int, str]:
    """Pages and text of a PDF (pypdf, in the [test] extra)."""
    import io

    from pypdf import PdfReader

    reader = PdfReader(io.BytesIO(data))
    return len(reader.pages), "\n".join(p.extract_text() or "" for p in reader.pages)


def test_report_prints_to_pdf_on_a4_and_letter(
    page: Any, server: str, live_db: tuple[str, Fleet], artifacts: Path
) -> None:
    _, fleet = live_db
    page.goto(f"/units/{fleet.calibrated}")
    page.locator("#history tbody tr.current a.report-link").click()
    page.wait_for_url(re.compile(rf"/units/{fleet.calibrated}/calibrations/\d+/report$"))
    page.wait_for_selector("#report-plot.js-plotly-plot .main-svg")
    assert page.locator("#report-plot .scatterlayer .trace").count() >= 3
    page.wait_for_selector("#report-residuals.js-plotly-plot .main-svg")
    assert page.locator("#report-residuals .scatterlayer .trace").count() >= 3  # points, ±tol
    assert page.locator(".modebar").count() == 0  # static: no mode bar
    page.screenshot(path=artifacts / "report.png", full_page=True)
    page.emulate_media(media="print")
    page.set_viewport_size({"width": 680, "height": 960})  # A4's printable width at 96 px/in
    page.screenshot(path=artifacts / "report-print-media.png", full_page=True)
    # the plot fits the printable width of both papers (A4 180 mm, Letter 190 mm of 96 px/in)
    width = page.evaluate(
        "document.querySelector('#report-plot .main-svg').getBoundingClientRect().width"
    )
    assert width <= 180 / 25.4 * 96
    width = page.evaluate(
        "document.querySelector('#report-residuals .main-svg').getBoundingClientRect().width"
    )
    assert width <= 180 / 25.4 * 96
    for paper in ("A4", "Letter"):
        data = page.pdf(format=paper, print_background=True)
        (artifacts / f"report-{paper.lower()}.pdf").write_bytes(data)
        assert data.startswith(b"%PDF")
        pages, text = pdf_text(data)
        flat = " ".join(text.split())
        assert 1 <= pages <= 4, pages
        assert fleet.calibrated in flat
        assert "PASS" in flat and "Residuals and tolerance" in flat
        assert "do not on their own make a calibration accredited or traceable" in flat
        assert "Sign out" not in flat and "scan or type a serial" not in flat


def test_needs_attention_shows_a_drift_flag_and_takes_an_acknowledgement(
    page: Any, live_db: tuple[str, Fleet], artifacts: Path
) -> None:
    """The spare unit gets an old calibration and a new one 20 mm off (drift limit 5 mm): its
    drift flag is listed with its numbers and plot, and a technician acknowledges it in place."""
    from datetime import UTC, datetime, timedelta

    from server.calibrations import service as calibrations
    from server.calibrations.models import SessionKind
    from server.calibrations.schemas import CalibrationCreate, PointIn
    from server.db import make_sessionmaker
    from server.flags.service import recompute_flags
    from server.fleet.service import get_unit

    url, fleet = live_db
    engine = make_engine(url)
    now = datetime.now(UTC).replace(microsecond=0)
    with make_sessionmaker(engine)() as session:
        unit = get_unit(session, fleet.spare)
        for days, v0, seed in ((120, 15, 31), (2, 35, 32)):
            calibrations.run_calibration(
                session,
                unit,
                CalibrationCreate(
                    performed_at=now - timedelta(days=days),
                    operator=TECHNICIAN[0],
                    reference="distance jig DJ-2",
                    kind=SessionKind.periodic,
                    points=[
                        PointIn(reference_value=v, reading=r)
                        for v, r in ir_readings(200_000, 30, v0, seed=seed)
                    ],
                ),
                recorded_by=TECHNICIAN[0],
            )
        recompute_flags(session, get_unit(session, fleet.spare).sensor_type)
        session.commit()
    engine.dispose()

    page.goto("/")
    nav = page.locator(".topbar nav a[href='/attention']")
    assert int(nav.locator(".nav-count").inner_text()) >= 1
    row = page.locator("table.units tbody tr", has_text=fleet.spare)
    assert row.locator("td.flags .flag-abbr", has_text="DRIFT").count() == 1
    nav.click()
    page.wait_for_url(re.compile(r"/attention$"))
    card = page.locator(".flag-group[data-kind=drift] .flag-card", has_text=fleet.spare)
    assert card.count() == 1
    card.scroll_into_view_if_needed()  # its plot loads when it comes into view
    card.locator(".flag-plot.js-plotly-plot .main-svg").first.wait_for()
    assert card.locator(".flag-plot .scatterlayer .trace").count() >= 3  # band, deviation, limit
    evidence = card.locator(".evidence").inner_text()
    assert "Drift limit" in evidence and "±5 mm" in evidence and "Simultaneous z" in evidence
    assert "mm" in card.locator(".flag-message").inner_text()
    page.screenshot(path=artifacts / "attention.png", full_page=True)

    waiting = int(nav.locator(".nav-count").inner_text())
    page.evaluate("window.__same_document = true")
    card.locator("input[name=note]").fill("pulled from rover R2; recalibrate before reuse")
    card.locator("button", has_text="Acknowledge").click()
    done = page.locator(
        ".flag-group[data-kind=drift] .flag-card.acknowledged", has_text=fleet.spare
    )
    done.wait_for()
    text = done.locator(".acknowledgement").inner_text()
    assert TECHNICIAN[0] in text and "pulled from rover R2" in text
    assert page.evaluate("window.__same_document") is True  # swapped in place by htmx
    assert int(nav.locator(".nav-count").inner_text()) == waiting - 1  # the nav follows
    page.screenshot(path=artifacts / "attention-acknowledged.png", full_page=True)
