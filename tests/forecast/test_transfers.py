"""A receiving unit's forecast with the patients a sending unit passes on
(app/forecast/transfers.py), on the invented two-unit hospital of tests/forecast/two_units.py."""

from __future__ import annotations

import shutil
from datetime import timedelta
from pathlib import Path

import numpy as np
import pytest

from app.forecast.hospital import forecast_units, load_units
from app.forecast.models import newest_model
from app.forecast.routing import Routing
from app.forecast.service import forecast, model_for, train_model
from app.ingest import import_file
from app.store import db
from tests.conftest import UTC_ZONE
from tests.forecast.asked import count_asked
from tests.forecast.known_at import numbers_of
from tests.forecast.two_units import (
    CRIT,
    NOW,
    STAY_HEADER,
    WARD,
    hospital_files,
    hospital_rows,
    load_hospital,
)
from tests.reliability.small_unit import csv_bytes

CUT = NOW - timedelta(days=9)


@pytest.fixture(scope="module")
def trained(migrated_template: Path, tmp_path_factory: pytest.TempPathFactory) -> str:
    path = tmp_path_factory.mktemp("two") / "two.db"
    shutil.copy(migrated_template, path)
    url = f"sqlite:///{path}"
    load_hospital(url)
    return url


def test_the_ward_forecast_takes_the_critical_care_patients_passed_on(trained: str) -> None:
    with db.session_scope(trained) as session:
        ward = model_for(session, WARD, NOW)
        crit = model_for(session, CRIT, NOW)
        result = forecast(session, WARD, NOW, UTC_ZONE, paths=500)
        crit_forecast = forecast(session, CRIT, NOW, UTC_ZONE, paths=0)
    # Transfers in are no longer in the ward's emergency stream, and have a fallback stream.
    assert ward.payload["arrivals"]["emergency"]["not_from"] == [CRIT]
    assert CRIT in ward.payload["arrivals"]["transfers_in"]
    routing = Routing.from_payload(crit.payload)
    assert routing is not None and WARD in routing.receiving_units()
    # Older patients step down more often in the invented data (0.75 against 0.35).
    assert routing.overall[WARD] > 0.4
    crit_now = {s["stay_id"] for s in crit_forecast["stays"]}
    for k, day in enumerate(result["days"]):
        c = day["components"]
        assert set(c) == {"current", "emergency", "elective"}
        assert abs(c["current"] + c["emergency"] + c["elective"] - day["mean"]) < 1e-6
        assert set(day["transfers_in"]) == {CRIT}
        assert 0.0 < day["transfers_in"][CRIT] <= c["emergency"] + 1e-9
        assert set(day["moved_in"].get(CRIT, {})) <= crit_now
        # A patient still in critical care cannot also be on the ward: p + q <= 1.
        for stay_id, q in day["moved_in"].get(CRIT, {}).items():
            p = next(s["p_present"][k] for s in crit_forecast["stays"]
                     if s["stay_id"] == stay_id)
            assert p + q <= 1.0 + 1e-9
    # Patients passed on accumulate over the week (the ward starts with none of them).
    passed = [d["transfers_in"][CRIT] for d in result["days"]]
    assert passed[-1] > passed[0]


def test_without_a_model_of_the_sender_its_transfers_come_as_a_stream(trained: str) -> None:
    with db.session_scope(trained) as session:
        early = NOW - timedelta(hours=1)  # before either model was trained: none usable
        assert newest_model(session, CRIT, early) is None
        from app.forecast.service import senders_of
        from app.forecast.transfers import Sender
        from app.state import load_state

        record = model_for(session, WARD, NOW)
        state = load_state(session, WARD, NOW, UTC_ZONE, with_history=False)
        senders = senders_of(session, state, record)
        assert [s.unit for s in senders] == [CRIT] and senders[0].state is not None
        from app.forecast.service import forecast_from_state

        fallback = forecast_from_state(state, record, paths=0, senders=[Sender(CRIT)])
        # A caller without the store (senders not given) gets the same fallback streams.
        assert forecast_from_state(state, record, paths=0)["days"] == fallback["days"]
        assert "transfers_in" not in forecast_from_state(state, record, paths=0,
                                                         senders=[])["days"][0]
        passed = forecast_from_state(state, record, paths=0, senders=senders)
    rate = record.payload["arrivals"]["transfers_in"][CRIT]["rate"]
    assert rate["mean_count"] > 0.3
    for a, b in zip(fallback["days"], passed["days"], strict=True):
        assert 0.0 < a["transfers_in"][CRIT] <= a["components"]["emergency"] + 1e-9
        assert b["transfers_in"][CRIT] <= b["components"]["emergency"] + 1e-9
        assert "moved_in" in b and b["moved_in"].get(CRIT)
    # The stream knows nothing of the patients now in critical care, so the first nights
    # differ; both carry transfers in.
    assert fallback["days"][0]["mean"] != passed["days"][0]["mean"]


def _cut_rows(rows: list[list[object]], scores: list[list[object]]
              ) -> tuple[list[list[object]], list[list[object]]]:
    """What a database filled at CUT would have held (DATA_CONTRACT.md, "as of")."""
    from datetime import datetime

    cut = CUT.replace(tzinfo=None)
    head = {name: i for i, name in enumerate(STAY_HEADER)}
    kept = []
    for row in rows:
        if datetime.fromisoformat(str(row[head["admitted_at"]])) > cut:
            continue
        out = list(row)
        if out[head["discharged_at"]] and datetime.fromisoformat(
                str(out[head["discharged_at"]])) > cut:
            out[head["discharged_at"]] = out[head["outcome"]] = out[head["to_unit"]] = ""
        kept.append(out)
    ids = {r[0] for r in kept}
    return kept, [s for s in scores if s[0] in ids
                  and datetime.fromisoformat(str(s[1])) <= cut]


@pytest.mark.slow
def test_data_known_only_after_the_cut_changes_nothing_in_the_ward_forecast(
        migrated_template: Path, tmp_path: Path) -> None:
    # The leakage test with transfers: the sending unit's later stays, discharges, step-downs
    # and scores are in one database and not in the other; both train at CUT.
    rows, scores = hospital_rows()
    cut_rows, cut_scores = _cut_rows(rows, scores)
    assert len(cut_rows) < len(rows)
    results = []
    for name, (stays, obs) in (("everything", (rows, scores)), ("known", (cut_rows,
                                                                           cut_scores))):
        path = tmp_path / f"{name}.db"
        shutil.copy(migrated_template, path)
        url = f"sqlite:///{path}"
        files = {"units": hospital_files()["units"], "stays": csv_bytes(STAY_HEADER, stays),
                 "observations": csv_bytes(["stay_id", "observed_at", "name", "value"], obs)}
        with db.session_scope(url) as session:
            for kind, data in files.items():
                import_file(session, kind, data, f"{kind}.csv", tz=UTC_ZONE)
        for unit in (CRIT, WARD):
            with db.session_scope(url) as session:
                train_model(session, unit, CUT, UTC_ZONE)
        with db.session_scope(url) as session:
            results.append(forecast(session, WARD, CUT, UTC_ZONE, paths=300, seed=3))
        db.release_engine(url)
    everything, known = results
    assert all(d["transfers_in"][CRIT] > 0 for d in everything["days"])
    a, b = np.array(numbers_of(everything)), np.array(numbers_of(known))
    assert a.shape == b.shape and a.size > 50
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-12)


@pytest.mark.usefixtures("utc_site")
def test_the_model_page_shows_the_routing_table(trained: str) -> None:
    from app.web.app import create_app
    from tests.security.fixtures import make_user, signed_in_client

    make_user(trained, "viewer.routing", "viewer", "a long test password")
    client = signed_in_client(create_app(trained), "viewer.routing", "a long test password")
    page = client.get(f"/units/{CRIT}/model")
    assert page.status_code == 200
    text = page.text
    assert "Where patients went when they left" in text
    with db.session_scope(trained) as session:
        routing = Routing.from_payload(model_for(session, CRIT, NOW).payload)
    assert routing is not None
    # The overall row shows the ward's share of discharges, rounded to whole percent.
    assert f"{100 * routing.overall[WARD]:.0f}%" in text
    assert WARD in text and "all discharges" in text


def test_the_backtest_compares_passing_on_with_a_stream(trained: str) -> None:
    from app.forecast.backtest import run_backtest

    first = (NOW - timedelta(days=12)).date()
    last = first + timedelta(days=2)
    out = {}
    for mode in ("pass-on", "stream"):
        with db.session_scope(trained) as session:
            out[mode] = run_backtest(session, WARD, first, last, UTC_ZONE, days=3,
                                     transfers=mode, baselines=False)
    for mode, result in out.items():
        assert result["transfers"] == mode
        assert list(result["methods"]) == ["morrow"]
        rows = result["methods"]["morrow"]["by_horizon"]
        assert [r["n"] for r in rows] == [3, 3, 3]
        assert all(np.isfinite(r["crps"]) and r["crps"] >= 0 for r in rows)
    # The two ways of taking the transfers in give different forecasts.
    assert out["pass-on"]["methods"]["morrow"]["all"]["crps"] != \
        out["stream"]["methods"]["morrow"]["all"]["crps"]
    with pytest.raises(ValueError, match="transfers"), db.session_scope(trained) as session:
        run_backtest(session, WARD, first, last, UTC_ZONE, transfers="both")


def test_units_forecast_together_ask_each_unit_once_and_agree_with_each_alone(
        trained: str, monkeypatch: pytest.MonkeyPatch) -> None:
    """The hospital's forecasts made together (app/forecast/hospital.py) are each unit's own
    forecast, number for number, while the sending unit's patients are asked of its model
    once instead of once for itself and once more for the ward."""
    asked = count_asked(monkeypatch)
    with db.session_scope(trained) as session:
        together = forecast_units(session, load_units(session, [CRIT, WARD], NOW, UTC_ZONE),
                                  paths=500)
        assert sorted(asked) == [CRIT, WARD]
        alone = {u: forecast(session, u, NOW, UTC_ZONE, paths=500) for u in (CRIT, WARD)}
    assert sorted(asked[2:]) == [CRIT, CRIT, WARD]
    for unit in (CRIT, WARD):
        made = together[unit]
        assert made is not None
        assert made[0] == alone[unit]
    assert together[WARD] is not None and together[WARD][0]["days"][0]["transfers_in"][CRIT] > 0
