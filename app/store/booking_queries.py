"""What the booking page reads besides the forecast: the booked list by day, the unit's
elective admissions by weekday and the specialties its history knows."""

from __future__ import annotations

from datetime import date, datetime
from typing import Any
from zoneinfo import ZoneInfo

from sqlalchemy import select, union
from sqlalchemy.orm import Session

from app.store.models import Booking, Stay


def booked_list(session: Session, unit: str, first: date, last: date) -> list[dict[str, Any]]:
    """Bookings not cancelled and not yet admitted, planned from ``first`` to ``last``, by day."""
    admitted = select(Stay.booking_id).where(Stay.unit == unit, Stay.booking_id.is_not(None))
    rows = session.scalars(
        select(Booking).where(Booking.unit == unit, Booking.planned_date >= first,
                              Booking.planned_date <= last, Booking.cancelled_at.is_(None),
                              Booking.booking_id.not_in(admitted))
        .order_by(Booking.planned_date, Booking.booked_at, Booking.booking_id)).all()
    return [{"booking_id": b.booking_id, "planned_date": b.planned_date, "age": b.age,
             "specialty": b.specialty, "procedure": b.procedure, "booked_at": b.booked_at}
            for b in rows]


def elective_weekday_counts(session: Session, unit: str, tz: ZoneInfo,
                            until: datetime) -> list[int]:
    """Elective admissions to ``unit`` by local weekday (Monday first), admitted by ``until``."""
    counts = [0] * 7
    for (admitted,) in session.execute(
            select(Stay.admitted_at).where(Stay.unit == unit, Stay.admission_type == "elective",
                                           Stay.admitted_at <= until)):
        counts[admitted.astimezone(tz).weekday()] += 1
    return counts


def known_specialties(session: Session, unit: str) -> list[str]:
    """Specialties the unit's stays and bookings have carried, sorted."""
    found = session.scalars(union(
        select(Stay.specialty).where(Stay.unit == unit, Stay.specialty.is_not(None)),
        select(Booking.specialty).where(Booking.unit == unit, Booking.specialty.is_not(None)))
    ).all()
    return sorted({str(s).strip().lower() for s in found if s and str(s).strip()})
