"""Synthetic calibrations shared by the API tests (common practice, no source): an invented
potentiometer type read in counts, value = 0.1 r with a little noise, and a helper that posts a
calibration session."""

from __future__ import annotations

from datetime import datetime
from typing import Any

import numpy as np

READINGS = np.arange(0.0, 1001.0, 100.0)


def line_points(
    seed: int, *, shift: float = 0.0, bump: float = 0.0, bump_at: int = 5
) -> list[dict[str, float]]:
    """value = 0.1 r + ``shift`` with N(0, 0.02) noise; ``bump`` added to point ``bump_at``."""
    rng = np.random.default_rng(seed)
    values = 0.1 * READINGS + shift + rng.normal(0.0, 0.02, READINGS.size)
    values[bump_at] += bump
    return [
        {"reference_value": round(float(v), 4), "reading": float(r)}
        for v, r in zip(values, READINGS, strict=True)
    ]


def pot_type(name: str, **changes: Any) -> dict[str, Any]:
    """A sensor type body: a line-fitted pot, tolerance 1.0 deg; ``changes`` override."""
    return {
        "name": name,
        "quantity": "angle",
        "value_unit": "deg",
        "reading_unit": "counts",
        "reading_min": 0,
        "reading_max": 1023,
        "families": ["line"],
        "tolerance_abs": 1.0,
        **changes,
    }


def calibrate(
    client: Any,
    headers: dict[str, str],
    serial: str,
    when: datetime,
    pts: list[dict[str, float]],
    *,
    reference: str = "angle jig",
) -> dict[str, Any]:
    """POST a periodic calibration session; its JSON answer (201 asserted)."""
    r = client.post(
        f"/api/v1/units/{serial}/calibrations",
        json={
            "performed_at": when.isoformat(),
            "operator": "tom",
            "reference": reference,
            "kind": "periodic",
            "points": pts,
        },
        headers=headers,
    )
    assert r.status_code == 201, r.text
    return dict(r.json())
