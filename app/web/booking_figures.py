"""The booking check's chart: for each candidate day, the chance a bed is free on the night
of admission (bars, left axis) and the worst night's chance of more patients than staffed
beds with the booking (line, right axis), against the unit's warning and alarm levels.

Plain figure JSON (no plotly validation). Both axes read in whole percentages: the right
axis's step is chosen from 1, 2, 5, 10, 20 or 25 points so no tick reads "2.23".
"""

from __future__ import annotations

import math
from typing import Any

from app.alert_levels import RISK_TERM
from app.web.figures import _template  # plotly_white as figure JSON, built once

GREEN = "#009E73"
GREEN_LIGHT = "rgba(0, 158, 115, 0.45)"
INK = "#1b1b1b"
AMBER = "#8a6500"
RED = "#B3200E"
STEPS = (1, 2, 5, 10, 20, 25)
MAX_TICKS = 6


def percent_axis(top_percent: float) -> dict[str, Any]:
    """A 0..top axis in whole percentages with at most ``MAX_TICKS`` steps above zero."""
    top = max(1.0, min(100.0, top_percent))
    step = next((s for s in STEPS if top / s <= MAX_TICKS), 25)
    upper = min(100.0, step * math.ceil(top / step))
    return {"range": [0, upper], "tick0": 0, "dtick": step, "ticksuffix": "%",
            "tickformat": "d"}


def booking_strip(strip: list[dict[str, Any]], requested: str | None,
                  warning: float, alarm: float) -> dict[str, Any]:
    labels = [f"{s['weekday']} {int(s['date'][8:])}" for s in strip]
    worst = [s["worst_after"] * 100 for s in strip]
    colours = [GREEN if s["date"] == requested else GREEN_LIGHT for s in strip]
    traces: list[dict[str, Any]] = [
        {"type": "bar", "x": labels, "y": [s["p_bed_free"] * 100 for s in strip],
         "name": "chance a bed is free on the night of admission",
         "marker": {"color": colours, "line": {"color": INK, "width": [
             3 if s["date"] == requested else 0 for s in strip]}},
         "hovertemplate": "%{x}: bed free %{y:.0f}%<extra></extra>"},
        {"type": "scatter", "x": labels, "y": worst, "mode": "lines+markers", "yaxis": "y2",
         "name": f"worst night's {RISK_TERM}, with this booking",
         "line": {"color": INK, "width": 2},
         "hovertemplate": "%{x}: worst night %{y:.0f}%<extra></extra>"},
    ]
    right = percent_axis(max([*worst, alarm * 100]) * 1.1)
    shapes = [{"type": "line", "xref": "paper", "x0": 0, "x1": 1, "yref": "y2",
               "y0": level * 100, "y1": level * 100,
               "line": {"color": colour, "width": 2, "dash": dash}}
              for level, colour, dash in ((warning, AMBER, "dash"), (alarm, RED, "dot"))]
    annotations = [{"xref": "paper", "x": 1, "xanchor": "right", "yref": "y2", "y": level * 100,
                    "yanchor": "bottom", "showarrow": False, "font": {"color": colour},
                    "text": f"{name} level {level * 100:g}%"}
                   for level, colour, name in ((warning, AMBER, "warning"), (alarm, RED, "alarm"))]
    if requested is not None and requested in [s["date"] for s in strip]:
        annotations.append({"x": labels[[s["date"] for s in strip].index(requested)],
                            "y": 100, "yref": "y", "yanchor": "bottom", "showarrow": False,
                            "text": "requested"})
    layout = {"margin": {"l": 60, "r": 70, "t": 30, "b": 40}, "font": {"size": 14},
              "legend": {"orientation": "h", "y": -0.2}, "hovermode": "x unified",
              "template": _template(), "height": 320,
              "xaxis": {"type": "category", "title": {"text": "day of admission"}},
              "yaxis": {"title": {"text": "bed free (%)"}, "range": [0, 108], "tick0": 0,
                        "dtick": 20, "ticksuffix": "%", "tickformat": "d"},
              "yaxis2": {**right, "title": {"text": "worst night (%)"}, "overlaying": "y",
                         "side": "right", "showgrid": False},
              "shapes": shapes, "annotations": annotations}
    return {"data": traces, "layout": layout}
