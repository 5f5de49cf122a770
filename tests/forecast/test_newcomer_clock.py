"""Newcomers on the unit's discharge clock (app/forecast/newcomer_clock.py): the group's stay
distribution runs on the discharge profile's operational time, so arrivals before a weekend
leave later than arrivals early in the week, and a whole week still counts seven days."""

from __future__ import annotations

from datetime import UTC, datetime
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest
from scipy import integrate

from app.forecast.newcomer_clock import clock_profile, elapsed
from app.stats.occupancy import ArrivalStream, BookedAdmissions, stream_presence
from app.stats.occupancy_paths import draw_paths
from app.stats.phasetype import Coxian
from app.stats.survival_tree import DischargeProfile

UTC_ZONE = ZoneInfo("UTC")
# Discharges mostly 10:00-18:00 on weekdays, half as many on Saturday and Sunday (invented
# factors for the test, of the shape the demo's profile has).
HOURLY = np.array([0.2] * 9 + [1.5] * 9 + [0.4] * 6)
WEEKDAY = np.array([1.1, 1.1, 1.1, 1.1, 1.1, 0.55, 0.55])
PROFILE = DischargeProfile(HOURLY, WEEKDAY, np.array([1.0, 2.0]), np.array([2.0, 1.0, 0.5]))


def _ns(*stamps: str) -> np.ndarray:
    return pd.DatetimeIndex([pd.Timestamp(s, tz="UTC") for s in stamps]).asi8


def test_operational_time_is_the_integral_of_the_clock_intensity() -> None:
    # Reference: scipy.integrate.quad of the clock's intensity (hourly x weekday factors only,
    # the day-of-stay factors left out), with the hour boundaries as break points.
    clock = clock_profile(PROFILE)
    start, stop = _ns("2026-12-04 18:30"), _ns("2026-12-07 06:45", "2026-12-05 01:10")
    got = elapsed(PROFILE, UTC_ZONE, start, stop)[0]
    epoch = pd.Timestamp("1970-01-01", tz="UTC").value
    a = (start[0] - epoch) / 86_400e9
    for value, end in zip(got, stop, strict=True):
        b = (end - epoch) / 86_400e9
        hours = np.arange(np.ceil(a * 24), np.floor(b * 24) + 1) / 24
        reference, _ = integrate.quad(lambda u: float(clock.intensity(np.array([u]),
                                                                      np.array([0.0]))[0]),
                                      a, b, points=list(hours), limit=500)
        assert value == pytest.approx(reference, rel=1e-6)


def test_a_whole_week_counts_seven_days() -> None:
    # The time change keeps the long-run mean stay: any 7 x 24 hours is 7 operational days.
    got = elapsed(PROFILE, UTC_ZONE, _ns("2026-12-02 13:17"), _ns("2026-12-09 13:17"))
    assert got[0, 0] == pytest.approx(7.0, rel=1e-12)


def test_a_friday_evening_arrival_is_less_likely_to_leave_within_60_hours() -> None:
    # The weekend profile (Saturday and Sunday at half the weekday rate, nights slow) says a
    # patient arriving on Friday at 18:00 has had less discharge time 60 hours later (Monday
    # 06:00) than one arriving on Tuesday at 18:00 (Friday 06:00).
    stay = Coxian.exponential(1.0 / 3.0)  # mean stay 3 days
    friday = elapsed(PROFILE, UTC_ZONE, _ns("2026-12-04 18:00"), _ns("2026-12-07 06:00"))[0, 0]
    tuesday = elapsed(PROFILE, UTC_ZONE, _ns("2026-12-01 18:00"), _ns("2026-12-04 06:00"))[0, 0]
    left_friday, left_tuesday = 1 - float(stay.sf(friday)), 1 - float(stay.sf(tuesday))
    assert friday < 2.5 < tuesday  # 60 calendar hours are 2.5 days
    assert left_friday < left_tuesday - 0.05


def _stream(clock: np.ndarray | None, census_at: np.ndarray) -> ArrivalStream:
    slots = np.arange(0.5, 3.0, 1 / 24)
    return ArrivalStream("emergency", tuple(slots), tuple([0.1] * slots.size),
                         tuple(int(s) for s in slots), 4.0, Coxian.erlang(2, 0.8), clock)


def test_paths_follow_the_exact_presence_on_the_clock() -> None:
    # The joint paths draw each arrival's stay on the same clock as the exact pmfs: their mean
    # count at each instant matches the exact expected presence within Monte-Carlo error.
    as_of = pd.Timestamp("2026-12-04 08:00", tz="UTC")
    census_at = np.array([0.667, 1.667, 2.667, 3.667])
    plain = _stream(None, census_at)
    slot_ns = as_of.value + np.round(np.asarray(plain.slot_at) * 86_400e9).astype(np.int64)
    census_ns = as_of.value + np.round(census_at * 86_400e9).astype(np.int64)
    clocked = _stream(elapsed(PROFILE, UTC_ZONE, slot_ns, census_ns), census_at)
    exact = stream_presence(clocked, census_at).sum(axis=0)
    assert not np.allclose(exact, stream_presence(plain, census_at).sum(axis=0), rtol=0.02)
    draws = draw_paths(0, BookedAdmissions((), (), ()), [clocked], census_at, 20_000,
                       np.random.default_rng(4))
    mean = draws.counts(np.zeros((0, census_at.size)), None).mean(axis=0)
    spread = draws.counts(np.zeros((0, census_at.size)), None).std(axis=0) / np.sqrt(20_000)
    assert np.all(np.abs(mean - exact) < 4 * spread)
    assert datetime(2026, 12, 4, tzinfo=UTC).weekday() == 4  # the as_of is a Friday
