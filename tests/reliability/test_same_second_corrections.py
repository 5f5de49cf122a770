"""A later entry for the same stay, score and observed time supersedes the earlier one, also
when both carry the same recorded_at (a clock read to the second, or the replay clock)."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from urllib.parse import parse_qs, urlsplit

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import func, select

from app.config import get_settings
from app.forecast.los import observations_at
from app.ingest import import_file
from app.state.load import load_state
from app.store import db
from app.store.models import Observation
from tests.reliability.conftest import PASSWORD, ROLE_USERS, SecuredApp
from tests.security.fixtures import csrf, signed_in_client

pytestmark = pytest.mark.both_databases

UNIT = "U-COR"
STAY = "S-COR-1"
ADMITTED = datetime(2026, 3, 9, 22, 0, tzinfo=UTC)
NOW = datetime(2026, 3, 10, 9, 0, tzinfo=UTC)


def _seed(url: str) -> None:
    with db.session_scope(url) as session:
        import_file(session, "units", f"unit,beds\n{UNIT},4\n".encode(), "units.csv", tz=UTC)
        import_file(session, "stays", (
            "stay_id,unit,admitted_at,admission_type\n"
            f"{STAY},{UNIT},{ADMITTED.isoformat()},emergency\n").encode(), "stays.csv", tz=UTC)


def _entry(url: str, value: int, at: datetime = NOW) -> tuple[int, int]:
    """One score entered as the page does: observed and recorded at the same instant."""
    data = ("stay_id,observed_at,name,value,recorded_at\n"
            f"{STAY},{at.isoformat()},news2,{value},{at.isoformat()}\n").encode()
    with db.session_scope(url) as session:
        result = import_file(session, "observations", data, "score entry form", tz=UTC)
    return result.inserted, result.unchanged


def _stored(url: str) -> int:
    with db.session_scope(url) as session:
        return int(session.scalar(select(func.count()).select_from(Observation)) or 0)


def _latest(url: str, at: datetime) -> tuple[float, float]:
    """The latest news2 as the forecast reads it (current stays) and as training reads it
    (landmark columns), at ``at``."""
    with db.session_scope(url) as session:
        state = load_state(session, UNIT, at, UTC, with_history=True)
    current = state.current_stays()
    landmark = observations_at(state.observations, ["news2"], [STAY],
                               np.array([pd.Timestamp(at).value], dtype=np.int64))
    return float(current.loc[0, "news2"]), float(landmark["news2"][0])


def test_a_correction_with_the_same_recorded_at_supersedes(db_url: str) -> None:
    """Failure 9: the second entry was refused ("a correction needs a later recorded_at")."""
    _seed(db_url)
    assert _entry(db_url, 3) == (1, 0)
    assert _entry(db_url, 7) == (1, 0)
    assert _stored(db_url) == 2  # append-only: both entries kept
    assert _latest(db_url, NOW) == (7.0, 7.0)
    assert _latest(db_url, NOW + timedelta(hours=2)) == (7.0, 7.0)
    # Entering the current value again changes nothing; going back is one more correction.
    assert _entry(db_url, 7) == (0, 1)
    assert _entry(db_url, 3) == (1, 0)
    assert _stored(db_url) == 3
    assert _latest(db_url, NOW) == (3.0, 3.0)


def test_a_nurse_corrects_a_score_under_the_replay_clock(
        secured: SecuredApp, monkeypatch: pytest.MonkeyPatch) -> None:
    """Failure 9: under MORROW_NOW every entry has the same recorded_at."""
    monkeypatch.setenv("MORROW_NOW", NOW.isoformat())
    get_settings.cache_clear()
    _seed(secured.db_url)
    client = signed_in_client(secured.app, ROLE_USERS["nurse_in_charge"], PASSWORD)
    messages = []
    for value in ("5", "2"):
        answer = client.post(f"/units/{UNIT}/scores", data={
            "stay_id": STAY, "name": "news2", "value": value, "csrf_token": csrf(client)},
            follow_redirects=False)
        assert answer.status_code == 303
        messages.append(parse_qs(urlsplit(answer.headers["location"]).query)["message"][0])
    # The stay has no bed in a census, so the answer names the stay; the second entry for
    # the same observation time is a correction and says what it corrects.
    assert messages == [f"NEWS2 5 recorded for stay {STAY}, observed Tue 10 Mar 09:00.",
                        f"NEWS2 2 recorded for stay {STAY}, observed Tue 10 Mar 09:00 "
                        "(corrects 5)."]
    assert _stored(secured.db_url) == 2
    assert _latest(secured.db_url, NOW) == (2.0, 2.0)


def test_one_file_with_two_values_for_one_entry_is_refused_by_line(db_url: str) -> None:
    """Lines of one file have no order of entry, so two values of one entry are ambiguous;
    the refusal names the line and no longer asks for a later recorded_at."""
    from app.ingest import ImportRefused

    _seed(db_url)
    stamp = NOW.isoformat()
    data = ("stay_id,observed_at,name,value,recorded_at\n"
            f"{STAY},{stamp},news2,3,{stamp}\n{STAY},{stamp},news2,4,{stamp}\n").encode()
    with pytest.raises(ImportRefused) as refused, db.session_scope(db_url) as session:
        import_file(session, "observations", data, "two.csv", tz=UTC)
    [problem] = refused.value.problems
    assert (problem.line, problem.column) == (3, "value")
    assert "line 2 gives another value" in problem.why
    assert _stored(db_url) == 0
