"""Receive a unit, then calibrate it in real Chromium: the preview is drawn as the points are
typed, without submitting and without storing anything; saving lands on the unit page."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sqlalchemy import func, select

import shared
from server.calibrations.models import CalibrationSession
from server.db import make_engine
from server.fleet.models import Unit
from shared.budget import TypeB
from tests.web.seed import POT_TYPE, Fleet

pytestmark = pytest.mark.browser

PREFIX = "POT-LIVE-"  # units this test receives itself (other tests calibrate the seeded ones)
# an invented bench run: angle (deg) on a dividing head, reading (counts)
ANGLES = [0.0, 30.0, 60.0, 90.0, 120.0, 150.0, 180.0, 210.0, 240.0, 270.0]
READINGS = [13.0, 124.0, 235.0, 345.0, 457.0, 568.0, 678.0, 790.0, 901.0, 1010.0]


def sessions_of(url: str, serial: str) -> int:
    engine = make_engine(url)
    try:
        with engine.connect() as conn:
            query = (
                select(func.count())
                .select_from(CalibrationSession)
                .join(Unit)
                .where(Unit.serial == serial)
            )
            return int(conn.scalar(query) or 0)
    finally:
        engine.dispose()


def test_receive_then_calibrate_with_a_live_preview(
    page: Any, server: str, live_db: tuple[str, Fleet], artifacts: Path
) -> None:
    url, _ = live_db
    serial = f"{PREFIX}01"
    # the seeded pot type: a line, noise in the reading, 1 count resolution, tolerance 1.5 deg
    fitted = shared.fit("line", READINGS, ANGLES, noise="reading")
    passed = shared.decide(fitted, 1.5, None, type_b=TypeB(resolution=1)).passed
    slope, intercept = np.polyfit(ANGLES, READINGS, 1)  # reading on angle, then inverted

    page.goto("/receive")
    page.select_option("#sensor_type", POT_TYPE)
    page.fill("#prefix", PREFIX)
    page.fill("#count", "2")
    page.click("#receive button[type=submit]")
    page.wait_for_url(re.compile(r"/receive\?received="))
    assert page.locator("#received td.serial").all_inner_texts() == [serial, f"{PREFIX}02"]
    page.locator("#received a.calibrate-link").first.click()
    page.wait_for_url(f"{server}/calibrate?unit={serial}")
    assert page.locator("#preview-empty").is_visible()

    page.evaluate("window.__same_document = true")
    # a first calibration has no reference to offer: the points come first, the preview anyway
    assert page.input_value("#reference") == ""
    page.select_option("#family", "line")
    page.fill(
        "#points",
        "angle_deg\treading\n"
        + "\n".join(f"{a:g}\t{r:g}" for a, r in zip(ANGLES, READINGS, strict=True)),
    )
    page.wait_for_selector("#preview-curve.js-plotly-plot .main-svg")
    page.wait_for_selector("#preview-residuals.js-plotly-plot .main-svg")
    assert "name the reference" in page.locator("#preview .still-needed").inner_text()
    assert page.evaluate("window.__same_document === true"), "previewed in place, not submitted"
    assert sessions_of(url, serial) == 0  # a preview stores nothing
    page.fill("#reference", "dividing head DH-1")
    page.locator("#preview .still-needed").wait_for(state="detached")
    badge = page.locator("#preview-decision .badge").inner_text()
    assert badge.endswith("PASS" if passed else "FAIL")
    c1 = float(page.get_attribute('#preview [data-param="c1"]', "data-value") or "nan")
    assert c1 == pytest.approx(1.0 / slope, rel=1e-8)
    c0 = float(page.get_attribute('#preview [data-param="c0"]', "data-value") or "nan")
    assert c0 == pytest.approx(-intercept / slope, rel=1e-8)
    page.wait_for_selector("#preview-residuals.js-plotly-plot .main-svg")
    page.screenshot(path=artifacts / "calibrate-preview.png", full_page=True)

    page.click("#save-button")
    page.wait_for_url(re.compile(rf"/units/{serial}\?saved=\d+$"))
    assert page.locator(".notice").inner_text().startswith("Calibration of")
    page.wait_for_selector("#curve-plot.js-plotly-plot .main-svg")
    assert sessions_of(url, serial) == 1
