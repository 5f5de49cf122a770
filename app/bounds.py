"""The range every user-given value must fall in; the page, the API, the CLI and imports share it.

Two reasons bound a value. What the code can represent: pandas holds instants as 64-bit
nanoseconds, 1677-09-22 .. 2262-04-11, and Python's dates end at 9999-12-31, so an instant
near either edge fails as soon as a forecast steps a few days past it. And what is
plausible: an admission dated next year, or a scenario with a thousand times the arrivals,
is a typing error, and answering it would occupy a server core for minutes. The plausible
ranges lie well inside the representable one, so checking them is enough.

A value outside its range raises ``OutOfBounds`` (a ``ValueError``) whose message names the
field, the value given and the range allowed, in words a user understands.
"""

from __future__ import annotations

import math
from datetime import UTC, date, datetime, timedelta, tzinfo

# -- dates and instants ---------------------------------------------------------------------

# No hospital record of interest predates 1900; real histories (and the demo) start long after.
EARLIEST_DATE = date(1900, 1, 1)
EARLIEST = datetime(1900, 1, 1, tzinfo=UTC)
# An imported event (admission, discharge, census, score, booking made or cancelled) has
# happened: a day's slack covers clocks of feeding systems and time zones.
EVENT_SLACK = timedelta(days=1)
# Planned dates in imports (bookings, bed plans): waiting lists run up to about two years.
PLAN_HORIZON_DAYS = 731
# The booking form books from today to this many days ahead (the booking check's range).
BOOKING_HORIZON_DAYS = 60
# A forecast, training or backtest instant may lie up to a year after now (a what-if on the
# present data); beyond that it is a typing error.
AS_OF_AHEAD = timedelta(days=366)
# Filters (audit dates) only select, so they may lie further ahead; still a date whose next
# day Python and the database can hold.
FILTER_AHEAD_DAYS = 3660

# A score entered on the page or through the API describes a moment already past: never after
# now (the site's clock), and at most this long before it (a later entry for an older moment
# is a correction to a file; common practice, no source).
SCORE_LOOKBACK = timedelta(days=7)

# -- forecasts and backtests ----------------------------------------------------------------

MIN_FORECAST_DAYS, MAX_FORECAST_DAYS = 1, 28
# Each day of a backtest is one forecast, and the model is refitted every 28 days, so the
# work grows with the span; three years of mornings cover every season more than twice.
MAX_BACKTEST_DAYS = 3 * 366

# -- planning --------------------------------------------------------------------------------

# The simulation's work grows with the number of arrivals (and of beds to try): three times
# today's arrivals, or stays, is beyond any realistic what-if.
MAX_ARRIVALS_FACTOR = 3.0
MIN_STAY_FACTOR, MAX_STAY_FACTOR = 0.1, 3.0
MAX_PLAN_YEARS = 10
MIN_PLAN_REPLICATIONS, MAX_PLAN_REPLICATIONS = 2, 100
MAX_BEDS = 1000
MAX_SEED = 2**32 - 1
# Units planned together (app/stats/planning/network.py): the work grows with every unit's
# arrivals; ten units is a whole small hospital.
MAX_NETWORK_UNITS = 10
# Staffed beds added to (or taken from) a unit in a plan of units together.
MAX_BED_CHANGE = 50


# -- alert levels ----------------------------------------------------------------------------

# A unit's warning and alarm levels (app/alert_levels.py), as a chance from 1% to 99%: 0%
# would colour every night, 100% none; the warning must lie below the alarm.
MIN_ALERT_LEVEL, MAX_ALERT_LEVEL = 0.01, 0.99


# -- text ------------------------------------------------------------------------------------

# Free text typed into a form or API field: no control characters (PostgreSQL refuses a NUL
# in text outright, and none belongs in a name, label or filter).
NO_CONTROL_CHARACTERS = r"^[^\x00-\x1f\x7f]*$"


class OutOfBounds(ValueError):
    """A value outside its allowed range; the message is meant for the user."""


def _utc_now(now: datetime | None) -> datetime:
    return (now or datetime.now(UTC)).astimezone(UTC)


def _shown(value: datetime) -> str:
    # Not strftime: its %Y drops the leading zeros of years before 1000 on glibc.
    moment = value.astimezone(UTC)
    return f"{moment.date().isoformat()} {moment:%H:%M} UTC"


def check_instant(value: datetime, field: str, *, latest: datetime) -> datetime:
    """``value`` (aware) if it lies from 1900-01-01 to ``latest``; else ``OutOfBounds``."""
    if not EARLIEST <= value <= latest:
        raise OutOfBounds(f"{field}: {_shown(value)} is outside the allowed range, "
                          f"{_shown(EARLIEST)} to {_shown(latest)}")
    return value


def latest_event(now: datetime | None = None) -> datetime:
    """The latest instant an imported event may carry."""
    return _utc_now(now) + EVENT_SLACK


def check_as_of(value: datetime, field: str, now: datetime | None = None) -> datetime:
    """An instant to forecast, train or backtest from: 1900 to a year after now."""
    return check_instant(value, field, latest=_utc_now(now) + AS_OF_AHEAD)


def check_date(value: date, field: str, *, earliest: date = EARLIEST_DATE,
               latest: date) -> date:
    if not earliest <= value <= latest:
        raise OutOfBounds(f"{field}: {value.isoformat()} is outside the allowed range, "
                          f"{earliest.isoformat()} to {latest.isoformat()}")
    return value


def latest_planned_date(today: date | None = None) -> date:
    """The latest planned date (booking, bed plan) an import may carry."""
    return (today or datetime.now(UTC).date()) + timedelta(days=PLAN_HORIZON_DAYS)


def check_filter_date(value: date, field: str, today: date | None = None) -> date:
    """A date that only selects (the audit page's since/until)."""
    base = today or datetime.now(UTC).date()
    return check_date(value, field, latest=base + timedelta(days=FILTER_AHEAD_DAYS))


def check_booking_date(value: date, today: date, field: str = "planned date") -> date:
    """A booking made on the form: from ``today`` (the site's) to the booking horizon."""
    latest = today + timedelta(days=BOOKING_HORIZON_DAYS)
    if not today <= value <= latest:
        raise OutOfBounds(f"{field}: {value.isoformat()} is outside the allowed range, "
                          f"today ({today.isoformat()}) to {BOOKING_HORIZON_DAYS} days ahead "
                          f"({latest.isoformat()})")
    return value


def check_observed_at(value: datetime, now: datetime, tz: tzinfo,
                      field: str = "observation time") -> datetime:
    """When a score entered now was observed: from ``SCORE_LOOKBACK`` before ``now`` to ``now``.

    The message shows the site's wall-clock time, as the form does."""
    earliest = now - SCORE_LOOKBACK
    if value > now:
        raise OutOfBounds(f"{field} {_wall(value, tz)} is in the future; "
                          f"give a time up to now ({_wall(now, tz)})")
    if value < earliest:
        raise OutOfBounds(f"{field} {_wall(value, tz)} is more than "
                          f"{SCORE_LOOKBACK.days} days ago; import older scores as a file")
    return value


def _wall(value: datetime, tz: tzinfo) -> str:
    """The site's wall-clock time, or the UTC text for an instant the zone cannot show."""
    try:
        return f"{value.astimezone(tz):%a %d %b %Y %H:%M}"
    except OverflowError:  # years 1 and 9999 fall off the calendar in some zones
        return _shown(value)


def check_date_range(start: date, end: date, what: str = "--from/--to") -> None:
    """A backtest's days: ``start`` not after ``end``, at most ``MAX_BACKTEST_DAYS`` long."""
    if end < start:
        raise OutOfBounds(f"{what}: the start {start.isoformat()} is after the end "
                          f"{end.isoformat()}")
    span = (end - start).days + 1
    if span > MAX_BACKTEST_DAYS:
        raise OutOfBounds(f"{what}: {span} days from {start.isoformat()} to {end.isoformat()}; "
                          f"at most {MAX_BACKTEST_DAYS} days are allowed")


# -- counts and factors ----------------------------------------------------------------------

def check_whole(value: int, field: str, low: int, high: int) -> int:
    if not low <= value <= high:
        raise OutOfBounds(f"{field}: {value} is outside the allowed range, {low} to {high}")
    return value


def check_forecast_days(value: int, field: str = "days") -> int:
    return check_whole(value, field, MIN_FORECAST_DAYS, MAX_FORECAST_DAYS)


def _percent(factor: float) -> str:
    return f"{(factor - 1) * 100:+g}%"


def check_factor(value: float, field: str, low: float, high: float) -> float:
    """A multiplier (1.1 = 10% more); the message shows it also as a percentage change."""
    if not math.isfinite(value):
        raise OutOfBounds(f"{field}: {value!r} is not a number")
    if not low <= value <= high:
        raise OutOfBounds(f"{field}: {value:g} ({_percent(value)}) is outside the allowed "
                          f"range, {low:g} ({_percent(low)}) to {high:g} ({_percent(high)})")
    return value


def check_arrivals_factor(value: float, field: str = "arrivals factor") -> float:
    return check_factor(value, field, 0.0, MAX_ARRIVALS_FACTOR)


def check_stay_factor(value: float, field: str = "stay factor") -> float:
    return check_factor(value, field, MIN_STAY_FACTOR, MAX_STAY_FACTOR)


def check_share(value: float, field: str = "share moved") -> float:
    if not (math.isfinite(value) and 0.0 <= value <= 1.0):
        raise OutOfBounds(f"{field}: {value!r} is outside the allowed range, 0 to 1 (0% to "
                          "100%)")
    return value


def check_plan_days(days: int, field: str = "years") -> int:
    """Days simulated per replication: a week to ``MAX_PLAN_YEARS`` years."""
    if not 7 <= days <= MAX_PLAN_YEARS * 365:
        raise OutOfBounds(f"{field}: {days / 365:g} years ({days} days) is outside the allowed "
                          f"range, a week to {MAX_PLAN_YEARS} years")
    return days


def check_bed_change(value: int, field: str = "bed change") -> int:
    """Beds added to (or, negative, taken from) a unit's staffed beds in a plan."""
    return check_whole(value, field, -MAX_BED_CHANGE, MAX_BED_CHANGE)


def check_alert_levels(warning: float, alarm: float) -> tuple[float, float]:
    """A unit's warning and alarm levels (chances, 0.1 = 10%): each from 1% to 99%, the
    warning below the alarm."""
    for field, value in (("warning level", warning), ("alarm level", alarm)):
        if not (math.isfinite(value) and MIN_ALERT_LEVEL <= value <= MAX_ALERT_LEVEL):
            shown = f"{value * 100:g}%" if math.isfinite(value) else repr(value)
            raise OutOfBounds(f"{field}: {shown} is outside the allowed range, "
                              f"{MIN_ALERT_LEVEL:.0%} to {MAX_ALERT_LEVEL:.0%}")
    if not warning < alarm:
        raise OutOfBounds(f"warning level: {warning * 100:g}% must be below the alarm level "
                          f"({alarm * 100:g}%)")
    return warning, alarm


# -- the wall screen (home page, app/web/routes_home.py) ---------------------------------------

# How often the wall screen reloads itself, in seconds: every five minutes by default; at
# most hourly, at least every 5 s (the browser test's short interval).
WALL_REFRESH_S = 300
MIN_WALL_REFRESH_S = 5
MAX_WALL_REFRESH_S = 3600


def check_wall_refresh(seconds: int, field: str = "refresh") -> int:
    return check_whole(seconds, field, MIN_WALL_REFRESH_S, MAX_WALL_REFRESH_S)


# -- feeds (app/feeds, app/cli/feeds.py) -----------------------------------------------------

# One HL7 v2 message over MLLP: ADT and ORU messages are a few kilobytes; a block past this is
# refused (AR) rather than buffered without end.
MAX_FEED_MESSAGE_BYTES = 1024 * 1024
# `morrow feeds check --last N`: how many of the latest messages it may read.
MAX_FEED_CHECK_MESSAGES = 1_000_000
