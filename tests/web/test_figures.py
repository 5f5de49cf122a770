"""The fan chart is built as plain figure JSON: plotly's own validator must accept it."""

from __future__ import annotations

import plotly.graph_objects as go
import plotly.io as pio

from app.web.figures import fan_chart

QUANTILES = {"0.025": 8, "0.1": 9, "0.25": 10, "0.5": 11, "0.75": 12, "0.9": 13, "0.975": 14}


def test_fan_chart_is_valid_plotly_json() -> None:
    forecast = {"as_of": "2026-11-30T08:00:00+00:00",
                "days": [{"census_at": f"2026-12-0{i + 1}T00:00:00+00:00", "beds": 16,
                          "quantiles": QUANTILES} for i in range(7)]}
    figure = fan_chart(forecast, 12, "now 08:00")
    # Reference: plotly's figure validation raises on any unknown property or bad value.
    checked = go.Figure(figure)
    assert len(checked.data) == 8  # three bands (two traces each), median, staffed beds
    assert list(checked.data[6].y) == [12] + [11] * 7
    assert checked.data[7].line.shape == "hv" and list(checked.data[7].y) == [16] * 8
    assert checked.layout.yaxis.range == (0, 18)
    # The same look as template="plotly_white".
    assert checked.layout.template == pio.templates["plotly_white"]
