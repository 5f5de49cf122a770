"""The hospital's total census on each night, from the units' forecasts.

A total is not the sum of the units' medians (nor of their bands): its distribution is the
convolution of the units' pmfs for the same night. Units are treated as independent for now;
a hospital-wide surge moves them together, so the true spread of the total is likely wider
than this one. Nights are matched by name (app/nights.py), not by instant, so a unit counting
at 23:00 and one counting at 00:00 add up to the same "Fri night".
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np

from app.nights import Night, night_of
from app.stats.poisson_binomial import convolve_pmfs, pmf_mean, pmf_quantile, pmf_sf_over

LEVELS = (0.1, 0.5, 0.9)


@dataclass(frozen=True)
class NightTotal:
    night: Night  # named from the first unit's census instant; the evening is shared
    units: tuple[str, ...]
    median: int
    band80: tuple[int, int]
    mean: float
    beds: int | None
    p_over: float | None  # chance the total exceeds the total staffed beds


def nights_of(forecast: dict[str, Any], tz: ZoneInfo) -> list[Night]:
    """The night each census day of a forecast counts."""
    return [night_of(datetime.fromisoformat(d["census_at"]), tz) for d in forecast["days"]]


def total_by_night(forecasts: dict[str, dict[str, Any]], tz: ZoneInfo) -> list[NightTotal]:
    """Each night every unit's forecast covers, in order, with the total's median, 80% band
    and chance over the summed staffed beds. ``forecasts`` maps unit code to forecast JSON."""
    if not forecasts:
        return []
    by_unit: dict[str, dict[date, tuple[Night, dict[str, Any]]]] = {}
    for unit, forecast in forecasts.items():
        by_unit[unit] = {n.evening: (n, d)
                         for n, d in zip(nights_of(forecast, tz), forecast["days"], strict=True)}
    units = tuple(sorted(by_unit))
    shared = sorted(set.intersection(*(set(v) for v in by_unit.values())))
    out = []
    for evening in shared:
        days = [by_unit[u][evening][1] for u in units]
        pmf = convolve_pmfs(*(np.asarray(d["pmf"], dtype=float) for d in days))
        beds_each = [d["beds"] for d in days]
        beds = None if any(b is None for b in beds_each) else int(sum(beds_each))
        low, median, high = (int(v) for v in np.atleast_1d(pmf_quantile(pmf, LEVELS)))
        out.append(NightTotal(
            night=by_unit[units[0]][evening][0], units=units, median=median,
            band80=(low, high), mean=float(pmf_mean(pmf)), beds=beds,
            p_over=None if beds is None else float(pmf_sf_over(pmf, beds))))
    return out
