"""Booking check: would one more elective admission fit, and on which day best?

For a candidate admitted on day D (at the unit's usual elective admission hour), with the
stay distribution S of its patient group (from its age, specialty and procedure):

- the chance a bed is free on arrival is counted at the census that night: P(N_k < beds_k)
  for the first census instant k after the admission, N without the candidate;
- the added risk of running out on each following night is
  P(N_k + B_k > beds_k) - P(N_k > beds_k) with B_k ~ Bernoulli(S(h_k - a)), over the nights
  the candidate is likely to be in (S >= 5%); the strip reports the worst of them.

The base occupancy distributions come from the same forecast as the unit page, so the check
is exact given the model, and costs one small convolution per candidate night.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime, time, timedelta
from typing import Any

import numpy as np
import pandas as pd

from app.forecast.los import LosModel
from app.forecast.service import (
    ModelRecord,
    admit_hour,
    forecast_inputs,
)
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
                  *, strip_days: int = STRIP_DAYS) -> dict[str, Any]:
    """The check for ``candidate`` and a strip of the next ``strip_days`` admission days."""
    los = LosModel.from_payload(record.payload)
    today = state.as_of.tz_convert(state.tz).date()
    frame = pd.DataFrame([{"admission_type": "elective", "age": candidate.age, "sex": None,
                           "specialty": candidate.specialty, "source": candidate.source,
                           "procedure": candidate.procedure}])
    group = los.groups.get(int(los.groups.group_of(los.design.covariate_matrix(frame))[0]))
    stay = group.distribution
    likely_days = int(np.ceil(float(stay.ppf(1 - LIKELY_IN))))
    last = max(candidate.planned_date, today + timedelta(days=strip_days))
    horizon = (last - today).days + likely_days + 2
    inputs = forecast_inputs(state, record, horizon)
    base = occupancy_days(inputs.predictions.p_present, inputs.booked, inputs.streams,
                          inputs.census_at, inputs.beds, inputs.limits)
    hour = admit_hour(record.payload["arrivals"]["elective"]["hour_profile"])

    def evaluate(day: date) -> dict[str, Any]:
        admit = localize(datetime.combine(day, time(0)) + timedelta(hours=hour), state.tz)
        a = (pd.Timestamp(admit) - state.as_of).value / 86_400e9
        nights = []
        for k, h in enumerate(inputs.census_at):
            if h < a:
                continue
            q = float(stay.sf(h - a))
            if nights and q < LIKELY_IN:
                break
            beds = inputs.beds[k]
            if beds is None:
                continue
            before = float(base[k].pmf[beds + 1:].sum())
            after = float(_with_candidate(base[k].pmf, q)[beds + 1:].sum())
            nights.append({"date": inputs.local_days[k].isoformat(),
                           "census_at": inputs.instants[k].isoformat(), "p_in": q,
                           "p_over_before": before, "p_over_after": after,
                           "p_bed_free": float(base[k].pmf[:beds].sum())})
        first = nights[0] if nights else None
        return {"date": day.isoformat(), "weekday": day.strftime("%a"),
                "p_bed_free": first["p_bed_free"] if first else None,
                "added_risk": max((n["p_over_after"] - n["p_over_before"] for n in nights),
                                  default=0.0),
                "nights": nights}

    strip = [evaluate(today + timedelta(days=d)) for d in range(strip_days + 1)
             if today + timedelta(days=d) >= today]
    strip = [s for s in strip if s["p_bed_free"] is not None]
    chosen = evaluate(candidate.planned_date)
    # Suggest only weekdays on which the unit admits electives at all (its theatre days).
    table = record.payload["arrivals"]["elective"]["unbooked_by_weekday_lead"]
    operating = {w for w in range(7) if table[w][-1] > 0} or set(range(7))
    usable = [s for s in strip if date.fromisoformat(s["date"]).weekday() in operating]
    ranked = sorted(usable, key=lambda s: (-round(s["p_bed_free"], 2), s["added_risk"]))
    return {
        "candidate": {"planned_date": candidate.planned_date.isoformat(), "age": candidate.age,
                      "specialty": candidate.specialty, "procedure": candidate.procedure},
        "group": group.rule,
        "median_stay_days": float(stay.median()),
        "likely_nights": likely_days,
        "check": chosen,
        "strip": strip,
        "best_dates": [s["date"] for s in ranked[:3]],
    }
