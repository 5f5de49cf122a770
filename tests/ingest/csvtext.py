"""Small CSV builders for import tests (invented rows, fictional ids)."""

from __future__ import annotations

UNITS = "unit,beds,valid_from,census_time\nU-TEST,10,,00:00\nU-TEST,12,2026-03-01,\n"


def csv_bytes(header: str, *rows: str) -> bytes:
    return ("\n".join([header, *rows]) + "\n").encode("utf-8")


STAY_HEADER = "stay_id,unit,admitted_at,discharged_at,admission_type,outcome,age,sex,specialty,source"
CENSUS_HEADER = "taken_at,unit,bed,stay_id,admitted_at,admission_type,age,specialty"
OBS_HEADER = "stay_id,observed_at,name,value,recorded_at"
BOOKING_HEADER = "booking_id,unit,booked_at,planned_date,specialty,procedure,cancelled_at"
