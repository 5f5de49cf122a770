"""The booking check's verdict and best-day choice (app/forecast/booking_verdict.py).

These are decision rules, not estimates: no published table states them. Each expected
answer below is worked out by hand from the rule in the module's docstring (stated beside
the check), so a change of rule fails here. The levels are the site's defaults, 10% and 25%
(app/alert_levels.py: common practice, no source)."""

from __future__ import annotations

from datetime import date, timedelta

import pytest

from app.alert_levels import AlertLevels, levels_of, percent, risk_sentence
from app.bounds import OutOfBounds, check_alert_levels
from app.forecast.booking_verdict import (
    DayOption,
    NightRisk,
    admission_weekdays,
    best_days,
    day_label,
    verdict,
)

LEVELS = AlertLevels(0.10, 0.25)
MON = date(2026, 12, 7)  # a Monday
TODAY = date(2026, 11, 30)  # a Monday
WEEKDAYS = frozenset(range(5))


def option(day: date, free: float, *afters: tuple[float, float]) -> DayOption:
    nights = tuple(NightRisk(f"N{i}", b, a) for i, (b, a) in enumerate(afters))
    return DayOption(day, free, nights)


def test_fits_when_every_night_stays_below_the_warning_level() -> None:
    # Worked by hand: the highest "with" chance is 9.9% < 10%, so it fits and names no night.
    answer = verdict(option(MON, 0.9, (0.05, 0.08), (0.07, 0.099)), LEVELS)
    assert answer.level == "calm" and answer.night is None
    assert answer.text.startswith("Fits:") and "10% warning level" in answer.text


def test_names_the_first_night_the_booking_raises_above_the_warning_level() -> None:
    # Worked by hand: N1 goes 8% -> 11% (crosses 10%); N2 12% -> 13% was above already.
    # The first night at or above the level is N1, and the booking is what raises it.
    answer = verdict(option(MON, 0.8, (0.02, 0.05), (0.08, 0.11), (0.12, 0.13)), LEVELS)
    assert answer.level == "warning" and answer.night == "N1"
    assert answer.text.startswith("Fits, but raises N1 above the warning level (8% to 11%).")


def test_says_when_the_night_was_above_the_level_already() -> None:
    # Worked by hand: N0 is 12% without the booking, 14% with: above the warning already.
    answer = verdict(option(MON, 0.8, (0.12, 0.14)), LEVELS)
    assert answer.night == "N0"
    assert "N0 is already above the warning level (12%; 14% with this booking)" in answer.text


def test_an_alarm_names_the_night_reaching_the_alarm_level_and_suggests_a_better_day() -> None:
    # Worked by hand: N0 reaches 11% (warning) but N1 reaches 26% >= 25%: an alarm, and the
    # night named is the first at the alarm level (N1), not the first at the warning level.
    requested = option(MON, 0.7, (0.09, 0.11), (0.22, 0.26))
    calm = option(MON + timedelta(days=1), 0.85, (0.03, 0.06))
    worse = option(MON - timedelta(days=1), 0.95, (0.20, 0.30))
    answer = verdict(requested, LEVELS, [worse, calm])
    assert answer.level == "alarm" and answer.night == "N1"
    assert answer.text.startswith("Does not fit well: raises N1 above the alarm level "
                                  "(22% to 26%).")
    # The first alternative in rank order whose level is lower (calm < warning < alarm);
    # "worse" comes first but reaches an alarm too, so it is skipped.
    assert answer.alternative == calm.day and answer.text.endswith("Consider Tue 8 Dec.")


def test_no_better_day_is_said_plainly() -> None:
    requested = option(MON, 0.8, (0.09, 0.12))
    same = option(MON + timedelta(days=1), 0.9, (0.15, 0.16))
    answer = verdict(requested, LEVELS, [same, requested])
    assert answer.alternative is None
    assert answer.text.endswith("Every day near it reaches the warning level too.")


def test_best_days_are_future_admission_days_near_the_request_in_date_order() -> None:
    requested = date(2026, 12, 2)  # Wednesday
    options = [
        option(TODAY, 0.99, (0.0, 0.01)),  # today: never suggested, however good
        option(date(2026, 12, 1), 0.80, (0.05, 0.09)),  # Tue, calm, 80%
        option(date(2026, 12, 2), 0.90, (0.10, 0.12)),  # Wed, warning
        option(date(2026, 12, 3), 0.70, (0.02, 0.04)),  # Thu, calm, 70%
        option(date(2026, 12, 5), 0.99, (0.00, 0.01)),  # Sat: not an admission day
        option(date(2026, 12, 7), 0.85, (0.03, 0.05)),  # Mon, calm, 85%
        option(date(2026, 12, 10), 0.95, (0.01, 0.02)),  # Thu 10: 8 days away, too far
    ]
    ranked, in_order = best_days(options, requested, TODAY, WEEKDAYS, LEVELS)
    # Worked by hand: eligible Tue 1, Wed 2, Thu 3, Mon 7. Rank: calm before warning, then
    # the higher chance a bed is free: Mon 7 (85%), Tue 1 (80%), Thu 3 (70%); Wed 2 (a
    # warning) is fourth and left out. In date order: Tue 1, Thu 3, Mon 7.
    assert [o.day.day for o in ranked] == [7, 1, 3]
    assert [o.day.day for o in in_order] == [1, 3, 7]


def test_admission_weekdays_drop_a_weekday_with_stray_electives() -> None:
    # Worked by hand: the busiest weekday has 100; a fifth of it is 20. Saturday's 19 is
    # below, Friday's 20 is at it (kept), Sunday has none.
    assert admission_weekdays([100, 90, 80, 40, 20, 19, 0]) == frozenset({0, 1, 2, 3, 4})
    assert admission_weekdays([0] * 7) == frozenset(range(7))
    with pytest.raises(ValueError):
        admission_weekdays([1, 2, 3])


def test_day_label_names_weekday_day_and_month() -> None:
    # 7 December 2026 is a Monday (checked against the calendar module's weekday()).
    import calendar

    assert calendar.weekday(2026, 12, 7) == calendar.MONDAY
    assert day_label(MON) == "Mon 7 Dec"


def test_alert_levels_bounds_and_sentence() -> None:
    assert check_alert_levels(0.1, 0.25) == (0.1, 0.25)
    for warning, alarm in ((0.0, 0.25), (0.3, 0.25), (0.1, 1.0), (float("nan"), 0.2)):
        with pytest.raises(OutOfBounds):
            check_alert_levels(warning, alarm)
    assert levels_of(None, 0.4) == AlertLevels(0.10, 0.40)
    # The sentence of issue 14, item 3, word for word.
    assert risk_sentence("Fri night", 0.14, 16, LEVELS) == (
        "Fri night: 14% chance of more patients than 16 staffed beds, above this unit's 10% "
        "warning level")
    # 9.6% would read "10%" and look like it meets the 10% level: one decimal instead.
    assert percent(0.096, LEVELS) == "9.6%" and percent(0.14, LEVELS) == "14%"
