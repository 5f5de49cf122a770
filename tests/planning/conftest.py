"""A copy of the demo hospital (invented) with KV-SURG's model trained at the demo's last
morning, shared by the planning tests (read-only: tests must not write to it)."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from app.config import get_settings
from tests.web.served import DEMO_NOW, trained_copy

UNIT = "KV-SURG"
PAIR = ("KV-CRIT", "KV-SURG")


@pytest.fixture(scope="session")
def planning_db(demo_db: str, tmp_path_factory: pytest.TempPathFactory) -> str:
    return trained_copy(demo_db, tmp_path_factory.mktemp("planning"), (UNIT,))


@pytest.fixture(scope="session")
def network_db(demo_db: str, tmp_path_factory: pytest.TempPathFactory) -> str:
    """The demo hospital with KV-CRIT and KV-SURG trained. If the demo carries no step-downs
    yet (no ``to_unit``), every third KV-CRIT stay discharged to a ward is marked as going to
    KV-SURG (the rest to KV-MEDW, a ward not forecast), and nothing else changes."""
    from sqlalchemy import func, select, update

    from app.store import db
    from app.store.models import Stay

    url = trained_copy(demo_db, tmp_path_factory.mktemp("network"), PAIR)
    with db.session_scope(url) as session:
        marked = session.scalar(select(func.count()).select_from(Stay).where(
            Stay.to_unit.is_not(None)))
        if not marked:
            ids = session.scalars(select(Stay.stay_id).where(
                Stay.unit == "KV-CRIT", Stay.outcome == "ward").order_by(Stay.stay_id)).all()
            surg = [i for k, i in enumerate(ids) if k % 3 == 0]
            session.execute(update(Stay).where(Stay.stay_id.in_(surg)).values(
                to_unit="KV-SURG"))
            session.execute(update(Stay).where(Stay.unit == "KV-CRIT",
                                               Stay.outcome == "ward",
                                               Stay.to_unit.is_(None)).values(to_unit="KV-MEDW"))
    db.release_engine(url)
    return url


@pytest.fixture(autouse=True)
def demo_morning(monkeypatch: pytest.MonkeyPatch) -> Iterator[None]:
    """Site zone UTC and "now" fixed at the demo's last morning (as the fixture trained)."""
    monkeypatch.setenv("MORROW_TIMEZONE", "UTC")
    monkeypatch.setenv("MORROW_NOW", DEMO_NOW.isoformat())
    get_settings.cache_clear()
    yield
    get_settings.cache_clear()
