"""The unit's ceiling learnt from the admission chance by occupancy level, on invented data whose
answer is known by construction: one night of escalation beds must not loosen it."""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd

from app.forecast.arrivals import capacity_excess, soft_excess
from tests.forecast.test_arrivals_capacity import BEDS, loss_system


def test_admission_chance_below_one_half_sets_the_ceiling() -> None:
    # Ten days of demand at each level from 3 below staffed beds to 2 above; five emergencies
    # a demand-day admitted below staffed beds and at staffed beds (level 0), one in five at
    # level 1, none at level 2, and one escalation night: half a day at level 6 with three
    # admissions. The chance an arrival is admitted is 1 up to level 0 and 0.2 at level 1, so
    # the unit turns arrivals away from level 1 on: answer 1 (by construction). The largest
    # level ever admitted at (6) would put the ceiling at 7.
    levels = np.arange(-3, 3)
    time_over = np.r_[np.repeat(levels, 100), np.full(5, 6)]
    time_days = np.full(time_over.size, 0.1)
    admitted = np.r_[np.repeat([-3, -2, -1, 0], 50), np.full(10, 1), np.full(3, 6)]
    assert soft_excess(admitted, time_over, time_days) == 1
    assert max(0, int(admitted.max()) + 1) == 7       # the rule it replaces
    # A hard ceiling at staffed beds: nothing admitted at level 0 or above.
    assert soft_excess(admitted[admitted < 0], time_over, time_days) == 0
    # Level 1 admitting 60% of its demand is still open; level 2 (none) is the ceiling.
    more = np.r_[admitted[admitted != 1], np.full(30, 1)]
    assert soft_excess(more, time_over, time_days) == 2


def test_one_escalation_night_does_not_loosen_a_loss_units_ceiling() -> None:
    # A simulated loss unit (tests/forecast/test_arrivals_capacity.py: Poisson arrivals, 10
    # staffed beds + 1 escalation bed, arrivals finding 11 patients turned away and not
    # recorded): its ceiling beyond staffed beds is 1 by construction. Then one night the unit
    # opens four more beds: four extra emergencies admitted an hour apart, each staying 12 h.
    state = loss_system(seed=5, escalation=1)
    stays = state.stays
    first = stays["admitted_at"].min().date() + pd.Timedelta(days=1)
    last = state.as_of.date() - pd.Timedelta(days=1)
    assert capacity_excess(state, first, last) == 1
    # The night the unit was most often full of the middle of the history.
    night = pd.Timestamp("2025-06-01 22:00", tz="UTC")
    extra = pd.DataFrame({
        "stay_id": [f"X-{i}" for i in range(4)],
        "admitted_at": [night + pd.Timedelta(hours=i) for i in range(4)],
        "discharged_at": [night + pd.Timedelta(hours=i + 12) for i in range(4)],
        "admission_type": "emergency", "outcome": None, "age": 60.0, "sex": "f",
        "specialty": "medicine", "source": "ed", "booking_id": None})
    busy = dataclasses.replace(state, stays=pd.concat([stays, extra], ignore_index=True))
    occupancy = [int(((busy.stays["admitted_at"] <= t)
                      & ~(busy.stays["discharged_at"] <= t)).sum())
                 for t in extra["admitted_at"]]
    assert max(occupancy) - BEDS >= 4                 # the largest overflow moved up
    assert capacity_excess(busy, first, last) == 1
