"""When an extract's record of stays begins (app/state/extract.py), by hand on small records."""

from __future__ import annotations

import pandas as pd

from app.state.extract import LONGEST_GAP, STEADY_RUN, extract_start_ns

DAY = pd.Timedelta(days=1)
START = pd.Timestamp("2025-03-01 10:00", tz="UTC")


def _stays(discharges: list[pd.Timestamp | None]) -> pd.DataFrame:
    return pd.DataFrame({"discharged_at": pd.Series(discharges, dtype="datetime64[ns, UTC]")})


def _regular(n: int, every: pd.Timedelta = DAY) -> list[pd.Timestamp | None]:
    return [START + k * every for k in range(n)]


def test_the_first_discharge_when_the_record_is_steady_from_it() -> None:
    assert extract_start_ns(_stays(_regular(30)), (START + 40 * DAY).value) == START.value


def test_a_stray_discharge_weeks_before_the_record_is_passed_over() -> None:
    stray = [START - 45 * DAY, START - 44 * DAY]   # even two of them, close together
    stays = _stays([*stray, *_regular(30), None])  # and a stay still in
    assert extract_start_ns(stays, (START + 40 * DAY).value) == START.value


def test_a_sparse_record_falls_back_to_the_first_discharge() -> None:
    # Discharges three weeks apart: no steady run anywhere, so the first one, as before.
    sparse = _regular(STEADY_RUN + 3, every=pd.Timedelta(LONGEST_GAP) + 7 * DAY)
    assert extract_start_ns(_stays(sparse), (START + 400 * DAY).value) == START.value
    # Too few discharges to judge.
    assert extract_start_ns(_stays(_regular(STEADY_RUN)), (START + 40 * DAY).value) \
        == START.value


def test_only_discharges_known_at_the_instant_count_and_a_given_start_wins() -> None:
    stays = _stays([START - 45 * DAY, *_regular(30)])
    # Four days in, the regular record has too few discharges to be judged steady yet.
    assert extract_start_ns(stays, (START + 3 * DAY).value) == (START - 45 * DAY).value
    assert extract_start_ns(stays, (START + 10 * DAY).value) == START.value
    assert extract_start_ns(stays, (START - 50 * DAY).value) is None
    assert extract_start_ns(_stays([None]), START.value) is None
    assert extract_start_ns(stays, START.value, given=123) == 123
