"""Elective admissions without a booking: the data contract makes ``booking_id`` optional,
so a real extract has electives that were never booked. They must train (no crash on the
missing booking time) and count as "not yet booked" at every lead. Invented unit."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
import pandas as pd

from app.forecast.arrivals import MAX_LEAD, train_arrivals
from app.state.frames import UnitState
from tests.forecast.unit_state import unit_state

START = pd.Timestamp("2026-01-05", tz="UTC")  # a Monday
WEEKS = 20


def _unit(booked_share: float, seed: int = 3) -> UnitState:
    """Two electives every Tuesday and one every Thursday at 10:00, each staying a day; a
    share of them booked 3 days ahead, the rest without a booking; no emergencies."""
    rng = np.random.default_rng(seed)
    rows, bookings = [], []
    for week in range(WEEKS):
        for weekday, n in ((1, 2), (3, 1)):
            day = START + pd.Timedelta(days=7 * week + weekday, hours=10)
            for k in range(n):
                stay = f"E-{week:02d}-{weekday}-{k}"
                booking = None
                if rng.random() < booked_share:
                    booking = f"B-{stay}"
                    bookings.append({"booking_id": booking, "unit": "KV-TEST",
                                     "booked_at": day - pd.Timedelta(days=3),
                                     "planned_date": day.date(), "cancelled_at": pd.NaT})
                rows.append({"stay_id": stay, "admitted_at": day,
                             "discharged_at": day + pd.Timedelta(days=1),
                             "admission_type": "elective", "outcome": "home", "age": 60.0,
                             "sex": "f", "specialty": "ortho", "source": "theatre",
                             "booking_id": booking})
    as_of = START + pd.Timedelta(days=7 * WEEKS, hours=8)
    return unit_state("KV-TEST", pd.DataFrame(rows), as_of, beds=10, bookings=bookings)


def _recount(state: UnitState, weekday: int, lead: int) -> float:
    """Direct count: electives on that weekday booked fewer than ``lead`` days before or
    never, per such weekday in the window the model uses (after the first discharge)."""
    stays = state.stays
    first = (stays["discharged_at"].min() + timedelta(days=1)).date()
    last = state.as_of.date() - timedelta(days=1)
    days = pd.date_range(first, last, freq="D")
    n_weekdays = int((days.weekday == weekday).sum())
    admitted = stays["admitted_at"].dt.date
    inside = (admitted >= first) & (admitted <= last) & (stays["admitted_at"].dt.weekday == weekday)
    booked_ahead = stays["booking_id"].notna() & (lead < 3)
    return float((inside & ~booked_ahead).sum()) / n_weekdays


def test_unbooked_electives_train_and_count_at_every_lead() -> None:
    state = _unit(booked_share=0.0)
    rates = train_arrivals(state)["elective"]["unbooked_by_weekday_lead"]
    for weekday in (1, 3):
        expected = _recount(state, weekday, 0)
        assert expected > 0.9  # the window holds most of the 20 weeks
        assert rates[weekday] == [expected] * (MAX_LEAD + 1)
    assert rates[0] == [0.0] * (MAX_LEAD + 1)


def test_mixed_booked_and_unbooked_electives() -> None:
    state = _unit(booked_share=0.5)
    rates = train_arrivals(state)["elective"]["unbooked_by_weekday_lead"]
    for weekday in (1, 3):
        for lead in (0, 2, 3, 10, MAX_LEAD):
            assert abs(rates[weekday][lead] - _recount(state, weekday, lead)) < 1e-12
