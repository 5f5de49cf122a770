"""No leakage: the forecast as of T from a database holding everything equals, to 1e-12, the
forecast from a database holding only what was known at T (training included)."""

from __future__ import annotations

import shutil
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


def _strings(obj: object) -> list[str]:
    if isinstance(obj, dict):
        return [v for k in sorted(obj) if k != "id" for v in [k, *_strings(obj[k])]]
    if isinstance(obj, list):
        return [v for item in obj for v in _strings(item)]
    return [obj] if isinstance(obj, str) else []


@pytest.mark.slow
def test_forecast_from_everything_equals_forecast_from_what_was_known(
        migrated_template: Path, tmp_path: Path) -> None:
    as_of = CUT.replace(tzinfo=UTC)
    results = []
    for name, files in (("everything", None), ("known", known_at(DEMO_DIR, CUT))):
        url = _database(migrated_template, tmp_path / f"{name}.db", files)
        with db.session_scope(url) as session:
            train_model(session, UNIT, as_of, UTC_ZONE)
        with db.session_scope(url) as session:
            results.append(forecast(session, UNIT, as_of, UTC_ZONE, days=7, paths=2000, seed=5))
        db.release_engine(url)
    everything, known = results
    assert _strings(everything) == _strings(known)
    a, b = np.array(numbers_of(everything)), np.array(numbers_of(known))
    assert a.shape == b.shape and a.size > 100
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-12)
    assert everything["model"]["trained_until"] == known["model"]["trained_until"]
