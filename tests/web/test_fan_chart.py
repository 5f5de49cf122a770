"""The fan chart's time axis, night names and hover (app/web/fan_chart.py).

Reference: plotly's own figure validation (``go.Figure`` raises on any unknown property or
bad value) and, for the weekdays, the Gregorian calendar (Python's ``calendar``: 4 December
2026 is a Friday).
"""

from __future__ import annotations

import calendar
from datetime import datetime, timedelta
from zoneinfo import ZoneInfo

import plotly.graph_objects as go

from app.web.fan_chart import fan_figure

UTC = ZoneInfo("UTC")
Q = {"0.025": 8, "0.1": 9, "0.25": 10, "0.5": 11, "0.75": 12, "0.9": 13, "0.975": 14}


def _forecast(census_hour: int) -> dict:
    # Mon 30 Nov 2026 08:00; census nightly at census_hour (00:00 falls on the next date).
    first = datetime(2026, 11, 30, census_hour, tzinfo=UTC)
    if census_hour < 12:
        first += timedelta(days=1)
    return {"as_of": "2026-11-30T08:00:00+00:00",
            "days": [{"census_at": (first + timedelta(days=i)).isoformat(), "beds": 16,
                      "quantiles": Q} for i in range(7)]}


def test_the_axis_is_time_so_this_morning_to_tonight_is_sixteen_hours_wide() -> None:
    figure = go.Figure(fan_figure(_forecast(0), 12, UTC))  # validated by plotly
    assert figure.layout.xaxis.type == "date"
    x = [datetime.fromisoformat(v) for v in figure.data[-2].x]
    gaps = [(b - a).total_seconds() / 3600 for a, b in zip(x, x[1:], strict=False)]
    assert gaps == [16.0] + [24.0] * 6


def test_both_census_times_name_the_same_nights() -> None:
    assert calendar.weekday(2026, 12, 4) == calendar.FRIDAY
    midnight = fan_figure(_forecast(0), 12, UTC)["layout"]["xaxis"]["ticktext"]
    eleven = fan_figure(_forecast(23), 12, UTC)["layout"]["xaxis"]["ticktext"]
    assert [t.split("<br>")[0] for t in midnight] == [t.split("<br>")[0] for t in eleven]
    assert midnight[4] == "Fri night<br>census Sat 00:00"
    assert eleven[4] == "Fri night<br>census Fri 23:00"
    assert midnight[0].startswith("Mon night")


def test_the_hover_of_every_band_carries_its_upper_bound() -> None:
    figure = fan_figure(_forecast(0), 12, UTC)
    bands = [t for t in figure["data"] if t.get("fill") == "tonexty"]
    assert [t["name"] for t in bands] == ["95% band", "80% band", "50% band"]
    for band, (low, high) in zip(bands, (("0.025", "0.975"), ("0.1", "0.9"), ("0.25", "0.75")),
                                 strict=True):
        assert band["y"][1:] == [Q[low]] * 7 and band["customdata"][1:] == [Q[high]] * 7
        assert "%{y} to %{customdata}" in band["hovertemplate"]
    go.Figure(figure)


def test_the_small_chart_and_the_wall_chart_are_valid() -> None:
    small = go.Figure(fan_figure(_forecast(23), 12, UTC, small=True, wall=True))
    assert small.layout.font.size == 22
    assert [t.name for t in small.data if t.fill == "tonexty"] == ["80% band"]
    assert list(small.layout.xaxis.ticktext)[:2] == ["Mon", "Tue"]
