"""Elective admissions without a booking: the data contract makes ``booking_id`` optional,
so a real extract has electives that were never booked. They must train (no crash on the
missing booking time) and count as "not yet booked" at every lead. Invented unit."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
import pandas as pd
import pytest

from app.forecast.arrivals import MAX_LEAD, train_arrivals, unbooked_means
from app.state.frames import UnitState
from tests.forecast.unit_state import unit_state

START = pd.Timestamp("2026-01-05", tz="UTC")  # a Monday
WEEKS = 20
THREE_DAYS = pd.Timedelta(days=3)


def _unit(booked_share: float, seed: int = 3,
          booked_before: pd.Timedelta = THREE_DAYS) -> UnitState:
    """Two electives every Tuesday and one every Thursday at 10:00, each staying a day; a
    share of them booked ``booked_before`` ahead (3 days: at 10:00), the rest without a
    booking; no emergencies."""
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
                                     "booked_at": day - booked_before,
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


def test_bookings_made_earlier_today_are_not_also_counted_as_still_to_come() -> None:
    # Every operation is booked the day before at 07:00 (27 hours ahead). At 08:00 on a
    # Monday all of Tuesday's bookings are known bookings; the "not yet booked" part for
    # Tuesday must then be 0, not the whole day's count again (a counting identity, no
    # outside source). At 06:00 none of them is known yet, and the whole count remains.
    state = _unit(booked_share=1.0, booked_before=pd.Timedelta(hours=27))
    elective = train_arrivals(state)["elective"]
    tuesday_rate = elective["unbooked_by_weekday_lead"][1]
    assert tuesday_rate[0] == 0.0 and tuesday_rate[1] > 1.9  # booked on the Monday before
    monday = pd.Timestamp("2026-06-01")  # a Monday
    tuesday = (monday + pd.Timedelta(days=1)).date()
    at_eight = unbooked_means(elective, [monday.date(), tuesday],
                              (monday + pd.Timedelta(hours=8)).to_pydatetime())
    at_six = unbooked_means(elective, [monday.date(), tuesday],
                            (monday + pd.Timedelta(hours=6)).to_pydatetime())
    # The booking clock profile has add-one smoothing (hourly_profile), so the 16 hours from
    # 08:00 keep 16 / (bookings + 24) of a day's booking between them (the bookings of the
    # electives admitted in the window the model uses, as in _recount).
    stays = state.stays
    first = (stays["discharged_at"].min() + timedelta(days=1)).date()
    last = state.as_of.date() - timedelta(days=1)
    admitted = stays["admitted_at"].dt.date
    bookings = int((stays["booking_id"].notna() & (admitted >= first) & (admitted <= last)).sum())
    assert at_eight[0] == 0.0
    assert at_eight[1] == pytest.approx(tuesday_rate[1] * 16 / (bookings + 24), rel=1e-9)
    assert at_eight[1] < 0.2 * tuesday_rate[1]  # the whole-day count was used before
    assert at_six[1] == pytest.approx(tuesday_rate[1] * 18 / (bookings + 24)
                                      + tuesday_rate[1] * bookings / (bookings + 24), rel=1e-9)


def test_electives_never_booked_stay_unknown_whatever_the_hour() -> None:
    state = _unit(booked_share=0.5)
    elective = train_arrivals(state)["elective"]
    never = elective["never_booked_by_weekday"]
    tuesday = pd.Timestamp("2026-06-02")  # a Tuesday, late in the day: its bookings are all in
    late = unbooked_means(elective, [tuesday.date()],
                          (tuesday + pd.Timedelta(hours=23, minutes=59)).to_pydatetime())
    # Bookings are made 3 days ahead, so on the day itself only the never-booked remain.
    assert never[1] == _recount(state, 1, 0) > 0
    assert late == [pytest.approx(never[1], abs=1e-3)]
