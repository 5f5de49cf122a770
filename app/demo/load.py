"""Load the committed demo CSVs, moved forward by whole weeks so the demo ends this week.

Whole weeks keep every weekday pattern of the invented scenario where it was generated.
The files go through the same importer as any user's file.
"""

from __future__ import annotations

import csv
import io
from datetime import date, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.ingest import ImportResult, import_file
from app.store.models import Unit

ORDER = ("units", "stays", "census", "observations", "bookings")
TIMESTAMP_COLUMNS = {"admitted_at", "discharged_at", "taken_at", "observed_at", "recorded_at",
                     "booked_at", "cancelled_at"}
DATE_COLUMNS = {"planned_date", "valid_from"}


def week_shift(last_instant: datetime, today: date) -> timedelta:
    """Whole weeks that move ``last_instant`` to the latest day on or before ``today``."""
    weeks = (today - last_instant.date()).days // 7
    return timedelta(weeks=max(weeks, 0))


def shift_csv(data: bytes, shift: timedelta) -> bytes:
    """The same CSV with every timestamp and date column moved by ``shift``."""
    if not shift:
        return data
    reader = csv.DictReader(io.StringIO(data.decode("utf-8")))
    out = io.StringIO()
    writer = csv.DictWriter(out, fieldnames=reader.fieldnames or [], lineterminator="\n")
    writer.writeheader()
    for row in reader:
        for column, value in row.items():
            if not value:
                continue
            if column in TIMESTAMP_COLUMNS:
                row[column] = (datetime.fromisoformat(value) + shift).isoformat()
            elif column in DATE_COLUMNS:
                row[column] = (date.fromisoformat(value) + shift).isoformat()
        writer.writerow(row)
    return out.getvalue().encode("utf-8")


def _last_census_instant(census: bytes) -> datetime:
    reader = csv.DictReader(io.StringIO(census.decode("utf-8")))
    return max(datetime.fromisoformat(row["taken_at"]) for row in reader)


def demo_units(directory: Path) -> list[str]:
    reader = csv.DictReader(io.StringIO((directory / "units.csv").read_text("utf-8")))
    return sorted({row["unit"] for row in reader})


def is_loaded(session: Session, directory: Path) -> bool:
    """Whether the demo's units are already stored (loading twice would clash on dates)."""
    codes = demo_units(directory)
    return session.scalar(select(Unit.code).where(Unit.code.in_(codes)).limit(1)) is not None


def load_demo(session: Session, directory: Path, *, tz: ZoneInfo, shift: bool = True,
              today: date | None = None) -> tuple[list[ImportResult], timedelta]:
    """Import the five demo files in dependency order; returns the results and the shift used."""
    files = {kind: (directory / f"{kind}.csv").read_bytes() for kind in ORDER}
    moved = timedelta(0)
    if shift:
        now = today or datetime.now(tz).date()
        moved = week_shift(_last_census_instant(files["census"]), now)
    results = []
    for kind in ORDER:
        results.append(import_file(session, kind, shift_csv(files[kind], moved), f"{kind}.csv",
                                   tz=tz, actor="demo"))
    return results, moved
