"""Moving the demo forward by whole weeks keeps weekdays and every row."""

from __future__ import annotations

from datetime import date, datetime, timedelta

from app.demo.load import shift_csv, week_shift


def test_week_shift_is_whole_weeks_and_never_past_today() -> None:
    last = datetime(2026, 11, 30, 8, 0)  # a Monday
    assert week_shift(last, date(2026, 11, 30)) == timedelta(0)
    assert week_shift(last, date(2026, 12, 6)) == timedelta(0)
    assert week_shift(last, date(2026, 12, 7)) == timedelta(weeks=1)
    assert week_shift(last, date(2026, 1, 1)) == timedelta(0)


def test_shift_csv_moves_timestamps_and_dates_only() -> None:
    data = (b"booking_id,unit,booked_at,planned_date,cancelled_at\n"
            b"B-1,U,2026-03-02T09:15:00,2026-03-10,\n")
    out = shift_csv(data, timedelta(weeks=2)).decode()
    assert out.splitlines()[1] == "B-1,U,2026-03-16T09:15:00,2026-03-24,"
    moved = datetime.fromisoformat(out.splitlines()[1].split(",")[2])
    assert moved.weekday() == datetime(2026, 3, 2).weekday()
