"""Training copes with what a real unit holds: a score seen once, a score that never varies,
a covariate never recorded, too few stays (all units and ids invented)."""

from __future__ import annotations

import json
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from sqlalchemy import select

from app.cli.main import main
from app.ingest import import_file
from app.store import db
from app.store.models import TrainedModel
from tests.reliability.conftest import PASSWORD, ROLE_USERS, SecuredApp
from tests.security.fixtures import signed_in_client

pytestmark = pytest.mark.both_databases

UNIT = "U-TRC"
START = datetime(2026, 3, 2, tzinfo=UTC)
UNTIL = "2026-06-01T00:00:00+00:00"


def _unit(url: str, stays: int, *, days: int = 91, ages: bool = True,
          scores: dict[str, str] | None = None) -> None:
    """``stays`` stays admitted over ``days`` days (length of stay exponential, mean 3 days),
    and for each ``scores`` name a kind of entries: ``daily`` (a varying value on each
    stay's first two days), ``once`` (one value for one stay), ``same`` (4 on every stay)."""
    rng = np.random.default_rng(13)
    end = START + timedelta(days=days)
    stay_rows = ["stay_id,unit,admitted_at,discharged_at,admission_type,age,sex,specialty"]
    obs_rows = ["stay_id,observed_at,name,value"]
    for i in range(stays):
        admitted = START + timedelta(hours=float(rng.uniform(0, 24 * (days - 3))))
        left = admitted + timedelta(days=float(rng.exponential(3.0)) + 0.1)
        discharged = left.isoformat() if left < end else ""
        kind = "emergency" if rng.random() < 0.7 else "elective"
        age = str(int(rng.integers(18, 95))) if ages else ""
        sex = "f" if rng.random() < 0.5 else "m"
        specialty = "medicine" if rng.random() < 0.6 else "surgery"
        stay_rows.append(f"S-{i},{UNIT},{admitted.isoformat()},{discharged},{kind},{age},{sex},"
                         f"{specialty}")
        for name, pattern in (scores or {}).items():
            first = admitted + timedelta(hours=1)
            if pattern == "daily":
                for day in (0, 1):
                    at = first + timedelta(days=day)
                    if at < min(left, end):
                        obs_rows.append(f"S-{i},{at.isoformat()},{name},{rng.integers(0, 12)}")
            elif pattern == "same":
                obs_rows.append(f"S-{i},{first.isoformat()},{name},4")
            elif pattern == "once" and i == stays // 2:
                obs_rows.append(f"S-{i},{first.isoformat()},{name},14")
    with db.session_scope(url) as session:
        import_file(session, "units", f"unit,beds\n{UNIT},12\n".encode(), "units.csv", tz=UTC)
        import_file(session, "stays", "\n".join(stay_rows).encode(), "stays.csv", tz=UTC)
        import_file(session, "observations", "\n".join(obs_rows).encode(), "obs.csv", tz=UTC)


def _train(url: str, capsys: pytest.CaptureFixture[str], until: str = UNTIL
           ) -> tuple[int, str, str]:
    status = main(["--db", url, "train", "--unit", UNIT, "--until", until])
    out, err = capsys.readouterr()
    return status, out, err


def _left_out(url: str) -> list[dict[str, str]]:
    with db.session_scope(url) as session:
        stored = session.scalars(select(TrainedModel).where(TrainedModel.unit == UNIT)).all()
    assert len(stored) == 1
    left: list[dict[str, str]] = json.loads(stored[0].payload)["metrics"]["left_out"]
    return left


def test_a_score_entered_once_is_left_out_and_the_report_says_so(
        secured: SecuredApp, capsys: pytest.CaptureFixture[str]) -> None:
    """Failure 4: one apache_ii value on a unit that scores news2 stopped its training."""
    url = secured.db_url
    _unit(url, 240, scores={"news2": "daily", "apache_ii": "once"})
    status, out, err = _train(url, capsys)
    assert status == 0, err
    assert "left out apache_ii: known at a morning for 1 stay(s)" in out
    assert [left["name"] for left in _left_out(url)] == ["apache_ii"]
    client = signed_in_client(secured.app, ROLE_USERS["viewer"], PASSWORD)
    page = client.get(f"/units/{UNIT}/model")
    assert page.status_code == 200
    assert "Scores left out of this model: apache_ii (known at a morning for 1 stay(s)" in (
        page.text)


def test_a_score_that_never_varies_is_left_out(secured: SecuredApp,
                                               capsys: pytest.CaptureFixture[str]) -> None:
    url = secured.db_url
    _unit(url, 240, scores={"news2": "daily", "sofa": "same"})
    status, out, err = _train(url, capsys)
    assert status == 0, err
    assert "left out sofa: always 4 on this unit: no variation to learn from" in out
    assert [left["name"] for left in _left_out(url)] == ["sofa"]


def test_a_unit_without_scores_or_ages_trains(db_url: str,
                                              capsys: pytest.CaptureFixture[str]) -> None:
    """Failure 4: an empty observations file (and a covariate the unit never records)."""
    _unit(db_url, 240, ages=False)
    status, out, err = _train(db_url, capsys)
    assert status == 0, err
    assert "stored model" in out and "left out" not in out
    assert _left_out(db_url) == []


def test_too_few_stays_are_refused_in_plain_words(db_url: str,
                                                 capsys: pytest.CaptureFixture[str]) -> None:
    _unit(db_url, 6, days=20, scores={"news2": "daily"})
    status, out, err = _train(db_url, capsys)
    assert status == 2
    assert f"unit {UNIT} cannot be trained" in err and "at least 10 are needed" in err
    assert "Error" not in err and "Traceback" not in err


def test_too_few_days_of_arrivals_are_refused_in_plain_words(
        db_url: str, capsys: pytest.CaptureFixture[str]) -> None:
    """Enough stays to fit a length of stay, too few days to learn arrivals by weekday."""
    _unit(db_url, 40, days=12)
    status, out, err = _train(db_url, capsys, (START + timedelta(days=12)).isoformat())
    assert status == 2
    assert "at least 14 are needed to learn the weekday pattern of arrivals" in err
    assert "Error" not in err and "Traceback" not in err
