"""The fan chart of a unit's week: occupancy bands at each census instant on a real time axis.

The x axis is time on the site's clock (from the forecast's "now" to the last census), so the
hours from this morning to tonight's census are as wide as they are, not a whole day. Each
census is labelled by the night people call it ("Mon night") with its instant beneath
("census Tue 00:00"), the same for every unit whatever its census time (app/nights.py). The
hover lists both bounds of every band.

Built as plain figure JSON rather than through ``go.Figure``: the page rebuilds it after
every score, and plotly's validation took about half of that page's time. The unit page
draws the full chart; the home page a small one per unit (``small=True``); the wall screen
both with large text (``wall=True``).
"""

from __future__ import annotations

from datetime import datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

from app.nights import night_of

BLUE = "0, 114, 178"
BANDS = (("0.025", "0.975", "95%", 0.18), ("0.1", "0.9", "80%", 0.32),
         ("0.25", "0.75", "50%", 0.55))
SMALL_BANDS = (BANDS[1],)
PLAIN_X = "%Y-%m-%d %H:%M"  # Plotly reads this as a wall-clock time on a date axis
PAD = timedelta(hours=3)  # room either side so the first and last markers are whole


def _local(iso: str, tz: ZoneInfo) -> datetime:
    return datetime.fromisoformat(iso).astimezone(tz)


def fan_figure(forecast: dict[str, Any], occupied_now: int, tz: ZoneInfo, *,
               small: bool = False, wall: bool = False,
               template: dict[str, Any] | None = None) -> dict[str, Any]:
    """Figure JSON: the 50/80/95% bands (only 80% when ``small``), the median and the
    staffed beds from now to the last census instant of ``forecast``."""
    days = forecast["days"]
    now = _local(forecast["as_of"], tz)
    censuses = [_local(d["census_at"], tz) for d in days]
    nights = [night_of(c, tz) for c in censuses]
    x = [now.strftime(PLAIN_X)] + [c.strftime(PLAIN_X) for c in censuses]
    names = [f"now {now:%H:%M}"] + [f"{n.name} ({n.census_label})" for n in nights]
    traces: list[dict[str, Any]] = []
    for low, high, label, alpha in (SMALL_BANDS if small else BANDS):
        lows = [occupied_now] + [d["quantiles"][low] for d in days]
        highs = [occupied_now] + [d["quantiles"][high] for d in days]
        traces.append({"type": "scatter", "x": x, "y": highs, "mode": "lines",
                       "line": {"width": 0}, "showlegend": False, "hoverinfo": "skip"})
        traces.append({"type": "scatter", "x": x, "y": lows, "mode": "lines",
                       "line": {"width": 0}, "fill": "tonexty",
                       "fillcolor": f"rgba({BLUE}, {alpha})", "name": f"{label} band",
                       "customdata": highs,
                       "hovertemplate": f"{label} band: %{{y}} to %{{customdata}}<extra></extra>"})
    traces.append({"type": "scatter", "x": x,
                   "y": [occupied_now] + [d["quantiles"]["0.5"] for d in days],
                   "mode": "lines+markers", "name": "median", "customdata": names,
                   "hovertemplate": "%{customdata}: median %{y}<extra></extra>",
                   "line": {"color": f"rgb({BLUE})", "width": 2 if small else 3},
                   "marker": {"size": 5 if small else 7}})
    beds = [d["beds"] for d in days]
    if all(b is not None for b in beds):
        traces.append({"type": "scatter", "x": x, "y": [beds[0]] + beds, "mode": "lines",
                       "name": "staffed beds",
                       "hovertemplate": "staffed beds: %{y}<extra></extra>",
                       "line": {"color": "black", "dash": "dash", "width": 2, "shape": "hv"}})
    top = max([d["quantiles"]["0.975" if not small else "0.9"] for d in days]
              + [b or 0 for b in beds] + [occupied_now])
    if small:
        ticktext = [n.evening.strftime("%a") for n in nights]
    else:
        ticktext = [f"{n.name}<br>{n.census_label}" for n in nights]
    font = 22 if wall else (12 if small else 14)
    layout: dict[str, Any] = {
        "font": {"size": font}, "hovermode": "x unified", "showlegend": not small,
        "legend": {"orientation": "h", "y": -0.3 if not small else -0.2},
        "margin": ({"l": 40 if not wall else 60, "r": 10, "t": 10, "b": 30 if not wall else 45}
                   if small else {"l": 60 if wall else 50, "r": 20, "t": 30,
                                  "b": 70 if wall else 60}),
        "yaxis": {"title": {"text": "" if small else "patients at census"},
                  "rangemode": "tozero", "range": [0, top + 2],
                  "dtick": 2 if top < 30 and not small else (10 if top >= 30 else 5)},
        "xaxis": {"type": "date", "tickmode": "array", "tickvals": x[1:],
                  "ticktext": ticktext, "hoverformat": "%a %d %b %H:%M",
                  "range": [(now - PAD).strftime(PLAIN_X),
                            (censuses[-1] + (2 if small else 3) * PAD).strftime(PLAIN_X)],
                  "showgrid": True},
        "height": (240 if wall else 170) if small else (520 if wall else 380),
    }
    if template is not None:
        layout["template"] = template
    else:
        layout.update({"plot_bgcolor": "white", "paper_bgcolor": "white"})
        layout["xaxis"]["gridcolor"] = layout["yaxis"]["gridcolor"] = "#E5ECF6"
    return {"data": traces, "layout": layout}
