"""The stress generator makes what its docstring says: checked on the files it writes."""

from __future__ import annotations

import csv
from datetime import datetime, time
from pathlib import Path

import pytest

from tests.stress.generator import SCORE_NAME, SMALL_UNITS, UNITS, generate, history_start


def read(path: Path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


@pytest.fixture(scope="module")
def everything(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return generate(tmp_path_factory.mktemp("stress") / "all")


def test_seeded_and_a_subset_is_the_same_data(everything: Path, tmp_path: Path) -> None:
    small = generate(tmp_path / "small", SMALL_UNITS)
    for kind in ("units", "stays", "bookings"):
        full = [r for r in read(everything / f"{kind}.csv") if r["unit"] in SMALL_UNITS]
        assert read(small / f"{kind}.csv") == full, kind
    again = generate(tmp_path / "again", SMALL_UNITS)
    for kind in ("units", "stays", "observations", "bookings"):
        assert (again / f"{kind}.csv").read_bytes() == (small / f"{kind}.csv").read_bytes()


def test_every_mechanism_is_in_the_files(everything: Path) -> None:
    units = read(everything / "units.csv")
    stays = read(everything / "stays.csv")
    bookings = read(everything / "bookings.csv")
    scored = {r["stay_id"].rsplit("-", 1)[0] for r in read(everything / "observations.csv")
              if r["name"] == SCORE_NAME}
    assert len({u["unit"] for u in units}) >= 6
    assert {u.years for u in UNITS} == {1.0, 1.5, 2.0}
    assert any(u["valid_from"] for u in units), "a bed-count change"
    assert scored == {u.code for u in UNITS if u.score} and len(scored) < len(UNITS)
    assert any(b["cancelled_at"] for b in bookings)
    electives = [s for s in stays if s["admission_type"] == "elective"]
    assert any(s["booking_id"] for s in electives) and any(not s["booking_id"] for s in electives)
    for unit in UNITS:
        start = datetime.combine(history_start(unit), time())
        mine = [s for s in stays if s["unit"] == unit.code]
        before = [s for s in mine if datetime.fromisoformat(s["admitted_at"]) < start]
        assert before, f"{unit.code}: an extract that starts mid-stay"
        # Admitted before the extract: written only when still in the unit at its start.
        assert all(not s["discharged_at"] or datetime.fromisoformat(s["discharged_at"]) > start
                   for s in before), unit.code


def test_discharges_follow_the_ward_rounds_plus_a_late_record(everything: Path) -> None:
    # Rounds end by 17:00 and records are up to 6 h late, so the written clock lies in
    # 10:00..23:00 (deaths, at any hour, aside); the one round on Saturday is at 11:00 and on
    # Sunday at 14:00, so nothing is written earlier on those days.
    ended = [datetime.fromisoformat(s["discharged_at"]) for s in read(everything / "stays.csv")
             if s["discharged_at"] and s["outcome"] != "died"]
    earliest = {5: time(11), 6: time(14)}
    assert all(earliest.get(t.weekday(), time(10)) <= t.time() <= time(23) for t in ended)
    assert {t.weekday() for t in ended} == set(range(7))
