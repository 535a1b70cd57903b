"""plotly figures of a calibration, built from a shared.Fit (plotly never enters shared/)."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import plotly.graph_objects as go

import shared
from shared.acceptance import describe_tolerance

GRID = 241  # points along a drawn curve

CURVE = "#0b6e69"
BAND = "rgba(11, 110, 105, 0.16)"
POINT = "#1d2433"
EXCLUDED = "#c2410c"
EXCLUDED_MARKER = {
    "color": EXCLUDED,
    "size": 10,
    "symbol": "x-thin-open",
    "line": {"color": EXCLUDED, "width": 2.5},
}
EARLIER = "#8a94a6"
TOLERANCE = "#b42318"
SUSPECT = "#b45309"
UNCERTAINTY = "rgba(61, 90, 254, 0.14)"
FONT = "system-ui, -apple-system, 'Segoe UI', Roboto, 'Helvetica Neue', Arial, sans-serif"


@dataclass(frozen=True, slots=True)
class Axes:
    """What the axes are called: the quantity and the units of value and reading."""

    quantity: str
    value_unit: str
    reading_unit: str

    @property
    def value_title(self) -> str:
        return f"{self.quantity} ({self.value_unit})"

    @property
    def reading_title(self) -> str:
        return f"reading ({self.reading_unit})"


def _layout(fig: go.Figure, *, x_title: str, y_title: str, height: int = 400) -> go.Figure:
    grid = {
        "showgrid": True,
        "gridcolor": "#e3e7ee",
        "zeroline": False,
        "showline": True,
        "linecolor": "#9aa3b2",
        "ticks": "outside",
        "tickcolor": "#9aa3b2",
        "automargin": True,
    }
    fig.update_layout(
        template="none",
        height=height,
        margin={"l": 10, "r": 10, "t": 36, "b": 10},
        font={"family": FONT, "size": 13, "color": "#1d2433"},
        paper_bgcolor="#ffffff",
        plot_bgcolor="#ffffff",
        hovermode="closest",
        hoverlabel={"font": {"family": FONT, "size": 13}},
        legend={
            "orientation": "h",
            "x": 0,
            "y": 1.02,
            "xanchor": "left",
            "yanchor": "bottom",
            "font": {"size": 12},
        },
        xaxis={**grid, "title": {"text": x_title}},
        yaxis={**grid, "title": {"text": y_title}},
    )
    return fig


def _points(fit: shared.Fit) -> tuple[np.ndarray, np.ndarray]:
    """Indices of the used points and of the excluded ones."""
    used = np.asarray(fit.used, dtype=bool)
    return np.flatnonzero(used), np.flatnonzero(~used)


def curve_figure(
    fit: shared.Fit, axes: Axes, earlier: Sequence[tuple[str, shared.Fit]] = ()
) -> go.Figure:
    """Points (excluded ones marked, with the reason on hover), the fitted curve over the valid
    range, its 95 % prediction band, and earlier calibrations' curves drawn faintly behind."""
    fig = go.Figure()
    vu, ru = axes.value_unit, axes.reading_unit
    for i, (label, old) in enumerate(earlier):
        r_old = np.linspace(*old.valid_range, GRID)
        fig.add_scatter(
            x=r_old,
            y=old.to_value(r_old),
            mode="lines",
            name=f"earlier: {label}",
            legendgroup="earlier",
            showlegend=i == 0 or len(earlier) <= 3,
            line={"color": EARLIER, "width": 1.5, "dash": "dot"},
            opacity=0.7,
            hovertemplate=f"{label}<br>%{{x:.5~g}} {ru} → %{{y:.4~g}} {vu}<extra></extra>",
        )
    r = np.linspace(*fit.valid_range, GRID)
    band = fit.value_interval(r, level=0.95)
    fig.add_scatter(
        x=r,
        y=band.upper,
        mode="lines",
        line={"width": 0},
        hoverinfo="skip",
        showlegend=False,
        legendgroup="band",
    )
    fig.add_scatter(
        x=r,
        y=band.lower,
        mode="lines",
        line={"width": 0},
        fill="tonexty",
        fillcolor=BAND,
        hoverinfo="skip",
        name="95 % prediction band",
        legendgroup="band",
    )
    fig.add_scatter(
        x=r,
        y=band.value,
        mode="lines",
        name="fitted curve",
        line={"color": CURVE, "width": 2.5},
        customdata=band.upper - band.value,
        hovertemplate=(
            f"reading %{{x:.5~g}} {ru}<br>value %{{y:.4~g}} {vu} "
            f"± %{{customdata:.2~g}} (95 %)<extra>fit</extra>"
        ),
    )
    used, excluded = _points(fit)
    fig.add_scatter(
        x=fit.reading[used],
        y=fit.value[used],
        mode="markers",
        name="points used",
        marker={"color": POINT, "size": 8, "line": {"color": "#ffffff", "width": 1}},
        customdata=fit.residuals[used],
        hovertemplate=(
            f"reading %{{x:.5~g}} {ru}<br>reference %{{y:.5~g}} {vu}"
            f"<br>residual %{{customdata:.3~g}} {vu}<extra>point</extra>"
        ),
    )
    if excluded.size:
        reasons = dict(fit.excluded)
        fig.add_scatter(
            x=fit.reading[excluded],
            y=fit.value[excluded],
            mode="markers",
            name="points excluded",
            marker=EXCLUDED_MARKER,
            text=[reasons.get(int(i), "excluded") for i in excluded],
            hovertemplate=(
                f"reading %{{x:.5~g}} {ru}<br>reference %{{y:.5~g}} {vu}"
                "<br>excluded: %{text}<extra>not used</extra>"
            ),
        )
    return _layout(fig, x_title=axes.reading_title, y_title=axes.value_title)


def allowed_error(value: Any, tolerance_abs: float | None, tolerance_rel: float | None) -> Any:
    """The allowed error at ``value`` (a number or an array), as shared.decide judges it:
    tolerance_abs + tolerance_rel % of |value|."""
    return (tolerance_abs or 0.0) + (tolerance_rel or 0.0) / 100.0 * np.abs(value)


def residual_figure(
    fit: shared.Fit,
    axes: Axes,
    *,
    tolerance_abs: float | None,
    tolerance_rel: float | None,
    suspects: Mapping[int, str] | None = None,
) -> go.Figure:
    """Residuals (reference − fitted) against the reference value, with the tolerance lines
    ±(tolerance_abs + tolerance_rel % of value) and the curve's expanded uncertainty (k = 2).
    ``suspects`` (point index -> reason) are ringed and numbered as in the points table (from 1),
    with the reason on hover."""
    fig = go.Figure()
    vu = axes.value_unit
    used, excluded = _points(fit)
    values = fit.value[used]
    order = np.argsort(values)
    v_grid = np.linspace(values.min(), values.max(), GRID)
    allowed = allowed_error(v_grid, tolerance_abs, tolerance_rel)
    big_u = 2.0 * fit.curve_band(fit.reading[used][order], level=None).u
    tol_text = describe_tolerance(tolerance_abs, tolerance_rel)

    fig.add_scatter(
        x=values[order],
        y=big_u,
        mode="lines",
        line={"width": 0},
        hoverinfo="skip",
        showlegend=False,
        legendgroup="u",
    )
    fig.add_scatter(
        x=values[order],
        y=-big_u,
        mode="lines",
        line={"width": 0},
        fill="tonexty",
        fillcolor=UNCERTAINTY,
        name="curve uncertainty U (k = 2)",
        legendgroup="u",
        hoverinfo="skip",
    )
    fig.add_scatter(
        x=v_grid,
        y=allowed,
        mode="lines",
        name=f"tolerance {tol_text} {vu}",
        legendgroup="tol",
        line={"color": TOLERANCE, "width": 1.8, "dash": "dash"},
        hovertemplate=f"allowed ±%{{y:.3~g}} {vu}<extra>tolerance</extra>",
    )
    fig.add_scatter(
        x=v_grid,
        y=-allowed,
        mode="lines",
        showlegend=False,
        legendgroup="tol",
        line={"color": TOLERANCE, "width": 1.8, "dash": "dash"},
        hovertemplate=f"allowed ±%{{customdata:.3~g}} {vu}<extra>tolerance</extra>",
        customdata=allowed,
    )
    fig.add_hline(y=0, line={"color": "#9aa3b2", "width": 1})
    residuals = fit.residuals[used]
    outside = np.abs(residuals) > allowed_error(values, tolerance_abs, tolerance_rel)
    fig.add_scatter(
        x=values,
        y=residuals,
        mode="markers",
        name="residual",
        marker={
            "color": [TOLERANCE if o else POINT for o in outside],
            "size": 8,
            "line": {"color": "#ffffff", "width": 1},
        },
        customdata=fit.reading[used],
        hovertemplate=(
            f"reference %{{x:.5~g}} {vu}<br>residual %{{y:.3~g}} {vu}"
            f"<br>reading %{{customdata:.5~g}} {axes.reading_unit}"
            "<extra>point</extra>"
        ),
    )
    if outside.any():
        fig.add_scatter(
            x=values[outside],
            y=residuals[outside],
            mode="markers",
            name="outside tolerance",
            hoverinfo="skip",
            marker={"color": "rgba(0,0,0,0)", "size": 16, "line": {"color": TOLERANCE, "width": 2}},
        )
    flagged = sorted(i for i in (suspects or {}) if 0 <= i < fit.used.size and fit.used[i])
    if flagged and suspects:
        fig.add_scatter(
            x=fit.value[flagged],
            y=fit.residuals[flagged],
            mode="markers+text",
            name="suspect point (still used)",
            text=[f"#{i + 1}" for i in flagged],
            textposition="top center",
            textfont={"color": SUSPECT, "size": 12},
            customdata=[suspects[i] for i in flagged],
            marker={
                "color": SUSPECT,
                "size": 22,
                "symbol": "diamond-open",
                "line": {"color": SUSPECT, "width": 2.5},
            },
            hovertemplate=(
                f"point %{{text}}: reference %{{x:.5~g}} {vu}<br>residual %{{y:.3~g}} {vu}"
                "<br>suspect: %{customdata}<extra>suspect</extra>"
            ),
        )
    span = (
        max(float(allowed.max()), float(np.abs(fit.residuals[used]).max()), float(big_u.max()))
        * 1.2
    )
    shown = excluded[np.abs(fit.residuals[excluded]) <= span] if excluded.size else excluded
    if shown.size:
        reasons = dict(fit.excluded)
        fig.add_scatter(
            x=fit.value[shown],
            y=fit.residuals[shown],
            mode="markers",
            name="excluded",
            marker=EXCLUDED_MARKER,
            text=[reasons.get(int(i), "excluded") for i in shown],
            hovertemplate=(
                f"reference %{{x:.5~g}} {vu}<br>residual %{{y:.3~g}} {vu}"
                "<br>excluded: %{text}<extra>not used</extra>"
            ),
        )
    off_scale = excluded.size - shown.size
    if off_scale:
        fig.add_annotation(
            text=f"{off_scale} excluded point(s) off this scale",
            xref="paper",
            yref="paper",
            x=1,
            y=0,
            xanchor="right",
            yanchor="bottom",
            showarrow=False,
            font={"size": 12, "color": EXCLUDED},
        )
    fig.update_yaxes(range=[-span, span])
    return _layout(
        fig,
        x_title=f"reference {axes.value_title}",
        y_title=f"residual: reference − fitted ({vu})",
        height=340,
    )
