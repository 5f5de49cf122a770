"""No leakage: the forecast as of T from a database holding everything equals, to 1e-12, the
forecast from a database holding only what was known at T (training included)."""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest

from app.forecast.service import forecast, train_model
from app.ingest import import_file
from app.store import db
from tests.conftest import DEMO_DIR, UTC_ZONE
from tests.forecast.known_at import known_at, numbers_of

CUT = datetime(2026, 10, 14, 8, 0)  # a Wednesday morning in the demo's census window
AS_OF = CUT.replace(tzinfo=UTC)
UNIT = "KV-CRIT"


def _database(template: Path, path: Path, files: dict[str, bytes] | None) -> str:
    shutil.copy(template, path)
    url = f"sqlite:///{path}"
    with db.session_scope(url) as session:
        if files is None:
            from app.demo.load import load_demo

            load_demo(session, DEMO_DIR, tz=UTC_ZONE, shift=False)
        else:
            for kind in ("units", "stays", "census", "observations", "bookings"):
                import_file(session, kind, files[kind], f"{kind}.csv", tz=UTC_ZONE)
    return url


def _databases(template: Path, tmp_path: Path) -> Iterator[tuple[str, str]]:
    """("everything", url) then ("known", url): the demo whole, and as known at CUT."""
    for name, files in (("everything", None), ("known", known_at(DEMO_DIR, CUT))):
        url = _database(template, tmp_path / f"{name}.db", files)
        yield name, url
        db.release_engine(url)


def _strings(obj: object) -> list[str]:
    if isinstance(obj, dict):
        return [v for k in sorted(obj) if k != "id" for v in [k, *_strings(obj[k])]]
    if isinstance(obj, list):
        return [v for item in obj for v in _strings(item)]
    return [obj] if isinstance(obj, str) else []


@pytest.mark.slow
def test_forecast_from_everything_equals_forecast_from_what_was_known(
        migrated_template: Path, tmp_path: Path) -> None:
    results = []
    for _, url in _databases(migrated_template, tmp_path):
        with db.session_scope(url) as session:
            train_model(session, UNIT, AS_OF, UTC_ZONE)
        with db.session_scope(url) as session:
            results.append(forecast(session, UNIT, AS_OF, UTC_ZONE, days=7, paths=2000, seed=5))
    everything, known = results
    assert _strings(everything) == _strings(known)
    a, b = np.array(numbers_of(everything)), np.array(numbers_of(known))
    assert a.shape == b.shape and a.size > 100
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-12)
    assert everything["model"]["trained_until"] == known["model"]["trained_until"]


@pytest.mark.slow
def test_the_hospitals_pattern_a_backtest_learns_at_a_morning_sees_only_that_morning(
        migrated_template: Path, tmp_path: Path) -> None:
    # run_backtest learns the hospital's yearly pattern at each retraining morning from every
    # unit's state as known then (UnitState.known_at on the full history); it must equal the
    # pattern learnt from a database holding only what was known at that morning. (Without
    # known_at, the later history moves the pair by 0.02: measured when this test was written.)
    from app.forecast.hospital_demand import hospital_season_at
    from app.state import load_state
    from app.store import repo

    pairs = []
    for name, url in _databases(migrated_template, tmp_path):
        with db.session_scope(url) as session:
            units = [u.code for u in repo.list_units(session)]
            if name == "everything":
                later = datetime(2026, 11, 29, 8, 0, tzinfo=UTC)
                states = [load_state(session, u, later, UTC_ZONE, with_history=True)
                          .known_at(AS_OF) for u in units]
            else:
                states = [load_state(session, u, AS_OF, UTC_ZONE, with_history=True)
                          for u in units]
            pairs.append(hospital_season_at(states, units))
    replayed, known = pairs
    assert replayed is not None and known is not None
    np.testing.assert_allclose(replayed, known, rtol=0, atol=1e-10)
