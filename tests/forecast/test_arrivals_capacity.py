"""Emergency demand behind a full unit: a simulated loss system (arrivals turned away when all
beds are taken leave no record), the ceiling and the open share learnt from its stays, and the
demand recovered from the admissions it let in."""

from __future__ import annotations

import dataclasses
import heapq
from datetime import time
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest

from app.forecast.arrivals import capacity_excess, emergency_rate, excess_beds, train_arrivals
from app.state.frames import BOOKING_COLUMNS, OBSERVATION_COLUMNS, UnitState
from app.stats.erlang import erlang_b

BEDS, LOAD_PER_DAY, MEAN_STAY, DAYS = 10, 10.0, 1.0, 420


def loss_system(seed: int, escalation: int = 0) -> UnitState:
    """An M/M/c/c unit: Poisson arrivals at LOAD_PER_DAY a day at any clock time, exponential
    stays; an arrival finding BEDS + escalation patients is turned away and never recorded."""
    rng = np.random.default_rng(seed)
    ceiling = BEDS + escalation
    arrive = np.cumsum(rng.exponential(1 / LOAD_PER_DAY, size=int(LOAD_PER_DAY * DAYS * 1.2)))
    arrive = arrive[arrive < DAYS]
    stay = rng.exponential(MEAN_STAY, size=arrive.size)
    leaving: list[float] = []
    kept_in, kept_out = [], []
    for t, s in zip(arrive, stay, strict=True):
        while leaving and leaving[0] <= t:
            heapq.heappop(leaving)
        if len(leaving) >= ceiling:
            continue
        heapq.heappush(leaving, t + s)
        kept_in.append(t)
        kept_out.append(t + s)
    start = pd.Timestamp("2025-01-01", tz="UTC")
    as_of = start + pd.Timedelta(days=DAYS)
    admitted = start + pd.to_timedelta(np.array(kept_in), unit="D")
    discharged = start + pd.to_timedelta(np.array(kept_out), unit="D")
    n = len(kept_in)
    stays = pd.DataFrame({
        "stay_id": [f"L-{i:06d}" for i in range(n)], "admitted_at": admitted,
        "discharged_at": pd.Series(discharged).where(discharged <= as_of).to_numpy(),
        "admission_type": "emergency", "outcome": None, "age": 60.0, "sex": "f",
        "specialty": "medicine", "source": "ed", "booking_id": None,
    })
    stays["discharged_at"] = pd.to_datetime(stays["discharged_at"], utc=True)
    empty = {c: pd.Series(dtype=object) for c in OBSERVATION_COLUMNS}
    bookings = {c: pd.Series(dtype="datetime64[ns, UTC]" if c.endswith("_at") else object)
                for c in BOOKING_COLUMNS}
    return UnitState(unit="LOSS", as_of=as_of, tz=ZoneInfo("UTC"), census_time=time(0, 0),
                     bed_plan=((None, BEDS),), stays=stays,
                     observations=pd.DataFrame(empty),
                     bookings=pd.DataFrame(bookings),
                     snapshots=pd.DataFrame({"taken_at": pd.Series(dtype="datetime64[ns, UTC]"),
                                             "occupancy": pd.Series(dtype=int)}))


@pytest.mark.parametrize("escalation", [0, 2])
def test_demand_is_recovered_behind_a_full_unit(escalation: int) -> None:
    state = loss_system(seed=3 + escalation, escalation=escalation)
    arrivals = train_arrivals(state)
    assert excess_beds(arrivals) == escalation
    ceiling = BEDS + escalation
    # The unit is full the Erlang B share of the time: 0.2146 for 10 servers at 10 Erlangs
    # (published Erlang B tables, as quoted in METHODS.md section 4); for 12 servers the
    # recursion (app.stats.erlang, itself checked against those tables).
    blocking = erlang_b(ceiling, LOAD_PER_DAY * MEAN_STAY)
    if escalation == 0:
        assert blocking == pytest.approx(0.2146, abs=5e-5)
    # About 4,000 arrivals and a few hundred busy periods: a few per cent of sampling error.
    assert arrivals["capacity"]["open_share"] == pytest.approx(1 - blocking, abs=0.03)
    rate = emergency_rate(arrivals)
    days = [d.date() for d in pd.date_range("2025-01-02", periods=DAYS - 2, freq="D")]
    demand = float(rate.mean(days).mean())
    admitted = rate.mean_count
    # What was admitted is the demand thinned by the blocking; the fit undoes the thinning.
    assert admitted == pytest.approx(LOAD_PER_DAY * (1 - blocking), rel=0.06)
    assert demand == pytest.approx(LOAD_PER_DAY, rel=0.06)
    assert abs(demand - LOAD_PER_DAY) < abs(admitted - LOAD_PER_DAY) / 2


def test_excess_is_zero_for_a_unit_that_never_fills_and_none_without_beds() -> None:
    state = loss_system(seed=5, escalation=0)
    roomy = dataclasses.replace(state, bed_plan=((None, 40),))
    first = state.stays["admitted_at"].min().date()
    last = state.as_of.date()
    assert capacity_excess(roomy, first, last) == 0
    unknown = dataclasses.replace(state, bed_plan=())
    assert capacity_excess(unknown, first, last) is None
    assert excess_beds(train_arrivals(unknown)) is None
