"""Forecast speed in process: a 7-day forecast for the 28-bed demo ward (target 100 ms),
1,000 current stays across a hospital (target 1 s), the joint weekly risk by simulation of
5,000 paths (target 2 s)."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pandas as pd

from app.forecast.service import forecast_from_state, forecast_inputs, model_for
from app.state import load_state
from app.stats.occupancy_paths import simulate_paths
from app.store import db
from tests.benchmarks.conftest import best_of
from tests.conftest import UTC_ZONE
from tests.web.served import DEMO_NOW, trained_copy


def _report(label: str, seconds: float, target: float) -> None:
    print(f"\nBENCH {label}: {seconds * 1000:.1f} ms (target {target * 1000:.0f} ms) "
          f"{'ok' if seconds <= target else 'OVER TARGET'}")


def test_forecast_speed(demo_db: str, tmp_path: Path) -> None:
    url = trained_copy(demo_db, tmp_path, ("KV-SURG",))
    with db.session_scope(url) as session:
        record = model_for(session, "KV-SURG", DEMO_NOW)
        state = load_state(session, "KV-SURG", DEMO_NOW, UTC_ZONE, with_history=False)
    # A copy of the state per run: a state keeps its patients' curves (UnitState.memo).
    exact = best_of(5, lambda: forecast_from_state(dataclasses.replace(state), record, days=7,
                                                   paths=0))
    _report("7-day forecast, 28-bed unit, exact (no paths)", exact, 0.1)

    # A hospital's worth of current stays: the ward's patients copied under new ids.
    copies = int(np.ceil(1000 / max(len(state.current_stays()), 1)))
    current = state.stays.loc[state.present_mask(state.as_of)]
    stays = pd.concat([current.assign(stay_id=current["stay_id"] + f"-{i}") for i in range(copies)],
                      ignore_index=True).iloc[:1000]
    obs = state.observations
    observations = pd.concat([obs.assign(stay_id=obs["stay_id"] + f"-{i}") for i in range(copies)],
                             ignore_index=True)
    big = dataclasses.replace(state, stays=stays, observations=observations)
    assert len(big.current_stays()) == 1000
    hospital = best_of(3, lambda: forecast_from_state(dataclasses.replace(big), record, days=7,
                                                      paths=0))
    _report("7-day forecast, 1,000 current stays", hospital, 1.0)

    inputs = forecast_inputs(state, record, 7)
    weekly = best_of(3, lambda: simulate_paths(inputs.predictions.p_present, inputs.booked,
                                               inputs.streams, inputs.census_at, 5000,
                                               np.random.default_rng(1)))
    _report("joint weekly risk, 5,000 paths", weekly, 2.0)
