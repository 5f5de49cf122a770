"""Stored models: the newest whose trained_until is not after the instant asked about."""

from __future__ import annotations

import shutil
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from app.forecast.los import LosModel, train_unit
from app.forecast.models import newest_model, save_model
from app.store import db
from app.store.models import Unit
from tests.conftest import UTC_ZONE

T0 = datetime(2026, 3, 1, 8, 0, tzinfo=UTC)


def test_newest_model_never_comes_from_after_the_instant(db_url: str) -> None:
    with db.session_scope(db_url) as session:
        session.add_all([Unit(code="U1"), Unit(code="U2")])
        session.flush()
        first = save_model(session, "U1", T0, {"los": {"n": 1}, "trained_until": "a"})
        second = save_model(session, "U1", T0 + timedelta(days=7), {"los": {"n": 2}})
        other = save_model(session, "U2", T0 + timedelta(days=1), {"los": {"n": 3}})
    assert len({first, second, other}) == 3
    with db.session_scope(db_url) as session:
        assert newest_model(session, "U1", T0 - timedelta(seconds=1)) is None
        found = newest_model(session, "U1", T0)
        assert found is not None and found[0] == first and found[1] == T0
        assert found[2] == {"los": {"n": 1}, "trained_until": "a"}
        found = newest_model(session, "U1", T0 + timedelta(days=6, hours=23))
        assert found is not None and found[0] == first
        found = newest_model(session, "U1", T0 + timedelta(days=30))
        assert found is not None and found[0] == second and found[2] == {"los": {"n": 2}}
        found = newest_model(session, "U2", T0 + timedelta(days=30))
        assert found is not None and found[0] == other
        assert newest_model(session, "U3", T0 + timedelta(days=30)) is None


def test_models_need_aware_times_and_strict_json(db_url: str) -> None:
    with db.session_scope(db_url) as session:
        session.add(Unit(code="U1"))
        session.flush()
        with pytest.raises(ValueError, match="trained_until: must be an aware datetime"):
            save_model(session, "U1", datetime(2026, 3, 1), {})
        with pytest.raises(ValueError, match="Out of range float values"):
            save_model(session, "U1", T0, {"x": float("nan")})
        with pytest.raises(ValueError, match="not_after: must be an aware datetime"):
            newest_model(session, "U1", datetime(2026, 3, 1))


@pytest.mark.slow
def test_train_unit_stores_a_model_found_for_later_instants(demo_db: str,
                                                            tmp_path: Path) -> None:
    path = tmp_path / "copy.db"
    shutil.copy(demo_db.removeprefix("sqlite:///"), path)  # the shared demo is read-only
    url = f"sqlite:///{path}"
    until = datetime(2026, 10, 5, 8, 0, tzinfo=UTC)
    with db.session_scope(url) as session:
        model_id, metrics = train_unit(session, "KV-CRIT", until, UTC_ZONE, evaluate=False)
    assert metrics["training_rows"] > 10_000 and "tree" not in metrics
    with db.session_scope(url) as session:
        assert newest_model(session, "KV-CRIT", until - timedelta(minutes=1)) is None
        found = newest_model(session, "KV-CRIT", until + timedelta(days=3))
    assert found is not None and found[0] == model_id and found[1] == until
    model = LosModel.from_payload(found[2])
    assert model.census_time.hour == 0 and model.hazard.tree.leaves.size >= 2
    db.release_engine(url)
