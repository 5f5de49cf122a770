"""Length-of-stay training speed: each demo unit (target 20 s), a generated 200,000-stay history
(target 120 s, peak memory 2 GB, measured in a child process), and a forecast after a newly
entered score (target 1 s)."""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import time as time_module
from dataclasses import replace
from datetime import UTC, datetime, time
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from app.forecast.los import format_metrics, predict_stays, train_los
from app.state.frames import BOOKING_COLUMNS, UnitState
from app.state.load import load_state
from app.store import db
from app.timeutil import census_instants_after
from tests.benchmarks.conftest import timed
from tests.conftest import UTC_ZONE

END = datetime(2026, 11, 30, 8, 0, tzinfo=UTC)


def generated_history(n_stays: int, seed: int = 0) -> UnitState:
    """An invented unit: ``n_stays`` stays over three years, a daily score per stay-day.

    Stay lengths are gamma with a mean set by specialty, admission type, age and the first
    score; discharges fall between 09:00 and 19:00; scores drift down day by day.
    """
    rng = np.random.default_rng(seed)
    start = pd.Timestamp("2023-12-01", tz="UTC")
    span_days = 3 * 365
    admitted = start + pd.to_timedelta(np.sort(rng.uniform(0, span_days, n_stays)), unit="D")
    specialty = rng.choice(["medicine", "surgery", "trauma", "cardiac", "neuro", "renal"],
                           n_stays)
    emergency = rng.random(n_stays) < 0.7
    age = rng.integers(18, 96, n_stays).astype(float)
    score0 = rng.integers(0, 15, n_stays).astype(float)
    mean_days = (np.select([specialty == "cardiac", specialty == "neuro"], [2.5, 5.0], 3.5)
                 * np.where(emergency, 1.4, 1.0) * (1 + (age - 60) / 200) * (1 + score0 / 15))
    los = rng.gamma(1.5, mean_days / 1.5)
    end_day = (admitted + pd.to_timedelta(los, unit="D")).floor("D")
    discharged = end_day + pd.to_timedelta(rng.uniform(9, 19, n_stays), unit="h")
    discharged = pd.DatetimeIndex(np.maximum(discharged, admitted + pd.Timedelta(hours=2)))
    as_of = start + pd.Timedelta(days=span_days)
    stays = pd.DataFrame({
        "stay_id": [f"G-{i:07d}" for i in range(n_stays)],
        "admitted_at": admitted,
        "discharged_at": discharged.where(discharged <= as_of),
        "admission_type": np.where(emergency, "emergency", "elective"),
        "outcome": None, "age": age, "sex": rng.choice(["f", "m"], n_stays),
        "specialty": specialty, "source": rng.choice(["ed", "ward", "theatre", "other"], n_stays),
        "booking_id": None,
    })
    stays = stays.loc[stays["admitted_at"] <= as_of].reset_index(drop=True)
    days = np.ceil((np.minimum(stays["discharged_at"].fillna(as_of), as_of)
                    - stays["admitted_at"]).dt.total_seconds() / 86400).astype(int)
    stay = np.repeat(np.arange(len(stays)), days)
    k = np.arange(days.sum()) - np.repeat(np.cumsum(days) - days, days)
    admitted_ns = pd.DatetimeIndex(stays["admitted_at"]).asi8
    end_ns = pd.DatetimeIndex(stays["discharged_at"].fillna(as_of)).asi8
    observed = admitted_ns[stay] + ((k + rng.uniform(0.02, 0.2, k.size)) * 86_400e9).astype(
        np.int64)
    value = np.clip(np.round(score0[stay] - 0.6 * k + rng.normal(0, 1, k.size)), 0, 24)
    keep = observed < end_ns[stay]
    observed_at = pd.to_datetime(observed[keep], utc=True)
    observations = pd.DataFrame({
        "stay_id": stays["stay_id"].to_numpy()[stay][keep],
        "observed_at": observed_at, "name": "sofa", "value": value[keep],
        "recorded_at": observed_at + pd.Timedelta(minutes=20),
    })
    observations = observations.loc[observations["recorded_at"] <= as_of]
    bookings = pd.DataFrame({c: pd.Series(dtype=object) for c in BOOKING_COLUMNS})
    snapshots = pd.DataFrame({"taken_at": pd.Series(dtype="datetime64[ns, UTC]"),
                              "occupancy": pd.Series(dtype=int)})
    return UnitState(unit="GEN", as_of=as_of, tz=ZoneInfo("UTC"), census_time=time(0, 0),
                     bed_plan=((None, 900),), stays=stays,
                     observations=observations.reset_index(drop=True), bookings=bookings,
                     snapshots=snapshots)


def test_train_demo_units(demo_db: str) -> None:
    out: dict[str, float] = {}
    for unit in ("KV-CRIT", "KV-SURG"):
        with db.session_scope(demo_db) as session:
            state = load_state(session, unit, END, UTC_ZONE)
        cpu = time_module.process_time()
        with timed(f"train {unit} (validation, test metrics, ensemble, final fit)", 20, out):
            payload = train_los(state)
        # CPU time beside the wall time: on a shared machine the two tell load from work.
        print(f"BENCH   cpu {time_module.process_time() - cpu:.1f} s; "
              f"load average {os.getloadavg()[0]:.1f}")
        print(format_metrics(payload["metrics"]))
        assert payload["metrics"]["tree"]["ibs_1_14"] > 0


_CHILD = """
import json, resource, sys, time
from tests.benchmarks.test_bench_train import generated_history
from app.forecast.los import train_los
state = generated_history(int(sys.argv[1]))
start, cpu = time.perf_counter(), time.process_time()
payload = train_los(state)
seconds, cpu = time.perf_counter() - start, time.process_time() - cpu
peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps({"seconds": seconds, "cpu": cpu, "peak_mib": peak_kib / 1024, "stays": len(state.stays),
                  "observations": len(state.observations),
                  "rows": payload["metrics"]["training_rows"],
                  "tree": payload["metrics"]["tree"], "km": payload["metrics"]["km"]}))
"""


def test_train_200000_stay_history() -> None:
    # A child process, so its peak resident memory is the training's alone (generation and
    # imports included, so an upper bound).
    result = subprocess.run([sys.executable, "-c", _CHILD, "200000"], capture_output=True,
                            text=True, check=True, timeout=1800)
    figures = json.loads(result.stdout.strip().splitlines()[-1])
    seconds, peak = figures["seconds"], figures["peak_mib"]
    print(f"\nBENCH train 200,000-stay history: {seconds:.1f} s (target 120 s) "
          f"{'ok' if seconds <= 120 else 'OVER TARGET'}; peak memory {peak:.0f} MiB "
          f"(target 2048 MiB) {'ok' if peak <= 2048 else 'OVER TARGET'}; cpu "
          f"{figures['cpu']:.1f} s, load average {os.getloadavg()[0]:.1f}")
    print(f"BENCH   {figures['stays']} stays, {figures['observations']} observations, "
          f"{figures['rows']} training rows; test tree {figures['tree']}, KM {figures['km']}")
    assert figures["stays"] > 190_000


def test_forecast_after_a_new_score(demo_db: str) -> None:
    with db.session_scope(demo_db) as session:
        history = load_state(session, "KV-CRIT", END, UTC_ZONE)
        current = load_state(session, "KV-CRIT", END, UTC_ZONE, with_history=False)
    payload = json.loads(json.dumps(train_los(history, compare=False, evaluate=False)))
    instants = census_instants_after(END, current.census_time, current.tz, 7)
    before = predict_stays(payload, current, instants)
    stay_id = before.stay_ids[0]
    entered = pd.DataFrame({"stay_id": [stay_id], "observed_at": [current.as_of],
                            "name": ["sofa"], "value": [14.0], "recorded_at": [current.as_of]})
    updated = replace(current, observations=pd.concat([current.observations, entered],
                                                      ignore_index=True))
    out: dict[str, float] = {}
    with timed("forecast the current stays after a newly entered score", 1, out):
        after = predict_stays(payload, updated, instants)
    assert after.p_present[0, 0] != before.p_present[0, 0]
    usage = resource.getrusage(resource.RUSAGE_SELF)
    assert usage.ru_maxrss > 0
