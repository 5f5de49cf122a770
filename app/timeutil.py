"""Time rules of the data contract: naive timestamps are site-local, everything stored is UTC."""

from __future__ import annotations

from datetime import UTC, date, datetime, time, timedelta
from zoneinfo import ZoneInfo


def parse_timestamp(text: str, tz: ZoneInfo) -> datetime:
    """Parse an ISO 8601 timestamp; one without an offset is wall-clock time in ``tz``.

    A wall-clock time that does not exist (the hour skipped when clocks go forward)
    is moved forward by the gap, as a clock on the wall would show it; an ambiguous
    one (the repeated hour) takes its first occurrence. Returns an aware UTC datetime.
    """
    value = datetime.fromisoformat(text.strip())
    try:
        if value.tzinfo is None:
            value = localize(value, tz)
        return value.astimezone(UTC)
    except OverflowError:
        # Years 1 and 9999 can fall off the calendar once moved to UTC.
        raise ValueError("timestamp out of range") from None


def localize(naive: datetime, tz: ZoneInfo) -> datetime:
    """Attach ``tz`` to a naive wall-clock time (first occurrence; skipped times moved on)."""
    aware = naive.replace(tzinfo=tz, fold=0)
    round_trip = aware.astimezone(UTC).astimezone(tz)
    if round_trip.replace(tzinfo=None) != naive:
        # In a gap: UTC round trip lands after the gap, which is the clock's reading.
        return round_trip
    return aware


def parse_date(text: str) -> date:
    return date.fromisoformat(text.strip())


def parse_clock(text: str) -> time:
    """``HH:MM`` (24-hour) as a time of day."""
    parts = text.strip().split(":")
    if len(parts) != 2 or not all(p.isdigit() for p in parts):
        raise ValueError("expected HH:MM")
    hour, minute = int(parts[0]), int(parts[1])
    if not (0 <= hour <= 23 and 0 <= minute <= 59):
        raise ValueError("expected HH:MM between 00:00 and 23:59")
    return time(hour, minute)


def census_instant(day: date, census_time: time, tz: ZoneInfo) -> datetime:
    """The census instant of a local day, as an aware UTC datetime."""
    return localize(datetime.combine(day, census_time), tz).astimezone(UTC)


def census_instants_after(
    as_of: datetime, census_time: time, tz: ZoneInfo, count: int
) -> list[datetime]:
    """The next ``count`` census instants strictly after ``as_of`` (aware UTC).

    Census instants are local wall-clock times, so across a daylight-saving change
    consecutive instants are 23 or 25 hours apart.
    """
    local_day = as_of.astimezone(tz).date() - timedelta(days=1)
    out: list[datetime] = []
    while len(out) < count:
        instant = census_instant(local_day, census_time, tz)
        if instant > as_of:
            out.append(instant)
        local_day += timedelta(days=1)
    return out


def as_utc(value: datetime) -> datetime:
    """Naive values (as SQLite returns them) are UTC by storage convention."""
    if value.tzinfo is None:
        return value.replace(tzinfo=UTC)
    return value.astimezone(UTC)


def iso(value: datetime, tz: ZoneInfo) -> str:
    """Timestamp as written by the tool: local time with its offset."""
    return as_utc(value).astimezone(tz).isoformat()
