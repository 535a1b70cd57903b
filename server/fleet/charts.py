"""plotly figures of one sensor type's fleet, from the units' stored current fits (nothing is
refitted): every curve overlaid with the fleet median, each unit's difference from that median
against the type's tolerance, and each fitted parameter's spread across the units with the
ISO 13528 median and MADe (1.483 MAD) marked. Units with an open fleet-outlier flag are drawn in
the flag's colour and named."""

from __future__ import annotations

import html
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import plotly.graph_objects as go

import shared
from server.calibrations.charts import CURVE, SUSPECT, TOLERANCE, Axes, _layout, allowed_error
from server.formatting import measured
from shared.acceptance import describe_tolerance
from shared.fleet import Z_ACTION, median_mad

CURVE_POINTS = 60  # readings per drawn curve: 200 units stay a light page
OTHER = "#9aa3b2"  # the units without a flag: thin grey lines and dots
MAD_BAND = "rgba(180, 35, 24, 0.06)"  # the ±3 MADe interval behind a parameter's dots
HIGHLIGHT = {  # open fleet_outlier flag severity -> colour, line width, marker size
    "action": (TOLERANCE, 3.0, 11),
    "warning": (SUSPECT, 2.4, 10),
}
DASH = {"action": "solid", "warning": "dot"}  # not by colour alone
MAX_PARAMETER_PLOTS = 8


@dataclass(frozen=True, slots=True)
class Member:
    """One calibrated, unretired unit of the type: its current fit and, when it has an open
    fleet_outlier flag, the flag's severity and robust z."""

    serial: str
    fit: shared.Fit
    severity: str | None = None  # "action" | "warning"
    z: float | None = None


def _signal(m: Member) -> str:
    if m.severity is None:
        return ""
    z = f", robust z {m.z:+.2f}" if m.z is not None else ""
    return f"<br>fleet outlier ({m.severity}{z})"


def _rank(m: Member) -> int:
    return {None: 0, "warning": 1, "action": 2}.get(m.severity, 0)


def _drawing_order(members: Sequence[Member]) -> list[Member]:
    """Unflagged units first, then warnings, then actions: the flagged ones are drawn on top."""
    return sorted(members, key=_rank)


@dataclass(frozen=True, slots=True)
class FleetGrid:
    """Every unit's curve evaluated once on readings spanning all the units' valid ranges, and
    the fleet median there: what the median line and the difference plot are drawn from."""

    reading: np.ndarray  # (n,) reading units
    values: np.ndarray  # (units, n) value units, rows in the order of the fits; NaN out of range
    median: np.ndarray  # (n,) NaN where fewer than half the units are in range


def fleet_grid(fits: Sequence[shared.Fit], n: int = CURVE_POINTS) -> FleetGrid:
    """``n`` readings spanning every unit's valid range, each unit's value there and the median
    value of the units in range; the median is NaN where fewer than half the units are in range."""
    lo = min(f.valid_range[0] for f in fits)
    hi = max(f.valid_range[1] for f in fits)
    reading = np.linspace(lo, hi, n)
    values = np.array([f.to_value(reading) for f in fits], dtype=float)
    in_range = np.isfinite(values)
    enough = 2 * in_range.sum(axis=0) >= len(fits)
    median = np.full(n, np.nan)
    for j in np.flatnonzero(enough):
        median[j] = float(np.median(values[in_range[:, j], j]))
    return FleetGrid(reading, values, median)


def fleet_median(
    fits: Sequence[shared.Fit], n: int = CURVE_POINTS
) -> tuple[np.ndarray, np.ndarray]:
    """``n`` readings spanning every unit's valid range and the median value of the units in
    range there; NaN where fewer than half the units are in range."""
    grid = fleet_grid(fits, n)
    return grid.reading, grid.median


def curves_figure(
    members: Sequence[Member], axes: Axes, grid: FleetGrid | None = None
) -> go.Figure:
    """Each unit's curve over its own valid range (thin grey; flagged units in the flag's colour,
    thicker and named in the legend) and the fleet median as a dashed line (from ``grid``, the
    members' ``fleet_grid``, when given).

    Traces are given to plotly as dicts (validated once, by the figure): with hundreds of units
    that halves the time of building each as a ``go.Scatter`` first."""
    vu, ru = axes.value_unit, axes.reading_unit
    data = _grey_legend(members)
    median_trace = None
    if len(members) >= 2:
        grid = grid or fleet_grid([m.fit for m in members])
        median_trace = {
            "type": "scatter",
            "x": grid.reading,
            "y": grid.median,
            "mode": "lines",
            "name": "fleet median",
            "line": {"color": CURVE, "width": 2.5, "dash": "dash"},
            "hovertemplate": (
                f"fleet median<br>reading %{{x:.5~g}} {ru} → %{{y:.4~g}} {vu}<extra></extra>"
            ),
        }
    for m in _drawing_order(members):
        if m.severity is not None and median_trace is not None:
            data.append(median_trace)  # above the grey lines, under the flagged ones
            median_trace = None
        r = np.linspace(*m.fit.valid_range, CURVE_POINTS)
        data.append(
            _unit_trace(m, r, m.fit.to_value(r), f"reading %{{x:.5~g}} {ru} → %{{y:.4~g}} {vu}")
        )
    if median_trace is not None:
        data.append(median_trace)
    fig = go.Figure(data=data)
    return _layout(fig, x_title=axes.reading_title, y_title=axes.value_title, height=440)


def _grey_legend(members: Sequence[Member]) -> list[dict[str, Any]]:
    """One legend entry for all the grey lines (clicking it hides them), if there are any."""
    plain = sum(m.severity is None for m in members)
    if not plain:
        return []
    return [
        {
            "type": "scatter",
            "x": [None],
            "y": [None],
            "mode": "lines",
            "name": f"{'other units' if plain < len(members) else 'units'} ({plain})",
            "legendgroup": "fleet",
            "line": {"color": OTHER, "width": 1.5},
            "hoverinfo": "skip",
        }
    ]


def _unit_trace(m: Member, x: np.ndarray, y: np.ndarray, hover: str) -> dict[str, Any]:
    """One unit's line: thin grey in the "fleet" legend group, or a flagged unit in the flag's
    colour, width and dash with its own legend entry; the serial on hover above ``hover``."""
    colour, width, _ = HIGHLIGHT.get(m.severity or "", (OTHER, 1.0, 0))
    return {
        "type": "scatter",
        "x": x,
        "y": y,
        "mode": "lines",
        "name": m.serial,
        "legendgroup": "fleet" if m.severity is None else m.serial,
        "showlegend": m.severity is not None,
        "line": {"color": colour, "width": width, "dash": DASH.get(m.severity or "", "solid")},
        "opacity": 1.0 if m.severity else 0.75,
        "hovertemplate": f"<b>{html.escape(m.serial)}</b>{_signal(m)}<br>{hover}<extra></extra>",
    }


def difference_figure(
    members: Sequence[Member],
    axes: Axes,
    grid: FleetGrid,
    *,
    tolerance_abs: float | None,
    tolerance_rel: float | None,
) -> go.Figure | None:
    """Each unit's value minus the fleet median against reading, over the readings where the
    median is drawn (``grid``, the members' ``fleet_grid``: nothing is evaluated again), coloured
    as in ``curves_figure``; a zero line (the median itself) and, when the type has a tolerance,
    ±(tolerance_abs + tolerance_rel % of the median value) dashed. None when the median is
    nowhere defined."""
    defined = np.flatnonzero(np.isfinite(grid.median))
    if defined.size == 0:
        return None
    span = slice(int(defined[0]), int(defined[-1]) + 1)  # gaps inside stay gaps
    reading = grid.reading[span]
    median = grid.median[span]
    difference = grid.values[:, span] - median
    vu, ru = axes.value_unit, axes.reading_unit
    data = _grey_legend(members)
    guides: list[dict[str, Any]] = [
        {
            "type": "scatter",
            "x": reading,
            "y": np.where(np.isfinite(median), 0.0, np.nan),
            "mode": "lines",
            "name": "fleet median (zero)",
            "line": {"color": CURVE, "width": 2.5, "dash": "dash"},
            "customdata": median,
            "hovertemplate": (
                f"fleet median<br>reading %{{x:.5~g}} {ru} → %{{customdata:.4~g}} {vu}"
                "<extra></extra>"
            ),
        }
    ]
    if tolerance_abs or tolerance_rel:
        allowed = allowed_error(median, tolerance_abs, tolerance_rel)
        tol_text = describe_tolerance(tolerance_abs, tolerance_rel)
        for sign in (1.0, -1.0):
            guides.append(
                {
                    "type": "scatter",
                    "x": reading,
                    "y": sign * allowed,
                    "mode": "lines",
                    "name": f"tolerance {tol_text} {vu}" if sign > 0 else "−tolerance",
                    "legendgroup": "tolerance",
                    "showlegend": sign > 0,
                    "line": {"color": TOLERANCE, "width": 1.6, "dash": "dash"},
                    "customdata": allowed,
                    "hovertemplate": (
                        f"tolerance ±%{{customdata:.3~g}} {vu} of the median"
                        f"<br>at reading %{{x:.5~g}} {ru}<extra></extra>"
                    ),
                }
            )
    rows = sorted(range(len(members)), key=lambda i: _rank(members[i]))
    for i in rows:
        m = members[i]
        if m.severity is not None and guides:
            data.extend(guides)  # above the grey lines, under the flagged ones
            guides = []
        data.append(
            _unit_trace(
                m,
                reading,
                difference[i],
                f"reading %{{x:.5~g}} {ru}: %{{y:+.3~g}} {vu} from the fleet median",
            )
        )
    data.extend(guides)
    fig = go.Figure(data=data)
    return _layout(
        fig, x_title=axes.reading_title, y_title=f"unit − fleet median ({vu})", height=360
    )


@dataclass(frozen=True, slots=True)
class Families:
    """Which families the units' current fits use, and the units of the most used one."""

    shown: str  # label of the family whose parameters are plotted
    param_names: tuple[str, ...]
    members: tuple[Member, ...]  # the units fitted with it
    counts: tuple[tuple[str, int], ...]  # (label, units), most used first


def families_of(members: Sequence[Member], preferred: Sequence[str] = ()) -> Families:
    """Group the units by family and parameter names (a polynomial's degree changes them);
    the most used group is shown, ties going to the family listed first in ``preferred``."""
    groups: dict[tuple[str, tuple[str, ...]], list[Member]] = {}
    for m in members:
        groups.setdefault((m.fit.family, m.fit.param_names), []).append(m)
    per_family = Counter(family for family, _ in groups)

    def label(key: tuple[str, tuple[str, ...]]) -> str:
        family, names = key
        return family if per_family[family] == 1 else f"{family} ({', '.join(names)})"

    def order(key: tuple[str, tuple[str, ...]]) -> tuple[int, int, str]:
        listed = list(preferred).index(key[0]) if key[0] in preferred else len(preferred)
        return (-len(groups[key]), listed, label(key))

    keys = sorted(groups, key=order)
    top = keys[0]
    return Families(
        shown=label(top),
        param_names=top[1],
        members=tuple(groups[top]),
        counts=tuple((label(k), len(groups[k])) for k in keys),
    )


@dataclass(frozen=True, slots=True)
class Spread:
    """One parameter across the units: the ISO 13528 median and MADe (1.483 MAD)."""

    name: str
    median: float
    made: float


def _jitter(n: int) -> np.ndarray:
    """Deterministic vertical offsets in (-0.4, 0.4) so that equal values do not hide."""
    return ((np.arange(n) * 0.6180339887498949) % 1.0 - 0.5) * 0.8


def parameter_figure(name: str, members: Sequence[Member]) -> tuple[go.Figure, Spread]:
    """A strip of each unit's value of parameter ``name`` over a box, the median (solid) and
    median ± 3 MADe (dashed, shaded between); flagged units coloured. Hover: the serial."""
    values = np.array([m.fit.params[name] for m in members], dtype=float)
    med, made = median_mad(values)
    spread = Spread(name, med, made)
    fig = go.Figure()
    if made > 0:
        fig.add_shape(
            type="rect",
            xref="x",
            yref="paper",
            x0=med - 3 * made,
            x1=med + 3 * made,
            y0=0,
            y1=1,
            fillcolor=MAD_BAND,
            line={"width": 0},
            layer="below",
        )
    fig.add_trace(
        go.Box(
            x=values,
            y0=0,
            orientation="h",
            name="units",
            boxpoints=False,
            fillcolor="rgba(0, 0, 0, 0)",
            line={"color": OTHER, "width": 1},
            hoverinfo="skip",
            showlegend=False,
        )
    )
    y = _jitter(values.size)
    for severity in (None, "warning", "action"):
        idx = [i for i, m in enumerate(members) if m.severity == severity]
        if not idx:
            continue
        colour, _, size = HIGHLIGHT.get(severity or "", (OTHER, 0, 8))
        fig.add_trace(
            go.Scatter(
                x=values[idx],
                y=y[idx],
                mode="markers",
                name=severity or "units",
                marker={
                    "color": colour,
                    "size": size,
                    "line": {"color": "#ffffff", "width": 1},
                    "opacity": 1.0 if severity else 0.8,
                },
                text=[members[i].serial for i in idx],
                customdata=[_signal(members[i]) for i in idx],
                hovertemplate=f"<b>%{{text}}</b>%{{customdata}}<br>{name} = %{{x:.6~g}}"
                "<extra></extra>",
                showlegend=False,
            )
        )
    fig.add_trace(
        go.Scatter(
            x=[med, med],
            y=[-0.5, 0.5],
            mode="lines",
            name="median",
            line={"color": CURVE, "width": 2.5},
            hovertemplate=f"median {name} = {med:.6g}<extra></extra>",
            showlegend=False,
        )
    )
    if made > 0:
        lo, hi = med - Z_ACTION * made, med + Z_ACTION * made
        fig.add_trace(
            go.Scatter(
                x=[lo, lo, None, hi, hi],
                y=[-0.5, 0.5, None, -0.5, 0.5],
                mode="lines",
                name="median ± 3 MADe",
                line={"color": TOLERANCE, "width": 1.5, "dash": "dash"},
                hovertemplate=f"median ± 3 MADe: {lo:.6g} to {hi:.6g}<extra></extra>",
                showlegend=False,
            )
        )
    _layout(fig, x_title=name, y_title="", height=190)
    fig.update_layout(
        showlegend=False,
        margin={"l": 10, "r": 14, "t": 30, "b": 10},
        title={
            "text": (
                f"<b>{html.escape(name)}</b>  median {measured(med, 6)} · MADe {measured(made, 3)}"
            ),
            "font": {"size": 13},
            "x": 0,
            "xanchor": "left",
            "y": 0.97,
            "yanchor": "top",
        },
    )
    ends = [*values, med - Z_ACTION * made, med + Z_ACTION * made]
    pad = 0.06 * (max(ends) - min(ends)) or 0.06 * max(abs(med), 1.0)
    fig.update_xaxes(range=[min(ends) - pad, max(ends) + pad], tickformat="~g", exponentformat="e")
    fig.update_yaxes(
        range=[-0.6, 0.6], showgrid=False, showticklabels=False, ticks="", showline=False
    )
    return fig, spread


def parameter_figures(families: Families) -> list[tuple[go.Figure, Spread]]:
    """One small figure per parameter of the shown family (at most ``MAX_PARAMETER_PLOTS``)."""
    return [
        parameter_figure(name, families.members)
        for name in families.param_names[:MAX_PARAMETER_PLOTS]
    ]
