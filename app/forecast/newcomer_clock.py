"""Newcomers on the unit's discharge clock.

Current patients leave by the hazard tree, whose discharge profile says at which clock hours
and on which weekdays people usually go home. A newcomer's stay is its admission group's
Coxian (fitted on calendar durations), which knows nothing of the clock: a Friday-evening
arrival and a Tuesday-evening arrival would get the same curve. Here the Coxian runs on the
profile's *operational time* instead of calendar time (a time change, as in the usual
treatment of a periodic intensity): time passes faster in the hours and on the days when the
unit discharges, and slower at night and at weekends. The clock keeps only the profile's
clock-hour and weekday factors (the Coxian holds the shape of the stay), scaled so a whole
week counts seven days.

The group's Coxian for this use is fitted on the stays' own durations measured on the same
clock (``StayGroups.with_clock_fits``), so an arrival at the usual hour gets the curve the
history shows and only arrivals at other hours or days shift. ``clock_days`` gives each
instant's operational time from a fixed origin; the operational time between an arrival and a
census is the difference of the two, and P(still in) = S_group(that difference).
"""

from __future__ import annotations

from zoneinfo import ZoneInfo

import numpy as np
import numpy.typing as npt

from app.forecast.los.rows import _local_days
from app.stats.survival_tree import DischargeProfile
from app.stats.survival_tree.profile import _EPOCH_WEEKDAY

FloatArray = npt.NDArray[np.float64]


def clock_profile(profile: DischargeProfile) -> DischargeProfile:
    """The profile's clock-hour and weekday factors only, a week worth seven days."""
    weekday = np.asarray(profile.weekday, dtype=float)
    return DischargeProfile(np.asarray(profile.hourly, dtype=float), weekday / weekday.mean(),
                            np.asarray(profile.stay_edges, dtype=float),
                            np.ones(np.asarray(profile.stay_day).size))


def clock_days(profile: DischargeProfile, tz: ZoneInfo, instants_ns: npt.ArrayLike
               ) -> FloatArray:
    """Operational days from the start of the earliest instant's local day to each of
    ``instants_ns`` (UTC ns): the whole local days' weekday factors summed, plus the share of
    the last day's clock intensity passed by the instant."""
    ns = np.asarray(instants_ns, dtype=np.int64)
    if ns.size == 0:
        return np.zeros(0)
    clock = clock_profile(profile)
    local = _local_days(ns, tz)
    day = np.floor(local)
    first = int(day.min())
    span = int(day.max()) - first + 1
    weekday = (np.arange(first, first + span) + _EPOCH_WEEKDAY) % 7
    whole = np.concatenate([[0.0], np.cumsum(clock.weekday[weekday])])
    index = (day - first).astype(np.int64)
    return whole[index] + clock.weekday[weekday[index]] * clock.within_day(local - day)


def stay_durations(profile: DischargeProfile, tz: ZoneInfo, start_ns: npt.ArrayLike,
                   end_ns: npt.ArrayLike) -> FloatArray:
    """Each stay's length on the discharge clock, from its ``start_ns`` to its ``end_ns``."""
    start = np.asarray(start_ns, dtype=np.int64)
    both = clock_days(profile, tz, np.concatenate([start, np.asarray(end_ns, dtype=np.int64)]))
    return both[start.size:] - both[:start.size]


def elapsed(profile: DischargeProfile, tz: ZoneInfo, start_ns: npt.ArrayLike,
            census_ns: npt.ArrayLike) -> FloatArray:
    """(starts, instants) operational days from each start to each census instant
    (negative where the instant comes first)."""
    start = np.asarray(start_ns, dtype=np.int64)
    census = np.asarray(census_ns, dtype=np.int64)
    both = clock_days(profile, tz, np.concatenate([start, census]))
    return both[None, start.size:] - both[:start.size, None]
