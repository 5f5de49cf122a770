"""Booking check: would one more elective admission fit, and on which day best?

For a candidate admitted on day D (at the unit's usual elective admission hour), with the
stay distribution S of its patient group (from its age, specialty and procedure):

- the chance a bed is free on arrival is counted at the census that night: P(N_k < beds_k)
  for the first census instant k after the admission, N without the candidate;
- the chance of more patients than staffed beds on each following night, without and with
  the candidate: P(N_k > beds_k) and P(N_k + B_k > beds_k) with B_k ~ Bernoulli(S(h_k - a)),
  over the nights the candidate is likely to be in (S >= 5%); the verdict
  (``app.forecast.booking_verdict``) weighs the "with" chances against the unit's levels.

The base occupancy distributions come from the same forecast as the unit page, so the check
is exact given the model, and costs one small convolution per candidate night.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import date, datetime, time, timedelta
from typing import Any

import numpy as np
import pandas as pd

from app import bounds
from app.alert_levels import AlertLevels
from app.forecast.booking_verdict import (
    NEAR_DAYS,
    DayOption,
    NightRisk,
    best_days,
    day_label,
    verdict,
)
from app.forecast.los import LosModel
from app.forecast.service import (
    ForecastInputs,
    ModelRecord,
    admit_hour,
    clock_lags,
    forecast_inputs,
    newcomer_stay_of,
)
from app.nights import Night, night_of
from app.state import UnitState
from app.stats.occupancy import occupancy_days
from app.timeutil import localize

STRIP_DAYS = 14
LIKELY_IN = 0.05


@dataclass(frozen=True)
class Candidate:
    planned_date: date
    age: int | None
    specialty: str | None
    procedure: str | None
    source: str | None = "theatre"


def _with_candidate(pmf: np.ndarray, q: float) -> np.ndarray:
    out = np.append(pmf * (1 - q), 0.0)
    out[1:] += pmf * q
    return out


def booking_check(state: UnitState, record: ModelRecord, candidate: Candidate,
                  *, strip_days: int = STRIP_DAYS, levels: AlertLevels | None = None,
                  admits_on: frozenset[int] | None = None,
                  base_for: Callable[[int], tuple[ForecastInputs, list[Any]]] | None = None
                  ) -> dict[str, Any]:
    """The check for ``candidate``, a strip of the next ``strip_days`` days (tomorrow on),
    the verdict against the unit's alert ``levels`` and the best days near the requested one
    among the weekdays in ``admits_on`` (default: those the arrivals model saw electives on).
    ``base_for(days)`` may give the occupancy without the candidate from a cache; it must
    equal ``booking_base(state, record, days)``."""
    levels = levels or AlertLevels()
    los = LosModel.from_payload(record.payload)
    today = state.as_of.tz_convert(state.tz).date()
    frame = pd.DataFrame([{"admission_type": "elective", "age": candidate.age, "sex": None,
                           "specialty": candidate.specialty, "source": candidate.source,
                           "procedure": candidate.procedure}])
    group = los.groups.get(int(los.groups.group_of(los.design.covariate_matrix(frame))[0]))
    stay = newcomer_stay_of(los, group)  # on the discharge clock, as the other newcomers
    likely_days = int(np.ceil(float(group.distribution.ppf(1 - LIKELY_IN))))
    latest = today + timedelta(days=bounds.BOOKING_HORIZON_DAYS)
    near_last = min(candidate.planned_date + timedelta(days=NEAR_DAYS), latest)
    last = max(candidate.planned_date, today + timedelta(days=strip_days), near_last)
    # Whole weeks, so that checks of nearby dates share one base forecast (``base_for``).
    horizon = -(-((last - today).days + likely_days + 2) // 7) * 7
    inputs, base = (base_for or (lambda h: booking_base(state, record, h)))(horizon)
    hour = admit_hour(record.payload["arrivals"]["elective"]["hour_profile"])
    names = [_night_name(night_of(pd.Timestamp(i).to_pydatetime(), state.tz), today)
             for i in inputs.instants]

    def evaluate(day: date) -> dict[str, Any]:
        admit = localize(datetime.combine(day, time(0)) + timedelta(hours=hour), state.tz)
        a = (pd.Timestamp(admit) - state.as_of).value / 86_400e9
        nights: list[dict[str, Any]] = []
        ahead = [k for k, h in enumerate(inputs.census_at) if h >= a]
        # One evaluation of the stay's survival for every night ahead (not one per night).
        lags = np.asarray([inputs.census_at[k] - a for k in ahead], dtype=float)
        if los.groups.on_clock and ahead:
            lags = clock_lags(los, state, [a], inputs.census_at[ahead])[0]
        still_in = stay.sf(lags)
        for k, q in zip(ahead, (float(v) for v in still_in), strict=True):
            if nights and q < LIKELY_IN:
                break
            beds = inputs.beds[k]
            if beds is None:
                continue
            before = float(base[k].pmf[beds + 1:].sum())
            after = float(_with_candidate(base[k].pmf, q)[beds + 1:].sum())
            nights.append({"date": inputs.local_days[k].isoformat(), "night": names[k],
                           "census_at": inputs.instants[k].isoformat(), "p_in": q,
                           "p_over_before": before, "p_over_after": after,
                           "level": levels.level(after),
                           "p_bed_free": float(base[k].pmf[:beds].sum())})
        first = nights[0] if nights else None
        worst = max((n["p_over_after"] for n in nights), default=0.0)
        return {"date": day.isoformat(), "weekday": day.strftime("%a"), "label": day_label(day),
                "p_bed_free": first["p_bed_free"] if first else None,
                "added_risk": max((n["p_over_after"] - n["p_over_before"] for n in nights),
                                  default=0.0),
                "worst_after": worst, "level": levels.level(worst),
                "admits": day.weekday() in operating,
                "nights": nights}

    if admits_on is None:
        # Weekdays the arrivals model saw electives on (their theatre days).
        table = record.payload["arrivals"]["elective"]["unbooked_by_weekday_lead"]
        admits_on = frozenset(w for w in range(7) if table[w][-1] > 0) or frozenset(range(7))
    operating = admits_on
    evaluated: dict[date, dict[str, Any]] = {}

    def get(day: date) -> dict[str, Any]:
        if day not in evaluated:
            evaluated[day] = evaluate(day)
        return evaluated[day]

    # The next ``strip_days`` days, tomorrow first: today's electives are already decided.
    strip = [get(today + timedelta(days=d)) for d in range(1, strip_days + 1)]
    strip = [s for s in strip if s["p_bed_free"] is not None]
    chosen = get(candidate.planned_date)
    near = [candidate.planned_date + timedelta(days=d) for d in range(-NEAR_DAYS, NEAR_DAYS + 1)]
    options = [o for o in (_option(get(d)) for d in near
                           if today < d <= latest and d.weekday() in operating)
               if o is not None]
    ranked, in_order = best_days(options, candidate.planned_date, today, operating, levels)
    chosen_option = _option(chosen)
    answer = (verdict(chosen_option, levels, ranked) if chosen_option is not None else None)
    return {
        "candidate": {"planned_date": candidate.planned_date.isoformat(), "age": candidate.age,
                      "specialty": candidate.specialty, "procedure": candidate.procedure},
        "group": group.rule,
        "median_stay_days": float(group.distribution.median()),
        "likely_nights": likely_days,
        "check": chosen,
        "strip": strip,
        "best_dates": [o.day.isoformat() for o in in_order],
        "best": [evaluated[o.day] for o in in_order],
        "verdict": None if answer is None else {
            "level": answer.level, "text": answer.text, "night": answer.night,
            "alternative": None if answer.alternative is None
            else answer.alternative.isoformat()},
        "admits_on": sorted(operating),
        "levels": {"warning": levels.warning, "alarm": levels.alarm},
    }


def booking_base(state: UnitState, record: ModelRecord, days: int
                 ) -> tuple[ForecastInputs, list[Any]]:
    """The forecast's inputs and occupancy at the next ``days`` census instants, without any
    candidate: the same for every check of the unit at this instant and model."""
    inputs = forecast_inputs(state, record, days)
    # The current stays on the ceiling's grid, as the unit page's forecast has them.
    return inputs, occupancy_days(inputs.predictions.p_present, inputs.booked, inputs.streams,
                                  inputs.census_at, inputs.beds, inputs.limits,
                                  current_at=(None if inputs.p_grid is None
                                              else lambda _grid: inputs.p_grid))


def _night_name(night: Night, today: date) -> str:
    """``Thu night`` within the coming week, ``Thu 17 Dec night`` beyond it."""
    return night.name if (night.evening - today).days < 7 else night.dated_name


def _option(day: dict[str, Any]) -> DayOption | None:
    if day["p_bed_free"] is None:
        return None
    return DayOption(date.fromisoformat(day["date"]), day["p_bed_free"], tuple(
        NightRisk(n["night"], n["p_over_before"], n["p_over_after"]) for n in day["nights"]))
