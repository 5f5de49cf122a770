"""The command line's forecast table names each night as people say it (app/nights.py).

Reference for the weekday: the Gregorian calendar (Python's ``calendar``: 4 December 2026 is
a Friday). The JSON output is fixed by the data contract and does not change.
"""

from __future__ import annotations

import calendar
from collections.abc import Iterator

import pytest

from app.cli.main import render_forecast_table
from app.config import get_settings

Q = {"0.025": 8, "0.1": 9, "0.25": 10, "0.5": 11, "0.75": 12, "0.9": 13, "0.975": 14}


@pytest.fixture(autouse=True)
def london(monkeypatch: pytest.MonkeyPatch) -> Iterator[None]:
    monkeypatch.setenv("MORROW_TIMEZONE", "Europe/London")
    get_settings.cache_clear()
    yield
    get_settings.cache_clear()


def _result(census_at: str) -> dict:
    return {"unit": "KV-X", "as_of": "2026-12-04T08:00:00+00:00",
            "model": {"trained_until": "2026-12-01T08:00:00+00:00"},
            "days": [{"census_at": census_at, "beds": 16, "quantiles": Q,
                      "p_over_capacity": 0.14}]}


def test_both_census_times_print_the_same_night() -> None:
    assert calendar.weekday(2026, 12, 4) == calendar.FRIDAY
    midnight = render_forecast_table(_result("2026-12-05T00:00:00+00:00")).splitlines()
    eleven = render_forecast_table(_result("2026-12-04T23:00:00+00:00")).splitlines()
    assert midnight[1].split()[0] == "night"
    assert midnight[2].startswith("Fri 4 Dec night ")
    assert eleven[2].startswith("Fri 4 Dec night ")
    assert "2026-12-05T00:00:00+00:00" in midnight[2] and "14%" in midnight[2]
