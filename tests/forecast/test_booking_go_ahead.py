"""The chance a booking still open L days before its day goes ahead, learnt from past
bookings: recovered from simulated bookings whose true chance is known. Invented unit."""

from __future__ import annotations

import numpy as np
import pandas as pd

from app.forecast.arrivals import MAX_LEAD, train_arrivals
from app.state.frames import UnitState
from tests.forecast.unit_state import unit_state

START = pd.Timestamp("2026-01-05", tz="UTC")
N_BOOKINGS = 1500
CANCEL = 0.2  # each booking is cancelled the day before with this chance


def _unit(seed: int = 4) -> UnitState:
    """Bookings made 2-14 days ahead over 200 days; a fifth cancelled at 10:00 the day before
    the planned day, the rest admitted at 09:00 that day and staying six hours."""
    rng = np.random.default_rng(seed)
    bookings, stays = [], []
    for i in range(N_BOOKINGS):
        planned = START + pd.Timedelta(days=int(rng.integers(20, 200)))
        ahead = int(rng.integers(2, 15))
        cancelled = rng.random() < CANCEL
        booking = f"B-{i:05d}"
        bookings.append({"booking_id": booking, "unit": "KV-TEST",
                         "booked_at": planned - pd.Timedelta(days=ahead) + pd.Timedelta(hours=11),
                         "planned_date": planned.date(),
                         "cancelled_at": (planned - pd.Timedelta(hours=14)) if cancelled
                         else pd.NaT})
        if not cancelled:
            admitted = planned + pd.Timedelta(hours=9)
            stays.append({"stay_id": f"S-{i:05d}", "admitted_at": admitted,
                          "discharged_at": admitted + pd.Timedelta(hours=6),
                          "admission_type": "elective", "outcome": "home", "age": 50.0,
                          "sex": "m", "specialty": "ortho", "source": "theatre",
                          "booking_id": booking})
    as_of = START + pd.Timedelta(days=230, hours=8)
    return unit_state("KV-TEST", pd.DataFrame(stays), as_of, beds=30, bookings=bookings)


def test_go_ahead_by_lead_recovers_the_simulated_chances() -> None:
    p = train_arrivals(_unit())["elective"]["p_go_by_lead"]
    assert len(p) == MAX_LEAD + 1
    # Open on the planned day itself: the cancelled ones closed the day before, so all go.
    assert p[0] > 0.99
    # Open one to twelve days ahead: a fifth will still be cancelled. About 1,000 to 1,500
    # bookings are open at each of these leads, so the binomial standard error is near 0.012.
    for lead in range(1, 13):
        assert abs(p[lead] - (1 - CANCEL)) < 0.045, (lead, p[lead])
    # No booking is ever open 15 or more days ahead: those leads take the overall share of
    # bookings that went ahead, not an arbitrary one half.
    for lead in range(15, MAX_LEAD + 1):
        assert abs(p[lead] - (1 - CANCEL)) < 0.045, (lead, p[lead])
