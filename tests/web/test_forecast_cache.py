"""The page's forecast cache: a score redoes only the current patients' part, exactly.

The reference is the full computation of `morrow forecast` for the same instant from the
same database (app.forecast.service.forecast); the cached, partly recomputed forecast must
equal it, and must show the score at once.
"""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from sqlalchemy import select

from app.config import get_settings
from app.forecast.service import forecast
from app.ingest import import_file
from app.store import db
from app.store.models import Stay
from app.web import forecasts
from app.web.forecasts import current, forecast_moment
from tests.conftest import UTC_ZONE
from tests.forecast.asked import count_asked
from tests.web.served import DEMO_NOW, trained_copy

UNIT = "KV-CRIT"


@pytest.fixture(scope="module")
def trained(demo_db: str, tmp_path_factory: pytest.TempPathFactory) -> str:
    return trained_copy(demo_db, tmp_path_factory.mktemp("cache"), (UNIT,))


@pytest.fixture
def replayed(monkeypatch: pytest.MonkeyPatch) -> Iterator[None]:
    monkeypatch.setenv("MORROW_TIMEZONE", "UTC")
    monkeypatch.setenv("MORROW_NOW", DEMO_NOW.isoformat())
    get_settings.cache_clear()
    yield
    get_settings.cache_clear()


def _close(a: object, b: object, path: str = "") -> None:
    """Equal JSON, floats within 1e-12."""
    if isinstance(a, dict) and isinstance(b, dict):
        assert a.keys() == b.keys(), path
        for k in a:
            _close(a[k], b[k], f"{path}/{k}")
    elif isinstance(a, list) and isinstance(b, list):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            _close(x, y, f"{path}[{i}]")
    elif isinstance(a, float) and isinstance(b, float):
        assert abs(a - b) <= 1e-12, (path, a, b)
    else:
        assert a == b, (path, a, b)


def test_a_score_reuses_the_backdrop_and_equals_a_full_forecast(
        trained: str, tmp_path: Path, replayed: None) -> None:
    with db.session_scope(trained) as session:
        before = current(session, UNIT)
    assert before.forecast is not None
    stays = before.forecast["stays"]
    # The emergency patient most likely to leave tonight: a very high SOFA should keep them.
    # (Only an emergency one: the demo's tree splits elective stays on no score.)
    with db.session_scope(trained) as session:
        emergency = {s.stay_id for s in session.scalars(
            select(Stay).where(Stay.unit == UNIT, Stay.admission_type == "emergency"))}
    target = max((s for s in stays if s["stay_id"] in emergency),
                 key=lambda s: 1 - s["p_present"][0])
    backdrops = dict(forecasts._backdrops)
    row = (f"stay_id,observed_at,name,value,recorded_at\n{target['stay_id']},"
           f"{DEMO_NOW.isoformat()},sofa,20,{DEMO_NOW.isoformat()}\n").encode()
    with db.session_scope(trained) as session:
        import_file(session, "observations", row, "test score", tz=UTC_ZONE, actor="test")
    with db.session_scope(trained) as session:
        after = current(session, UNIT)
        full = forecast(session, UNIT, DEMO_NOW, UTC_ZONE)
    assert after.forecast is not None
    # Reused: no new backdrop was made for the score.
    assert dict(forecasts._backdrops).keys() == backdrops.keys()
    _close(after.forecast, full)
    changed = {s["stay_id"]: s["p_present"] for s in after.forecast["stays"]}
    assert changed[target["stay_id"]] != target["p_present"]


def test_forecast_moment() -> None:
    now = datetime(2026, 12, 1, 8, 0, 30, tzinfo=UTC)
    minute = datetime(2026, 12, 1, 8, 0, tzinfo=UTC)
    assert forecast_moment(now, None) == minute
    assert forecast_moment(now, minute - timedelta(hours=2)) == minute
    # Written during this minute: the forecast is as of its end, so the entry counts.
    assert forecast_moment(now, now - timedelta(seconds=10)) == minute + timedelta(minutes=1)
    # A replayed clock far behind the real writes keeps its own minute.
    assert forecast_moment(now, now + timedelta(days=2)) == minute


def test_one_stored_page_forecast_per_hour_across_workers(trained: str,
                                                          replayed: None) -> None:
    from sqlalchemy import func, select

    from app.store.models import StoredForecast

    def stored() -> int:
        with db.session_scope(trained) as session:
            return int(session.scalar(select(func.count()).select_from(StoredForecast).where(
                StoredForecast.unit == UNIT, StoredForecast.origin == "page")) or 0)

    with db.session_scope(trained) as session:
        shown = current(session, UNIT)
    assert stored() == 1
    # Another worker has its own memory: it tries to store the same hour's forecast.
    forecasts._stored.clear()
    with db.session_scope(trained) as session:
        forecasts._store_now_and_then(session, shown.forecast, ("w2", UNIT, "m"),
                                      DEMO_NOW + timedelta(minutes=20))
    assert stored() == 1
    with db.session_scope(trained) as session:
        forecasts._store_now_and_then(session, shown.forecast, ("w2", UNIT, "m"),
                                      DEMO_NOW + timedelta(minutes=70))
    assert stored() == 2  # the next hour's is kept


def test_a_page_of_several_units_asks_each_units_patients_once(
        demo_db: str, tmp_path: Path, replayed: None, monkeypatch: pytest.MonkeyPatch) -> None:
    """The home page computes the demo's critical-care unit before the ward it passes
    patients on to; the ward takes its state as the page has it (``at_hand``), so the
    critical-care patients are asked of their model once, and both forecasts still equal
    `morrow forecast`'s."""
    url = trained_copy(demo_db, tmp_path, ("KV-CRIT", "KV-SURG"))
    asked = count_asked(monkeypatch)
    at_hand: forecasts.AtHand = {}
    with db.session_scope(url) as session:
        shown = {u: current(session, u, at_hand=at_hand) for u in ("KV-CRIT", "KV-SURG")}
    assert asked == ["KV-CRIT", "KV-SURG"]
    assert set(at_hand) == {"KV-CRIT", "KV-SURG"}
    with db.session_scope(url) as session:
        for unit, page in shown.items():
            assert page.forecast is not None
            _close(page.forecast, forecast(session, unit, DEMO_NOW, UTC_ZONE))
    assert shown["KV-SURG"].forecast is not None
    assert shown["KV-SURG"].forecast["days"][0]["transfers_in"]["KV-CRIT"] > 0
