"""The small plot of a drift flag, from the compact grid kept in its evidence."""

from __future__ import annotations

from typing import Any

import plotly.graph_objects as go

from server.calibrations.charts import BAND, CURVE, FONT, TOLERANCE


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
        height=220,
        margin={"l": 8, "r": 8, "t": 28, "b": 8},
        font={"family": FONT, "size": 12, "color": "#1d2433"},
        paper_bgcolor="#ffffff",
        plot_bgcolor="#ffffff",
        showlegend=True,
        legend={"orientation": "h", "x": 0, "y": 1.02, "yanchor": "bottom", "font": {"size": 11}},
        xaxis={**axis, "title": {"text": f"reading ({ru})"}},
        yaxis={**axis, "title": {"text": f"current − previous ({vu})"}},
    )
    return fig
