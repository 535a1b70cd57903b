"""Small plots of flags and drift: a drift flag (from the compact grid kept in its evidence), a
fleet outlier (its robust z at the probe readings) and a unit's drift history."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import plotly.graph_objects as go

from server.calibrations.charts import BAND, CURVE, FONT, SUSPECT, TOLERANCE
from server.fleet.service import DriftPoint
from shared.fleet import Z_ACTION, Z_WARNING, DueDate


def drift_figure(evidence: dict[str, Any]) -> go.Figure | None:
    """Deviation (current - previous) against reading, the simultaneous band around 0 and the
    drift limit; None when the evidence has no grid."""
    grid = evidence.get("grid") or {}
    reading = grid.get("reading") or []
    deviation = grid.get("deviation") or []
    band = grid.get("band") or []
    if not reading or len(reading) != len(deviation):
        return None
    vu, ru = evidence.get("value_unit", ""), evidence.get("reading_unit", "")
    fig = go.Figure()
    if band and len(band) == len(reading):
        upper = [b if b is not None else 0.0 for b in band]
        fig.add_trace(
            go.Scatter(
                x=reading + reading[::-1],
                y=upper + [-b for b in upper[::-1]],
                fill="toself",
                fillcolor=BAND,
                line={"width": 0},
                hoverinfo="skip",
                name=f"simultaneous {evidence.get('level', 0.95):.0%} band",
            )
        )
    fig.add_trace(
        go.Scatter(
            x=reading,
            y=deviation,
            mode="lines",
            line={"color": CURVE, "width": 2},
            name="deviation",
            hovertemplate=f"%{{x:.4g}} {ru}: %{{y:+.3g}} {vu}<extra></extra>",
        )
    )
    limit = evidence.get("drift_limit")
    if limit:
        for sign in (1, -1):
            fig.add_trace(
                go.Scatter(
                    x=[reading[0], reading[-1]],
                    y=[sign * limit, sign * limit],
                    mode="lines",
                    line={"color": TOLERANCE, "width": 1.5, "dash": "dash"},
                    name=f"drift limit ±{limit:g} {vu}",
                    showlegend=sign == 1,
                    hoverinfo="skip",
                )
            )
    return _small_layout(
        fig, x_title=f"reading ({ru})", y_title=f"current − previous ({vu})", height=220
    )


def _small_layout(fig: go.Figure, *, x_title: str, y_title: str, height: int) -> go.Figure:
    """The look of ``drift_figure``: light grid, zero line, legend above the plot."""
    axis = {
        "showgrid": True,
        "gridcolor": "#e3e7ee",
        "zeroline": True,
        "zerolinecolor": "#9aa3b2",
        "showline": True,
        "linecolor": "#9aa3b2",
        "automargin": True,
    }
    fig.update_layout(
        template="none",
        height=height,
        margin={"l": 8, "r": 8, "t": 28, "b": 8},
        font={"family": FONT, "size": 12, "color": "#1d2433"},
        paper_bgcolor="#ffffff",
        plot_bgcolor="#ffffff",
        showlegend=True,
        legend={"orientation": "h", "x": 0, "y": 1.02, "yanchor": "bottom", "font": {"size": 11}},
        xaxis={**axis, "title": {"text": x_title}},
        yaxis={**axis, "title": {"text": y_title}},
    )
    return fig


def _level(fig: go.Figure, x: list[Any], level: float, *, color: str, dash: str, name: str) -> None:
    """Horizontal lines at +level and -level (one legend entry)."""
    for sign in (1, -1):
        fig.add_trace(
            go.Scatter(
                x=x,
                y=[sign * level, sign * level],
                mode="lines",
                line={"color": color, "width": 1.5, "dash": dash},
                name=name,
                legendgroup=name,
                showlegend=sign == 1,
                hoverinfo="skip",
            )
        )


def drift_history_figure(
    history: Sequence[DriftPoint],
    *,
    value_unit: str,
    reading_unit: str,
    drift_limit: float | None = None,
    threshold: float | None = None,
    due: DueDate | None = None,
) -> go.Figure | None:
    """Each valid calibration's signed largest deviation from the unit's first curve against its
    date (the first at 0), the ± drift limit (dashed), the ± threshold the due date projects
    against when it differs from the drift limit (dash-dot), and, when the due date is the
    projected crossing, that projection (dotted): the drift since the last calibration, 0 on its
    date, growing at the history's rate until it reaches the threshold on the due date, in the
    direction of the newest deviation. None with fewer than two calibrations."""
    if len(history) < 2:
        return None
    sp = " " if value_unit else ""
    dates = [p.on.isoformat() for p in history]
    notes = [
        "first calibration (the baseline)"
        if p.at_reading is None
        else f"at {p.at_reading:.4g} {reading_unit}"
        + (f"; simultaneous band ≈ ±{p.band:.2g}{sp}{value_unit}" if p.band is not None else "")
        for p in history
    ]
    fig = go.Figure()
    fig.add_trace(
        go.Scatter(
            x=dates,
            y=[p.deviation for p in history],
            mode="lines+markers",
            line={"color": CURVE, "width": 2},
            marker={"color": CURVE, "size": 8},
            customdata=notes,
            name="largest deviation from the first curve",
            hovertemplate=f"%{{x}}: %{{y:+.3g}}{sp}{value_unit} %{{customdata}}<extra></extra>",
        )
    )
    last = history[-1]
    projected = (
        due is not None
        and due.decided_by == "crossing"
        and due.rate_per_year is not None
        and due.projected_crossing is not None
    )
    end = due.due.isoformat() if projected and due is not None else dates[-1]
    span = [dates[0], end]
    same = bool(threshold and drift_limit and abs(threshold - drift_limit) <= 1e-9 * drift_limit)
    if drift_limit:
        _level(
            fig,
            span,
            drift_limit,
            color=TOLERANCE,
            dash="dash",
            name=f"drift limit ±{drift_limit:g}{sp}{value_unit}"
            + (" (the due date's threshold)" if same else ""),
        )
    if threshold and not same:
        _level(
            fig,
            span,
            threshold,
            color="#b45309",
            dash="dashdot",
            name=f"due-date threshold ±{threshold:.3g}{sp}{value_unit}",
        )
    if projected and due is not None and due.rate_per_year is not None:
        sign = -1.0 if last.deviation < 0 else 1.0
        fig.add_trace(
            go.Scatter(
                x=[last.on.isoformat(), due.due.isoformat()],
                y=[0.0, sign * due.threshold],
                mode="lines+markers",
                line={"color": CURVE, "width": 1.5, "dash": "dot"},
                marker={"color": CURVE, "size": [0, 9], "symbol": "diamond-open"},
                name=f"projected drift: due {due.due.isoformat()}",
                hovertemplate=(
                    f"%{{x}}: %{{y:+.3g}}{sp}{value_unit}, drift since the last calibration "
                    f"projected at {due.rate_per_year:.3g}{sp}{value_unit}/year<extra></extra>"
                ),
            )
        )
    return _small_layout(
        fig,
        x_title="calibration date",
        y_title=f"deviation from first ({value_unit})",
        height=340,
    )


def outlier_figure(evidence: dict[str, Any]) -> go.Figure | None:
    """A fleet outlier's robust z at each probe reading, with the action (|z| = 3, dashed) and
    warning (|z| = 2, dotted) lines; the probe of the flag's z is ringed. We plot z rather than
    the unit's values beside the fleet's median: z is what the flag judges, on the same scale for
    every type, whereas the fleet's spread (a few mm against values of hundreds) is hard to see
    on a value axis. Hover gives the value, the median and the robust s.d. at each probe. None
    when the evidence has no per-probe arrays (flags stored before they were kept)."""
    probes = evidence.get("probe_readings") or []
    z = evidence.get("probe_z") or []
    if not probes or len(z) != len(probes):
        return None
    vu, ru = evidence.get("value_unit", ""), evidence.get("reading_unit", "")
    sp = " " if vu else ""
    n = len(probes)
    values = evidence.get("probe_values") or [None] * n
    center = evidence.get("probe_center") or [None] * n
    scale = evidence.get("probe_scale") or [None] * n

    def g(x: float | None) -> str:
        return "—" if x is None else f"{x:.4g}"

    notes = [
        f"{g(v)}{sp}{vu} against the median {g(c)}{sp}{vu} (robust s.d. {g(s)}{sp}{vu})"
        for v, c, s in zip(values, center, scale, strict=False)
    ]
    fig = go.Figure()
    fig.add_trace(
        go.Scatter(
            x=probes,
            y=z,
            mode="lines+markers",
            line={"color": CURVE, "width": 2},
            marker={"color": CURVE, "size": 7},
            customdata=notes,
            name="robust z",
            hovertemplate=f"%{{x:.4g}} {ru}: z = %{{y:+.2f}}<br>%{{customdata}}<extra></extra>",
        )
    )
    worst = evidence.get("z")
    at = evidence.get("at_reading")
    if worst is not None and at is not None:
        fig.add_trace(
            go.Scatter(
                x=[at],
                y=[worst],
                mode="markers",
                marker={
                    "color": SUSPECT,
                    "size": 14,
                    "symbol": "circle-open",
                    "line": {"width": 2},
                },
                name=f"flagged {worst:+.2f}",
                hoverinfo="skip",
            )
        )
    span = [probes[0], probes[-1]]
    _level(fig, span, Z_ACTION, color=TOLERANCE, dash="dash", name=f"action ±{Z_ACTION:g}")
    _level(fig, span, Z_WARNING, color=SUSPECT, dash="dot", name=f"warning ±{Z_WARNING:g}")
    return _small_layout(fig, x_title=f"reading ({ru})", y_title="robust z", height=220)


def errors_figure(evidence: dict[str, Any]) -> go.Figure | None:
    """The errors a flag judged against the tolerance, at each reference value: for an
    out-of-tolerance-in-service flag the as-found errors (the previous calibration applied to the
    new points, minus the reference), for a failed acceptance the residuals of the fit. The
    allowed error ±(tolerance_abs + tolerance_rel % of value) is the envelope; points outside it
    are drawn in the warning colour. None when the evidence has no per-point arrays (flags
    stored before they were kept)."""
    pts = evidence.get("points") or {}
    value, error, allowed = pts.get("value") or [], pts.get("error") or [], pts.get("allowed")
    if not value or len(error) != len(value) or not allowed or len(allowed) != len(value):
        return None
    vu = evidence.get("value_unit", "")
    order = sorted(range(len(value)), key=lambda i: value[i])
    xs = [value[i] for i in order]
    lim = [allowed[i] for i in order]
    out = [i for i in order if abs(error[i]) > allowed[i]]
    inside = [i for i in order if abs(error[i]) <= allowed[i]]
    fig = go.Figure()
    fig.add_trace(
        go.Scatter(
            x=xs + xs[::-1],
            y=lim + [-a for a in lim[::-1]],
            fill="toself",
            fillcolor=BAND,
            line={"width": 0},
            hoverinfo="skip",
            showlegend=False,
            legendgroup="allowed",
        )
    )
    for sign in (1, -1):
        fig.add_trace(
            go.Scatter(
                x=xs,
                y=[sign * a for a in lim],
                mode="lines",
                line={"color": TOLERANCE, "width": 1.5, "dash": "dash"},
                hoverinfo="skip",
                name="allowed error",
                legendgroup="allowed",
                showlegend=sign == 1,
            )
        )
    for chosen, color, name in ((inside, CURVE, "within"), (out, TOLERANCE, "outside")):
        if chosen:
            fig.add_trace(
                go.Scatter(
                    x=[value[i] for i in chosen],
                    y=[error[i] for i in chosen],
                    mode="markers",
                    marker={"color": color, "size": 8 if name == "outside" else 6},
                    name=name,
                    hovertemplate=f"%{{x:.4g}} {vu}: error %{{y:+.3g}} {vu}<extra></extra>",
                )
            )
    label = "as-found error" if evidence.get("n_judged") is not None else "residual"
    return _small_layout(
        fig, x_title=f"reference value ({vu})", y_title=f"{label} ({vu})", height=220
    )
