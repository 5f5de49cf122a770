"""Whether the newcomers' stays run on the discharge clock: chosen on later admissions.

The time change (app/forecast/newcomer_clock.py) helps where discharges follow the unit's
clock-hour and weekday profile strongly and hurts where they do not (measured: 180 demo
mornings, KV-SURG CRPS 1.691 -> 1.632, KV-CRIT 1.312 -> 1.321; the six stress units worse
on five, by up to 4.6%). So each unit's training decides, as the demand terms are decided,
on data the fits did not see: the groups and both Coxians (calendar and clock) are fitted on
what was known ``val_days`` before the cut-off, and the stays admitted after that are scored
as the forecast uses them: the probability of still being in at each of the first seven
census instants after admission (a Bernoulli log score over the instants whose outcome is
known by the cut-off). The clock is used only when it scores higher.
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import time
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from app.forecast.los.constants import NS_PER_DAY, FloatArray
from app.forecast.los.design import Design
from app.forecast.los.selection import _admission_x, _fit_groups, _stays_at
from app.state.frames import utc_ns
from app.stats.survival_tree import DischargeProfile
from app.timeutil import census_instants_after

MIN_SCORED_STAYS = 20
CENSUS_NIGHTS = 7


def _log_score(p_in: FloatArray, present: np.ndarray, seen: np.ndarray) -> float:
    """Mean Bernoulli log score of "still in at the census instant" over the instants seen."""
    p = np.where(present, p_in, 1.0 - p_in)[seen]
    return float(np.mean(np.log(np.maximum(p, 1e-12))))


def choose_newcomer_clock(design: Design, stays: pd.DataFrame, cutoff_ns: int,
                          params: Mapping[str, Any], seed: int, profile: DischargeProfile,
                          tz: ZoneInfo, census_time: time, extract_ns: int | None = None
                          ) -> dict[str, Any]:
    """``{"chosen": bool, "log_score_calendar", "log_score_clock", "stays", ...}``.
    ``extract_ns``: when the extract began (stays admitted before it enter the fits late and
    are not scored)."""
    from app.forecast.newcomer_clock import stay_durations

    admitted = utc_ns(stays["admitted_at"])
    val_days = min(90.0, 0.25 * (cutoff_ns - int(admitted.min())) / NS_PER_DAY)
    v_ns = int(cutoff_ns - val_days * NS_PER_DAY)
    later = _stays_at(stays, cutoff_ns, extract_ns)
    new = (admitted[later.index] > v_ns) & (later.entry == 0)
    out: dict[str, Any] = {"chosen": False, "stays": int(new.sum()),
                           "scored_from": pd.Timestamp(v_ns, tz="UTC").isoformat(),
                           "log_score_calendar": None, "log_score_clock": None}
    if new.sum() < MIN_SCORED_STAYS or not later.ended[new].any():
        return out
    try:
        groups = _fit_groups(design, stays, v_ns, params, seed, extract_ns,
                             clock=(profile, tz))
    except ValueError:  # no stay ended before the validation start
        return out
    index, days = later.index[new], later.days[new]
    start = admitted[index]
    # The first CENSUS_NIGHTS census instants after each admission, as a forecast meets them.
    instants = np.array([
        [int(pd.Timestamp(c).value) for c in census_instants_after(
            pd.Timestamp(a, tz="UTC").to_pydatetime(), census_time, tz, CENSUS_NIGHTS)]
        for a in start], dtype=np.int64)
    lag = (instants - start[:, None]) / NS_PER_DAY
    seen = lag <= days[:, None]  # the stay's outcome at that instant is known by the cut-off
    present = lag < days[:, None]
    on_clock = stay_durations(profile, tz, np.repeat(start, CENSUS_NIGHTS),
                              instants.ravel()).reshape(lag.shape)
    node = groups.group_of(_admission_x(design, stays)[index])
    p_calendar, p_clock = np.empty(lag.shape), np.empty(lag.shape)
    for g in groups.groups:
        rows = node == g.node
        if rows.any():
            on_clock_stay = g.clock_distribution
            assert on_clock_stay is not None  # the groups were fitted with clock= above
            p_calendar[rows] = g.distribution.sf(lag[rows])
            p_clock[rows] = on_clock_stay.sf(on_clock[rows])
    calendar_score = _log_score(p_calendar, present, seen)
    clock_score = _log_score(p_clock, present, seen)
    out.update({"chosen": bool(clock_score > calendar_score),
                "log_score_calendar": calendar_score, "log_score_clock": clock_score})
    return out
