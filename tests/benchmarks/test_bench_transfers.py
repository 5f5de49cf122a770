"""Forecast speed with patients passed on: the demo ward's 7-day forecast with the critical
care unit's current patients and admissions to come (app/forecast/transfers.py), against the
same forecast alone (target: 100 ms, as the ward's forecast alone)."""

from __future__ import annotations

from pathlib import Path

from app.forecast.service import forecast_from_state, model_for, senders_of
from app.state import load_state
from app.store import db
from tests.benchmarks.conftest import best_of
from tests.conftest import UTC_ZONE
from tests.web.served import DEMO_NOW, trained_copy


def test_forecast_with_transfers_speed(demo_db: str, tmp_path: Path) -> None:
    url = trained_copy(demo_db, tmp_path, ("KV-CRIT", "KV-SURG"))
    with db.session_scope(url) as session:
        record = model_for(session, "KV-SURG", DEMO_NOW)
        state = load_state(session, "KV-SURG", DEMO_NOW, UTC_ZONE, with_history=False)
        senders = senders_of(session, state, record)
    alone = best_of(5, lambda: forecast_from_state(state, record, days=7, paths=0))
    passed = best_of(5, lambda: forecast_from_state(state, record, days=7, paths=0,
                                                    senders=senders))
    print(f"\nBENCH 7-day forecast, 28-bed unit, alone: {alone * 1000:.1f} ms; with "
          f"{[s.unit for s in senders]} passing patients on: {passed * 1000:.1f} ms "
          f"(target 100 ms) {'ok' if passed <= 0.1 else 'OVER TARGET'}")
