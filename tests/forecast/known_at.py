"""Cut the demo CSVs down to what was known at an instant (DATA_CONTRACT.md, "as of")."""

from __future__ import annotations

import csv
import io
from datetime import datetime
from pathlib import Path


def _rows(path: Path) -> tuple[list[str], list[dict[str, str]]]:
    reader = csv.DictReader(io.StringIO(path.read_text("utf-8")))
    return list(reader.fieldnames or []), list(reader)


def _write(header: list[str], rows: list[dict[str, str]]) -> bytes:
    out = io.StringIO()
    writer = csv.DictWriter(out, fieldnames=header, lineterminator="\n")
    writer.writeheader()
    writer.writerows(rows)
    return out.getvalue().encode("utf-8")


def known_at(directory: Path, cut: datetime) -> dict[str, bytes]:
    """The five files as a database filled at ``cut`` would have held them (naive local times)."""
    def at(value: str) -> datetime:
        return datetime.fromisoformat(value)

    files = {}
    header, rows = _rows(directory / "units.csv")
    files["units"] = _write(header, rows)  # bed plans are known before they take effect
    header, rows = _rows(directory / "stays.csv")
    kept = []
    for row in rows:
        if at(row["admitted_at"]) > cut:
            continue
        if row["discharged_at"] and at(row["discharged_at"]) > cut:
            row = {**row, "discharged_at": "", "outcome": ""}
        kept.append(row)
    files["stays"] = _write(header, kept)
    header, rows = _rows(directory / "census.csv")
    files["census"] = _write(header, [r for r in rows if at(r["taken_at"]) <= cut])
    header, rows = _rows(directory / "observations.csv")
    files["observations"] = _write(header, [
        r for r in rows if at(r["observed_at"]) <= cut and at(r["recorded_at"] or r["observed_at"]) <= cut])
    header, rows = _rows(directory / "bookings.csv")
    kept = []
    for row in rows:
        if at(row["booked_at"]) > cut:
            continue
        if row["cancelled_at"] and at(row["cancelled_at"]) > cut:
            row = {**row, "cancelled_at": ""}
        kept.append(row)
    files["bookings"] = _write(header, kept)
    return files


def numbers_of(obj: object) -> list[float]:
    """Every number of a forecast JSON in a fixed order (keys sorted, model ids left out), to
    compare two forecasts number by number."""
    if isinstance(obj, dict):
        return [v for key in sorted(obj) if key != "id" for v in numbers_of(obj[key])]
    if isinstance(obj, list):
        return [v for item in obj for v in numbers_of(item)]
    if isinstance(obj, bool) or obj is None or isinstance(obj, str):
        return []
    return [float(obj)]
