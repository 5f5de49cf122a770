"""Plotly figure builders. Pages embed the figure JSON; static/morrow.js draws it.

Colours: the Okabe-Ito palette (safe for colour-blind readers). The three bands of the fan
chart are one blue at three strengths, so they also read in grey print, and the staffed-bed
line is black and dashed.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import plotly.graph_objects as go

BLUE = "0, 114, 178"
ORANGE = "#E69F00"
VERMILLION = "#D55E00"
GREEN = "#009E73"
SKY = "#56B4E9"
BANDS = (("0.025", "0.975", "95%", 0.18), ("0.1", "0.9", "80%", 0.32), ("0.25", "0.75", "50%", 0.55))


def _layout(fig: go.Figure, **extra: Any) -> go.Figure:
    settings: dict[str, Any] = {"margin": {"l": 50, "r": 20, "t": 30, "b": 40},
                                "template": "plotly_white", "font": {"size": 14},
                                "legend": {"orientation": "h", "y": -0.18},
                                "hovermode": "x unified"}
    fig.update_layout(**{**settings, **extra})
    return fig


def fan_chart(forecast: dict[str, Any], occupied_now: int, as_of_label: str) -> dict[str, Any]:
    """Occupancy bands (50/80/95%) at each census instant, the median and the staffed beds."""
    days = forecast["days"]
    x = [as_of_label] + [census_label(d["census_at"]) for d in days]
    fig = go.Figure()
    for low, high, label, alpha in BANDS:
        lows = [occupied_now] + [d["quantiles"][low] for d in days]
        highs = [occupied_now] + [d["quantiles"][high] for d in days]
        fig.add_trace(go.Scatter(x=x, y=highs, mode="lines", line={"width": 0},
                                 showlegend=False, hoverinfo="skip"))
        fig.add_trace(go.Scatter(x=x, y=lows, mode="lines", line={"width": 0}, fill="tonexty",
                                 fillcolor=f"rgba({BLUE}, {alpha})", name=f"{label} band",
                                 hovertemplate=f"{label}: %{{y}}–<extra></extra>"))
    fig.add_trace(go.Scatter(x=x, y=[occupied_now] + [d["quantiles"]["0.5"] for d in days],
                             mode="lines+markers", name="median",
                             line={"color": f"rgb({BLUE})", "width": 3}))
    beds = [d["beds"] for d in days]
    if all(b is not None for b in beds):
        fig.add_trace(go.Scatter(x=x, y=[beds[0]] + beds, mode="lines", name="staffed beds",
                                 line={"color": "black", "dash": "dash", "width": 2},
                                 line_shape="hv"))
    top = max([d["quantiles"]["0.975"] for d in days] + [b or 0 for b in beds] + [occupied_now])
    _layout(fig, yaxis={"title": "patients at census", "rangemode": "tozero",
                        "range": [0, top + 2], "dtick": 2 if top < 30 else 5},
            xaxis={"type": "category"}, height=360)
    return fig.to_plotly_json()


def census_label(census_at: str) -> str:
    """'Thu 03 Dec 00:00': the census instant as the unit's clock shows it."""
    from datetime import datetime

    return datetime.fromisoformat(census_at).strftime("%a %d %b %H:%M")


def risk_bars(forecast: dict[str, Any]) -> dict[str, Any]:
    days = forecast["days"]
    fig = go.Figure(go.Bar(x=[d["date"] for d in days],
                           y=[(d["p_over_capacity"] or 0) * 100 for d in days],
                           marker_color=VERMILLION, name="chance over staffed beds",
                           hovertemplate="%{y:.0f}%<extra></extra>"))
    _layout(fig, yaxis={"title": "% chance over staffed beds", "range": [0, 100]},
            xaxis={"type": "category"}, height=220)
    return fig.to_plotly_json()


def booking_strip(strip: list[dict[str, Any]]) -> dict[str, Any]:
    """Chance a bed is free on each candidate night, and the added risk of running out."""
    labels = [f"{s['weekday']} {s['date'][8:]}" for s in strip]
    fig = go.Figure()
    fig.add_trace(go.Bar(x=labels, y=[s["p_bed_free"] * 100 for s in strip],
                         name="chance a bed is free that night", marker_color=GREEN,
                         hovertemplate="%{y:.0f}%<extra></extra>"))
    fig.add_trace(go.Scatter(x=labels,
                             y=[s["added_risk"] * 100 for s in strip], mode="lines+markers",
                             name="added chance of running out (worst night of the stay)",
                             line={"color": VERMILLION, "width": 2}, yaxis="y2",
                             hovertemplate="+%{y:.1f} points<extra></extra>"))
    _layout(fig, yaxis={"title": "% bed free", "range": [0, 100]},
            yaxis2={"title": "added risk (points)", "overlaying": "y", "side": "right",
                    "rangemode": "tozero"},
            xaxis={"type": "category"}, height=300)
    return fig.to_plotly_json()


def survival_fit(group: dict[str, Any], km_time: list[float], km_surv: list[float],
                 grid: np.ndarray, fitted: np.ndarray) -> dict[str, Any]:
    fig = go.Figure()
    fig.add_trace(go.Scatter(x=[0.0, *km_time], y=[1.0, *km_surv], mode="lines",
                             line_shape="hv", name="Kaplan-Meier", line={"color": "black"}))
    fig.add_trace(go.Scatter(x=grid, y=fitted, mode="lines", name=f"Coxian, {group['phases']} phases",
                             line={"color": ORANGE, "width": 3, "dash": "dot"}))
    _layout(fig, xaxis={"title": "days in the unit"}, yaxis={"title": "still in", "range": [0, 1]},
            height=280, hovermode="closest")
    return fig.to_plotly_json()


def pit_histogram(pit: list[float]) -> dict[str, Any]:
    fig = go.Figure(go.Histogram(x=pit, xbins={"start": 0, "end": 1, "size": 0.1},
                                 histnorm="probability density", marker_color=f"rgb({BLUE})",
                                 name="PIT"))
    fig.add_hline(y=1.0, line_dash="dash", line_color="black")
    _layout(fig, xaxis={"title": "randomised PIT (flat means calibrated)", "range": [0, 1]},
            yaxis={"title": "density"}, height=260, hovermode="closest")
    return fig.to_plotly_json()
