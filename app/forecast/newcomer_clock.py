"""Newcomers on the unit's discharge clock.

Current patients leave by the hazard tree, whose discharge profile says at which clock hours
and on which weekdays people usually go home. A newcomer's stay is its admission group's
Coxian (fitted on calendar durations), which knows nothing of the clock: a Friday-evening
arrival and a Tuesday-evening arrival would get the same curve. Here the Coxian runs on the
profile's *operational time* instead of calendar time (a time change, as in the usual
treatment of a periodic intensity): time passes faster in the hours and on the days when the
unit discharges, and slower at night and at weekends. The clock keeps only the profile's
clock-hour and weekday factors (the Coxian already holds the shape of the stay), scaled so a
whole week counts seven days, so the long-run mean stay is unchanged.

``clock_days(profile, tz, instants_ns)`` gives each instant's operational time from a fixed
origin; the operational time between an arrival and a census is the difference of the two,
and P(still in) = S_group(that difference).
"""

from __future__ import annotations

from zoneinfo import ZoneInfo

import numpy as np
import numpy.typing as npt

from app.forecast.los.rows import _local_days
from app.stats.survival_tree import DischargeProfile

FloatArray = npt.NDArray[np.float64]


def clock_profile(profile: DischargeProfile) -> DischargeProfile:
    """The profile's clock-hour and weekday factors only, a week worth seven days."""
    weekday = np.asarray(profile.weekday, dtype=float)
    return DischargeProfile(np.asarray(profile.hourly, dtype=float), weekday / weekday.mean(),
                            np.asarray(profile.stay_edges, dtype=float),
                            np.ones(np.asarray(profile.stay_day).size))


def clock_days(profile: DischargeProfile, tz: ZoneInfo, instants_ns: npt.ArrayLike
               ) -> FloatArray:
    """Operational days from the earliest of ``instants_ns`` (UTC ns) to each of them."""
    ns = np.asarray(instants_ns, dtype=np.int64)
    if ns.size == 0:
        return np.zeros(0)
    local = _local_days(ns, tz)
    origin = np.full(local.shape, float(local.min()))
    clock = clock_profile(profile)
    return clock.exposure(origin, local, np.zeros(local.shape))


def elapsed(profile: DischargeProfile, tz: ZoneInfo, start_ns: npt.ArrayLike,
            census_ns: npt.ArrayLike) -> FloatArray:
    """(starts, instants) operational days from each start to each census instant
    (negative where the instant comes first)."""
    start = np.asarray(start_ns, dtype=np.int64)
    census = np.asarray(census_ns, dtype=np.int64)
    both = clock_days(profile, tz, np.concatenate([start, census]))
    return both[None, start.size:] - both[:start.size, None]
