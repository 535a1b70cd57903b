"""Number and date formats for the pages, registered as Jinja filters on import."""

from __future__ import annotations

import math
from datetime import UTC, date, datetime

DASH = "—"


def significant(x: float | None, digits: int = 7) -> str:
    """``x`` to ``digits`` significant digits, plain decimals where that stays short.

    Seven digits is what a float32 in firmware holds: enough to copy a constant without losing the
    curve (fitted constants are correlated; rounding each to its own uncertainty would not do).
    """
    if x is None or not math.isfinite(x):
        return DASH
    return f"{x:.{digits}g}"


def uncertainty(u: float | None) -> str:
    """A standard uncertainty to two significant digits, without an exponent when reasonable."""
    if u is None or not math.isfinite(u):
        return DASH
    if u == 0:
        return "0"
    exponent = math.floor(math.log10(abs(u)))
    if exponent < -6 or exponent > 8:
        return f"{u:.2g}"
    return f"{round(u, 1 - exponent):.{max(0, 1 - exponent)}f}"


def rounded_like(x: float | None, u: float | None) -> str:
    """``x`` to the decimal place of ``u`` shown to two significant digits (a value beside its
    uncertainty, GUM 7.2.6); ``measured`` when ``u`` is no use."""
    if x is None or not math.isfinite(x):
        return DASH
    if u is None or not math.isfinite(u) or u <= 0:
        return measured(x)
    exponent = math.floor(math.log10(abs(u)))
    if exponent < -6 or exponent > 8:
        return measured(x)
    return f"{x:.{max(0, 1 - exponent)}f}"


def measured(x: float | None, digits: int = 4) -> str:
    """A measured value to ``digits`` significant digits, for reading at a glance."""
    if x is None or not math.isfinite(x):
        return DASH
    if x == 0:
        return "0"
    if abs(x) >= 1e6 or abs(x) < 1e-4:
        return f"{x:.{digits - 1}e}"
    decimals = max(0, digits - 1 - math.floor(math.log10(abs(x))))
    text = f"{x:.{decimals}f}"
    return text.rstrip("0").rstrip(".") if "." in text else text


def residual_decimals(rse: float) -> int:
    """Decimals that show residuals one digit finer than the scatter (rse to two digits)."""
    if not math.isfinite(rse) or rse <= 0:
        return 3
    return max(0, min(8, 2 - math.floor(math.log10(rse))))


def utc_minute(when: datetime | None) -> str:
    if when is None:
        return DASH
    return when.astimezone(UTC).strftime("%Y-%m-%d %H:%M UTC")


def day(when: date | datetime | None) -> str:
    if when is None:
        return DASH
    if isinstance(when, datetime):
        when = when.astimezone(UTC).date()
    return when.isoformat()


def label(token: str) -> str:
    """An enum value for people: ``as_found`` -> ``as found``."""
    return str(token).replace("_", " ")


RISK_FLOOR_PCT = 0.0001  # smaller risks are shown as below it: digits there mean nothing


def risk_pct(probability: float | None) -> str:
    """A probability as a percentage for people: two significant digits, ``< 0.0001 %`` below
    that (a normal tail of 1e-75 is "none to speak of", not a number to read)."""
    if probability is None or not math.isfinite(probability):
        return DASH
    pct = 100.0 * probability
    if pct < RISK_FLOOR_PCT:
        return f"< {RISK_FLOOR_PCT:g} %"
    return f"{pct:.2g} %"


FILTERS = {
    "risk_pct": risk_pct,
    "sig": significant,
    "unc": uncertainty,
    "num": measured,
    "like_u": rounded_like,
    "utc": utc_minute,
    "day": day,
    "label": label,
}
