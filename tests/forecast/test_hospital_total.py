"""The hospital total is the convolution of the units' pmfs for the same night.

Reference: the sum of independent Poisson counts is Poisson with the summed mean (a standard
result; scipy.stats.poisson gives its quantiles and tail), so two units with Poisson pmfs
must give a total whose median, 80% band and chance over the summed beds are scipy's.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from zoneinfo import ZoneInfo

import numpy as np
from scipy import stats

from app.forecast.hospital_total import total_by_night

SITE = ZoneInfo("UTC")


def _unit(mean: float, beds: int, census_hour: int, nights: int = 3) -> dict:
    first = datetime(2026, 11, 30, census_hour, tzinfo=UTC)
    if census_hour < 12:
        first += timedelta(days=1)
    pmf = stats.poisson.pmf(np.arange(200), mean).tolist()
    return {"days": [{"census_at": (first + timedelta(days=k)).isoformat(), "beds": beds,
                      "pmf": pmf} for k in range(nights)]}


def test_two_poisson_units_add_to_the_poisson_of_the_summed_mean() -> None:
    # KV-CRIT-like at 00:00 and KV-SURG-like at 23:00: the same nights, matched by name.
    totals = total_by_night({"A": _unit(12.0, 16, 0), "B": _unit(24.5, 28, 23)}, SITE)
    assert [t.night.name for t in totals] == ["Mon night", "Tue night", "Wed night"]
    total = stats.poisson(36.5)
    first = totals[0]
    assert first.median == int(total.ppf(0.5))
    assert first.band80 == (int(total.ppf(0.1)), int(total.ppf(0.9)))
    assert first.beds == 44
    assert abs(first.p_over - total.sf(44)) < 1e-9
    assert abs(first.mean - 36.5) < 1e-9
    # The sum of the medians is not the total's median: two Poisson(0.7) units have median 1
    # each (P(0) = 0.497 < 0.5), but their total, Poisson(1.4), has median 1, not 2.
    skewed = total_by_night({"A": _unit(0.7, 2, 0), "B": _unit(0.7, 2, 0)}, SITE)[0]
    assert stats.poisson(0.7).ppf(0.5) == 1 and stats.poisson(1.4).ppf(0.5) == 1
    assert skewed.median == 1


def test_only_nights_every_unit_covers_are_totalled() -> None:
    totals = total_by_night({"A": _unit(5.0, 8, 0, nights=3), "B": _unit(5.0, 8, 0, nights=2)},
                            SITE)
    assert len(totals) == 2
    assert total_by_night({}, SITE) == []
