"""Nights named by their evening (app/nights.py), whatever a unit's census time.

Outside references: weekdays from the proleptic Gregorian calendar as Python's ``calendar``
module computes it (4 December 2026 is a Friday); the United Kingdom's clock changes in 2026
(clocks go forward at 01:00 GMT on Sunday 29 March and back at 02:00 BST on Sunday
25 October: the rule of the Summer Time Order, last Sunday of March and of October, as
published on gov.uk "When do the clocks change?"; dates recalled from memory and checked
against the IANA tz database that ``zoneinfo`` reads, below). The noon cut itself is common
practice, no source.
"""

from __future__ import annotations

import calendar
from datetime import UTC, date, datetime, timedelta
from zoneinfo import ZoneInfo

import pytest

from app.nights import night_of

LONDON = ZoneInfo("Europe/London")


def test_fourth_of_december_2026_is_a_friday_as_the_calendar_says() -> None:
    # calendar.weekday: Monday is 0, so Friday is 4.
    assert calendar.weekday(2026, 12, 4) == calendar.FRIDAY
    night = night_of(datetime(2026, 12, 4, 23, 0, tzinfo=UTC), UTC)
    assert night.name == "Fri night"
    assert night.evening == date(2026, 12, 4)


def test_a_midnight_census_and_an_eleven_pm_census_name_the_same_night() -> None:
    # KV-CRIT counts at 00:00, KV-SURG at 23:00: Sat 00:00 and Fri 23:00 are both Fri night.
    crit = night_of(datetime(2026, 12, 5, 0, 0, tzinfo=UTC), UTC)
    surg = night_of(datetime(2026, 12, 4, 23, 0, tzinfo=UTC), UTC)
    assert crit.name == surg.name == "Fri night"
    assert crit.evening == surg.evening
    assert crit.census_label == "census Sat 00:00"
    assert surg.census_label == "census Fri 23:00"
    assert crit.dated_name == "Fri 4 Dec night"


def test_the_cut_is_noon_on_the_sites_clock() -> None:
    at = datetime(2026, 12, 5, 11, 59, tzinfo=UTC)
    assert night_of(at, UTC).name == "Fri night"
    assert night_of(at + timedelta(minutes=1), UTC).name == "Sat night"


def test_relative_names() -> None:
    night = night_of(datetime(2026, 12, 1, 0, 0, tzinfo=UTC), UTC)  # Mon night
    assert night.relative_name(date(2026, 11, 30)) == "Tonight"
    assert night.relative_name(date(2026, 12, 1)) == "Last night"
    assert night.relative_name(date(2026, 11, 28)) == "Mon night"


def test_the_2026_clock_changes_are_where_the_summer_time_rule_puts_them() -> None:
    # Last Sunday of March and of October (gov.uk; tz database).
    assert calendar.weekday(2026, 3, 29) == calendar.SUNDAY == calendar.weekday(2026, 10, 25)
    assert datetime(2026, 3, 29, 0, 59, tzinfo=UTC).astimezone(LONDON).utcoffset() == timedelta(0)
    assert datetime(2026, 3, 29, 1, 0, tzinfo=UTC).astimezone(LONDON).utcoffset() == timedelta(
        hours=1)
    assert datetime(2026, 10, 25, 0, 59, tzinfo=UTC).astimezone(LONDON).utcoffset() == timedelta(
        hours=1)
    assert datetime(2026, 10, 25, 1, 0, tzinfo=UTC).astimezone(LONDON).utcoffset() == timedelta(0)


@pytest.mark.parametrize("census_hour", [0, 23])
@pytest.mark.parametrize("start", [date(2026, 3, 26), date(2026, 10, 22)])
def test_nights_across_a_clock_change_are_consecutive_evenings(census_hour: int,
                                                               start: date) -> None:
    # A week of census instants at the same wall-clock time in London, across the change:
    # the day of the change is 23 or 25 hours long, but each census still names the next
    # evening, and the names run Thu, Fri, Sat, Sun, Mon, Tue, Wed.
    first_evening = start if census_hour == 23 else start - timedelta(days=1)
    nights = []
    for k in range(7):
        local = datetime.combine(start + timedelta(days=k), datetime.min.time()).replace(
            hour=census_hour, tzinfo=LONDON)
        nights.append(night_of(local.astimezone(UTC), LONDON))
    assert [n.evening for n in nights] == [first_evening + timedelta(days=k) for k in range(7)]
    names = [calendar.day_abbr[(first_evening + timedelta(days=k)).weekday()] + " night"
             for k in range(7)]
    assert [n.name for n in nights] == names
    assert all(n.census_local.hour == census_hour for n in nights)
    gaps = {(b.census_local - a.census_local) for a, b in zip(nights, nights[1:], strict=False)}
    # Aware datetimes in the same zone subtract as wall-clock times; in UTC one gap is 23 h
    # (March) or 25 h (October), the rest 24 h.
    utc_gaps = sorted((b.census_local.astimezone(UTC) - a.census_local.astimezone(UTC))
                      for a, b in zip(nights, nights[1:], strict=False))
    assert gaps == {timedelta(days=1)}
    odd = timedelta(hours=23) if start.month == 3 else timedelta(hours=25)
    assert odd in utc_gaps and utc_gaps.count(timedelta(hours=24)) == 5


def test_a_census_in_the_repeated_hour_of_october_belongs_to_the_saturday() -> None:
    # 01:30 on Sun 25 Oct 2026 happens twice in London (BST, then GMT); both are Sat night.
    first = datetime(2026, 10, 25, 0, 30, tzinfo=UTC)  # 01:30 BST
    second = datetime(2026, 10, 25, 1, 30, tzinfo=UTC)  # 01:30 GMT
    assert first.astimezone(LONDON).hour == second.astimezone(LONDON).hour == 1
    assert night_of(first, LONDON).name == night_of(second, LONDON).name == "Sat night"
    assert night_of(second, LONDON).census_label == "census Sun 01:30"
