"""Learning the admissions to come: emergency counts, bookings that go ahead, and electives
not yet booked, all from what was known at the training cut-off.

- Emergency admissions per local day: :func:`app.stats.arrivals.fit_daily_rate` (Poisson GLM
  with weekday and season, negative binomial only where overdispersed), and the clock-hour
  profile of their arrival.
- Known bookings: the chance a booking still open ``L`` days before its planned date goes
  ahead, by lead ``L`` (cancellations grow near the day), and the clock-hour profile of
  elective admissions.
- Electives not yet booked at ``as_of`` still come for days further ahead (METHODS.md
  section 8): for a day ``L`` days ahead, the mean number of elective admissions on that
  weekday that were booked less than ``L`` days before, or never booked.
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import date, timedelta
from typing import Any

import numpy as np
import pandas as pd

from app.state import UnitState
from app.stats.arrivals import DailyRateModel, fit_daily_rate, hourly_profile

MAX_LEAD = 28
FIT_WINDOW_DAYS = 2 * 365
ELECTIVE_WINDOW_DAYS = 26 * 7


def _local(series: pd.Series, state: UnitState) -> pd.Series:
    return series.dt.tz_convert(state.tz)


def _window(state: UnitState, days: int) -> tuple[date, date]:
    """Whole local days before the cut-off day, at most ``days`` of them, where the history
    of admissions is complete.

    An extract of stays usually holds those discharged since some date, plus the stays then
    in progress: admissions before the first recorded discharge are only the long stays
    (left truncation), and counting them would drag the rate down. So the window starts the
    day after the first discharge (and after the first admission).
    """
    last = state.as_of.tz_convert(state.tz).date() - timedelta(days=1)
    first = last - timedelta(days=days - 1)
    for column in ("admitted_at", "discharged_at"):
        earliest = _local(state.stays[column].dropna(), state).min()
        if pd.notna(earliest):
            first = max(first, earliest.date() + timedelta(days=1))
    return first, last


def _daily_counts(admitted_local: pd.Series, first: date, last: date) -> tuple[list[date], np.ndarray]:
    days = [first + timedelta(days=i) for i in range((last - first).days + 1)]
    counts = admitted_local.dt.date.value_counts()
    return days, np.array([int(counts.get(d, 0)) for d in days])


def train_arrivals(state: UnitState) -> dict[str, Any]:
    """The arrivals part of a trained model, as a JSON-ready dict."""
    stays = state.stays
    admitted = _local(stays["admitted_at"], state)
    emergency = stays["admission_type"] == "emergency"
    first, last = _window(state, FIT_WINDOW_DAYS)
    days, counts = _daily_counts(admitted[emergency], first, last)
    rate = fit_daily_rate(days, counts)
    elective = ~emergency
    return {
        "emergency": {
            "rate": rate.to_dict(),
            "hour_profile": hourly_profile(admitted[emergency].dt.hour).tolist(),
            "window": [first.isoformat(), last.isoformat()],
        },
        "elective": {
            "p_go_by_lead": _p_go_by_lead(state),
            "hour_profile": hourly_profile(admitted[elective].dt.hour).tolist(),
            "unbooked_by_weekday_lead": _unbooked_rates(state),
        },
    }


def _p_go_by_lead(state: UnitState) -> list[float]:
    """P(goes ahead | still open L days before the planned day), L = 0..MAX_LEAD.

    Only bookings whose planned day has passed count. Beta(1, 1) smoothing keeps a lead with
    few bookings away from 0 and 1.
    """
    b = state.bookings
    today = state.as_of.tz_convert(state.tz).date()
    past = b.loc[b["planned_date"] < today]
    went = past["booking_id"].isin(set(state.stays["booking_id"].dropna()))
    planned = pd.to_datetime(past["planned_date"])
    booked_day = _local(past["booked_at"], state).dt.tz_localize(None).dt.normalize()
    cancelled_day = _local(past["cancelled_at"], state).dt.tz_localize(None).dt.normalize()
    out = []
    for lead in range(MAX_LEAD + 1):
        start = planned - pd.Timedelta(days=lead)
        # Open at the start of that day: booked before it, not cancelled before it.
        open_then = (booked_day < start) & (cancelled_day.isna() | (cancelled_day >= start))
        n = int(open_then.sum())
        out.append((float(went[open_then].sum()) + 1.0) / (n + 2.0))
    return out


def _unbooked_rates(state: UnitState) -> list[list[float]]:
    """[weekday][lead] mean elective admissions on a day ``lead`` days ahead not booked yet.

    An admission on day D counts for lead L when its booking was made on or after day D - L
    (or it had no booking). Mean over the weeks of the recent window.
    """
    stays = state.stays
    first, last = _window(state, ELECTIVE_WINDOW_DAYS)
    elective = stays.loc[stays["admission_type"] == "elective"]
    admitted_day = _local(elective["admitted_at"], state).dt.date
    keep = (admitted_day >= first) & (admitted_day <= last)
    elective, admitted_day = elective.loc[keep], admitted_day.loc[keep]
    booked = state.bookings.set_index("booking_id")["booked_at"]
    booked_day = _local(elective["booking_id"].map(booked), state).dt.date
    lead_of = [(a - b).days if isinstance(b, date) else 10**6
               for a, b in zip(admitted_day, booked_day, strict=True)]
    weekdays = pd.Series([d.weekday() for d in admitted_day], index=elective.index)
    n_days = np.bincount([(first + timedelta(days=i)).weekday()
                          for i in range((last - first).days + 1)], minlength=7)
    lead = np.asarray(lead_of, dtype=float)
    out = []
    for w in range(7):
        on = (weekdays == w).to_numpy()
        row = [float(((lead[on] <= L)).sum()) / max(int(n_days[w]), 1) for L in range(MAX_LEAD + 1)]
        out.append(row)
    return out


def emergency_rate(arrivals: Mapping[str, Any]) -> DailyRateModel:
    return DailyRateModel.from_dict(arrivals["emergency"]["rate"])
