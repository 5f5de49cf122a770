"""The planning page's figure for units together: waiting to move on against extra beds."""

from __future__ import annotations

from typing import Any

import plotly.graph_objects as go

from app.web.figures import BLUE, ORANGE, _layout

__all__ = ["waiting_against_beds"]


def waiting_against_beds(report: dict[str, Any]) -> dict[str, Any]:
    """Bed-days a week held by patients waiting to move on, per unit that passes patients on,
    against the extra beds of the varied unit, with the interval as error bars."""
    rows = report["curve"]
    vary = report["settings"]["vary"]
    x = [r["extra"] for r in rows]
    senders = sorted({r["source"] for r in report["routes"]}) or [
        u["unit"] for u in report["units"]]
    fig = go.Figure()
    colours = [f"rgb({BLUE})", ORANGE, "grey"]
    level = f"{report['settings']['level']:.0%}"
    for k, unit in enumerate(senders):
        est = [r["units"][unit]["waiting_bed_days_per_week"] for r in rows]
        mean = [max(e["mean"], 0.0) for e in est]
        fig.add_trace(go.Scatter(
            x=x, y=mean, mode="lines+markers", name=f"{unit}: bed-days waiting a week",
            line={"color": colours[k % len(colours)], "width": 3},
            error_y={"type": "data", "symmetric": False,
                     "array": [max(e["ci_high"], 0.0) - m for e, m in zip(est, mean,
                                                                           strict=True)],
                     "arrayminus": [m - max(e["ci_low"], 0.0) for e, m in zip(est, mean,
                                                                              strict=True)]},
            hovertemplate=f"+%{{x}} beds in {vary}: %{{y:.2f}} bed-days a week "
                          f"({level} interval in the bars)<extra></extra>"))
    _layout(fig, height=360, hovermode="closest",
            xaxis={"title": f"extra staffed beds in {vary}", "dtick": 1},
            yaxis={"title": "bed-days a week", "rangemode": "tozero"})
    out: dict[str, Any] = fig.to_plotly_json()
    return out
