"""Plotly figure builders. Pages embed the figure JSON; static/morrow.js draws it.

Colours: the Okabe-Ito palette (safe for colour-blind readers). The three bands of the fan
chart are one blue at three strengths, so they also read in grey print, and the staffed-bed
line is black and dashed.
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import plotly.graph_objects as go

BLUE = "0, 114, 178"
ORANGE = "#E69F00"
VERMILLION = "#D55E00"
GREEN = "#009E73"
SKY = "#56B4E9"
BANDS = (("0.025", "0.975", "95%", 0.18), ("0.1", "0.9", "80%", 0.32),
         ("0.25", "0.75", "50%", 0.55))


LAYOUT: dict[str, Any] = {"margin": {"l": 50, "r": 20, "t": 30, "b": 40}, "font": {"size": 14},
                          "legend": {"orientation": "h", "y": -0.18},
                          "hovermode": "x unified"}


def _layout(fig: go.Figure, **extra: Any) -> go.Figure:
    fig.update_layout(**{**LAYOUT, "template": "plotly_white", **extra})
    return fig


def fan_chart(forecast: dict[str, Any], occupied_now: int, as_of_label: str = "",
              tz: ZoneInfo | None = None, *, wall: bool = False) -> dict[str, Any]:
    """Occupancy bands (50/80/95%) at each census instant, the median and the staffed beds,
    on a real time axis with nights named by their evening (app/web/fan_chart.py).
    ``as_of_label`` is kept for callers; the chart names "now" from the forecast itself."""
    from app.config import get_settings
    from app.web.fan_chart import fan_figure

    return fan_figure(forecast, occupied_now, tz or get_settings().tz, wall=wall,
                      template=_template())


@lru_cache(maxsize=1)
def _template() -> dict[str, Any]:
    """The plotly_white template as figure JSON (what ``template="plotly_white"`` embeds)."""
    import plotly.io as pio

    return dict(pio.templates["plotly_white"].to_plotly_json())


def census_label(census_at: str) -> str:
    """'Thu 03 Dec 00:00': the census instant as the unit's clock shows it."""
    from datetime import datetime

    return datetime.fromisoformat(census_at).strftime("%a %d %b %H:%M")


def survival_fit(group: dict[str, Any], km_time: list[float], km_surv: list[float],
                 grid: np.ndarray, fitted: np.ndarray) -> dict[str, Any]:
    fig = go.Figure()
    fig.add_trace(go.Scatter(x=[0.0, *km_time], y=[1.0, *km_surv], mode="lines",
                             line_shape="hv", name="Kaplan-Meier", line={"color": "black"}))
    fig.add_trace(go.Scatter(x=grid, y=fitted, mode="lines",
                             name=f"Coxian, {group['phases']} phases",
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


# Planning (app/web/planning_page.py): reference line of the trade, with its source.
BAGUST_OCCUPANCY = 0.85  # Bagust, Place & Posnett, BMJ 1999;319:155 (METHODS.md section 4)


def _band(fig: go.Figure, x: list[int], low: list[float], high: list[float], colour: str,
          name: str, row: int, *, legend: bool = True) -> None:
    """A shaded confidence band between two lines (the upper line drawn first)."""
    fig.add_trace(go.Scatter(x=x, y=high, mode="lines", line={"width": 0}, showlegend=False,
                             hoverinfo="skip"), row=row, col=1)
    fig.add_trace(go.Scatter(x=x, y=low, mode="lines", line={"width": 0}, fill="tonexty",
                             fillcolor=f"rgba({colour}, 0.22)", name=name, hoverinfo="skip",
                             showlegend=legend), row=row, col=1)


def capacity_curve(report: dict[str, Any]) -> dict[str, Any]:
    """Two panels over the bed count: the chance an arrival finds no bed (simulation with its
    confidence band, the Erlang loss formula, the target) and the mean occupancy (with the
    85% line of the trade); the beds needed and the staffed beds marked on both."""
    from plotly.subplots import make_subplots

    rows = report["curve"]
    x = [r["beds"] for r in rows]
    fig = make_subplots(rows=2, cols=1, shared_xaxes=True, vertical_spacing=0.1,
                        subplot_titles=("Chance an arrival finds no bed", "Mean bed occupancy"))

    def pct(metric: str, key: str) -> list[float]:
        return [max(r[metric][key], 0.0) * 100 for r in rows]

    level = f"{report['settings']['level']:.0%}"
    _band(fig, x, pct("share_turned_away", "ci_low"), pct("share_turned_away", "ci_high"),
          BLUE, f"{level} interval", 1)
    fig.add_trace(go.Scatter(x=x, y=pct("share_turned_away", "mean"), mode="lines+markers",
                             name="simulated", line={"color": f"rgb({BLUE})", "width": 3},
                             hovertemplate="%{x} beds: %{y:.1f}% find no bed<extra></extra>"),
                  row=1, col=1)
    fig.add_trace(go.Scatter(x=x, y=[r["erlang_b"] * 100 for r in rows], mode="lines",
                             name="Erlang loss formula",
                             line={"color": ORANGE, "width": 2, "dash": "dash"},
                             hovertemplate="Erlang: %{y:.1f}%<extra></extra>"), row=1, col=1)
    target = report["settings"]["target"] * 100
    fig.add_trace(go.Scatter(x=[x[0], x[-1]], y=[target, target], mode="lines",
                             name=f"target {target:g}%",
                             line={"color": VERMILLION, "width": 2, "dash": "dot"},
                             hoverinfo="skip"), row=1, col=1)
    _band(fig, x, pct("occupancy_rate", "ci_low"), pct("occupancy_rate", "ci_high"), BLUE,
          f"{level} interval", 2, legend=False)
    fig.add_trace(go.Scatter(x=x, y=pct("occupancy_rate", "mean"), mode="lines+markers",
                             name="mean occupancy", showlegend=False,
                             line={"color": f"rgb({BLUE})", "width": 3},
                             hovertemplate="%{x} beds: %{y:.0f}% occupied<extra></extra>"),
                  row=2, col=1)
    fig.add_trace(go.Scatter(x=[x[0], x[-1]], y=[BAGUST_OCCUPANCY * 100] * 2, mode="lines",
                             name="85% occupancy (Bagust et al. 1999)",
                             line={"color": "grey", "width": 1.5, "dash": "dot"},
                             hoverinfo="skip"), row=2, col=1)
    needed = report["beds_needed"]["simulation"]
    marks = [(needed, f"{needed} beds needed", GREEN, "solid")]
    if report.get("staffed_beds") is not None:
        marks.append((report["staffed_beds"], f"{report['staffed_beds']} staffed now", "black",
                      "dash"))
    for position, (beds, label, colour, dash) in enumerate(marks):
        if x[0] <= beds <= x[-1]:
            fig.add_vline(x=beds, line={"color": colour, "dash": dash, "width": 2})
            # Inside the top panel, beside its line: beds needed to the right, staffed to the left.
            fig.add_annotation(x=beds, y=1.0, xref="x", yref="y domain", text=label,
                               showarrow=False, xanchor="left" if position == 0 else "right",
                               yanchor="top", xshift=4 if position == 0 else -4,
                               bgcolor="rgba(255, 255, 255, 0.85)",
                               font={"color": colour, "size": 13})
    _layout(fig, height=620, hovermode="x unified", margin={"l": 60, "r": 20, "t": 60, "b": 40},
            legend={"orientation": "h", "y": -0.1})
    fig.update_yaxes(title_text="% of arrivals", rangemode="tozero", ticksuffix="%", row=1,
                     col=1)
    fig.update_yaxes(title_text="% of beds", range=[0, 100], ticksuffix="%", row=2, col=1)
    fig.update_xaxes(title_text="beds", dtick=1 if len(x) <= 25 else 2, row=2, col=1)
    return fig.to_plotly_json()


def scenario_points(report: dict[str, Any]) -> dict[str, Any]:
    """Each scenario beside the current state at the same beds: the chance of finding no bed
    and the mean occupancy, each a point with its confidence interval."""
    from plotly.subplots import make_subplots

    scenarios = list(reversed(report["scenarios"]))  # current state on top
    names = [s["name"] for s in scenarios]
    fig = make_subplots(rows=1, cols=2, shared_yaxes=True, horizontal_spacing=0.04,
                        subplot_titles=(f"Chance an arrival finds no bed, "
                                        f"{report['compare_at']} beds", "Mean bed occupancy"))
    for col, metric, hover in ((1, "share_turned_away", "%{x:.1f}% find no bed"),
                               (2, "occupancy_rate", "%{x:.0f}% occupied")):
        means = [s["metrics"][metric]["mean"] * 100 for s in scenarios]
        plus = [(s["metrics"][metric]["ci_high"] - s["metrics"][metric]["mean"]) * 100
                for s in scenarios]
        minus = [(s["metrics"][metric]["mean"] - s["metrics"][metric]["ci_low"]) * 100
                 for s in scenarios]
        # One trace per colour: error bars take a single colour, and with the markers'
        # list of colours the browser drew them black ("Invalid color specifier").
        current = report["scenarios"][0]["name"]
        for colour, is_current in (("black", True), (f"rgb({BLUE})", False)):
            rows = [i for i, n in enumerate(names) if (n == current) == is_current]
            if not rows:
                continue
            fig.add_trace(go.Scatter(
                x=[means[i] for i in rows], y=[names[i] for i in rows], mode="markers",
                showlegend=False, marker={"size": 13, "color": colour, "symbol": "diamond"},
                error_x={"type": "data", "array": [plus[i] for i in rows],
                         "arrayminus": [minus[i] for i in rows], "thickness": 2, "width": 6,
                         "color": colour},
                hovertemplate=f"%{{y}}: {hover}<extra></extra>"), row=1, col=col)
        base = report["scenarios"][0]["metrics"][metric]["mean"] * 100
        fig.add_vline(x=base, line={"color": "black", "dash": "dot", "width": 1}, row=1,
                      col=col)
    target = report["settings"]["target"] * 100
    fig.add_vline(x=target, line={"color": VERMILLION, "dash": "dot", "width": 2}, row=1, col=1)
    fig.add_annotation(x=target, y=0.0, xref="x", yref="y domain", text=f"target {target:g}%",
                       showarrow=False, xanchor="left", yanchor="bottom", xshift=3,
                       font={"color": VERMILLION, "size": 12})
    _layout(fig, height=140 + 55 * len(names), hovermode="closest",
            margin={"l": 20, "r": 20, "t": 50, "b": 40})
    fig.update_xaxes(ticksuffix="%", rangemode="tozero", row=1, col=1,
                     title_text="% of arriving patients who find no bed")
    fig.update_xaxes(ticksuffix="%", row=1, col=2, title_text="% of beds occupied")
    fig.update_yaxes(automargin=True)
    return fig.to_plotly_json()
