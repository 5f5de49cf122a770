"""The demo hospital generator: determinism, data-contract validity, realism.

Validity checks follow the project's DATA_CONTRACT.md (the column lists below
are copied from it, not imported from the generator). The realism checks are sanity
properties of the invented scenario measured on the committed ``demo_data``; unless a
comment names a source they are common practice, no source.
"""

from __future__ import annotations

import re
from datetime import UTC, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from app.demo.generate import END, START, generate

DEMO = Path(__file__).resolve().parents[2] / "demo_data"
FILES = ["units.csv", "stays.csv", "census.csv", "observations.csv", "bookings.csv"]

# Column lists as written in DATA_CONTRACT.md.
CONTRACT_COLUMNS = {
    "units.csv": {"unit", "beds", "valid_from", "census_time"},
    "stays.csv": {
        "stay_id", "unit", "admitted_at", "discharged_at", "admission_type", "outcome",
        "age", "sex", "specialty", "source", "booking_id", "patient", "from_unit", "to_unit",
    },
    "census.csv": {
        "taken_at", "unit", "bed", "stay_id", "admitted_at", "admission_type",
        "age", "sex", "specialty", "source", "booking_id",
    },
    "observations.csv": {"stay_id", "observed_at", "name", "value", "recorded_at"},
    "bookings.csv": {
        "booking_id", "unit", "booked_at", "planned_date", "age", "sex", "specialty",
        "source", "procedure", "cancelled_at",
    },
}
TIMESTAMP_COLUMNS = {
    "stays.csv": ["admitted_at", "discharged_at"],
    "census.csv": ["taken_at", "admitted_at"],
    "observations.csv": ["observed_at", "recorded_at"],
    "bookings.csv": ["booked_at", "cancelled_at"],
}
# Published score ranges, as the contract states them: SOFA 0..24, NEWS2 0..20.
SCORE_RANGE = {"sofa": (0, 24), "news2": (0, 20)}
CRIT, WARD = "KV-CRIT", "KV-SURG"
SCORE_OF = {CRIT: "sofa", WARD: "news2"}
STAMP = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:00$")
ANCHOR = pd.Timestamp(END)


def _read(directory: Path, name: str) -> pd.DataFrame:
    frame = pd.read_csv(directory / name, dtype=str, keep_default_na=False)
    for column in TIMESTAMP_COLUMNS.get(name, []):
        frame[column] = pd.to_datetime(
            frame[column].where(frame[column] != ""), format="%Y-%m-%dT%H:%M:%S"
        )
    return frame


@pytest.fixture(scope="module")
def demo() -> dict[str, pd.DataFrame]:
    return {name: _read(DEMO, name) for name in FILES}


@pytest.fixture(scope="module")
def stays(demo: dict[str, pd.DataFrame]) -> pd.DataFrame:
    frame = demo["stays.csv"].copy()
    frame["age"] = frame["age"].astype(int)
    frame["los_days"] = (frame.discharged_at - frame.admitted_at).dt.total_seconds() / 86400
    return frame


def _beds(units: pd.DataFrame, unit: str, at: pd.DatetimeIndex) -> np.ndarray:
    """Staffed beds at each instant: a count holds from its valid_from census instant on."""
    beds = np.zeros(len(at), dtype=int)
    for _, row in units[units.unit == unit].sort_values("valid_from").iterrows():
        since = (
            pd.Timestamp(f"{row.valid_from}T{row.census_time}")
            if row.valid_from
            else pd.Timestamp.min
        )
        beds = np.where(at >= since, int(row.beds), beds)
    return beds


def _occupancy(stays: pd.DataFrame, unit: str, at: pd.DatetimeIndex) -> np.ndarray:
    """Stays in the unit at each instant, by the contract's rule admitted <= t < discharged."""
    rows = stays[stays.unit == unit]
    admitted = np.sort(rows.admitted_at.to_numpy())
    discharged = np.sort(rows.discharged_at.fillna(pd.Timestamp.max).to_numpy())
    return np.searchsorted(admitted, at.to_numpy(), side="right") - np.searchsorted(
        discharged, at.to_numpy(), side="right"
    )


# ---------------------------------------------------------------- determinism


def test_same_seed_gives_byte_identical_files(tmp_path: Path) -> None:
    # A two-month history keeps this quick; the mechanism is the same as the full run.
    start = END - timedelta(days=60)
    first = generate(tmp_path / "a", seed=7, start=start)
    second = generate(tmp_path / "b", seed=7, start=start)
    assert first == second
    assert first["stays.csv"] > 50
    for name in FILES:
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()
        lines = (tmp_path / "a" / name).read_text(encoding="utf-8").count("\n")
        assert lines == first[name] + 1  # header + the reported rows


def test_another_seed_gives_another_hospital_day(tmp_path: Path) -> None:
    start = END - timedelta(days=30)
    generate(tmp_path / "a", seed=1, start=start)
    generate(tmp_path / "b", seed=2, start=start)
    first, second = (tmp_path / run / "stays.csv" for run in ("a", "b"))
    assert first.read_bytes() != second.read_bytes()


def test_generate_rejects_aware_or_reversed_times(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="naive"):
        generate(tmp_path, end=datetime(2026, 1, 1, tzinfo=ZoneInfo("UTC")))
    with pytest.raises(ValueError, match="before end"):
        generate(tmp_path, start=END, end=END - timedelta(days=1))


@pytest.mark.slow
def test_committed_demo_data_is_what_the_generator_writes(tmp_path: Path) -> None:
    generate(tmp_path)
    for name in FILES:
        assert (tmp_path / name).read_bytes() == (DEMO / name).read_bytes(), (
            f"{name} is stale: run `make demo-data`"
        )


def test_demo_data_is_small() -> None:
    total = sum((DEMO / name).stat().st_size for name in FILES)
    assert total < 5_000_000


# ---------------------------------------------------------------- contract validity


def test_columns_are_the_contracts(demo: dict[str, pd.DataFrame]) -> None:
    for name, frame in demo.items():
        assert set(frame.columns) == CONTRACT_COLUMNS[name], name


def test_timestamps_are_whole_minutes_and_known_at_the_anchor() -> None:
    for name, columns in TIMESTAMP_COLUMNS.items():
        raw = pd.read_csv(DEMO / name, dtype=str, keep_default_na=False)
        for column in columns:
            values = raw[column][raw[column] != ""]
            assert values.str.match(STAMP).all(), (name, column)
            assert (pd.to_datetime(values) <= ANCHOR).all(), (name, column)


@pytest.mark.parametrize(
    "zone", ["Europe/London", "Europe/Berlin", "America/New_York", "Australia/Sydney"]
)
def test_no_local_time_falls_in_a_daylight_saving_gap(
    demo: dict[str, pd.DataFrame], zone: str
) -> None:
    # Reference: the IANA tz database through zoneinfo. A wall-clock time that does
    # not exist changes when sent to UTC and back.
    tz = ZoneInfo(zone)
    seen: set[datetime] = set()
    for name, columns in TIMESTAMP_COLUMNS.items():
        for column in columns:
            seen.update(t.to_pydatetime() for t in demo[name][column].dropna())
    skipped = [
        t for t in seen
        if t.replace(tzinfo=tz).astimezone(UTC).astimezone(tz).replace(tzinfo=None) != t
    ]
    assert skipped == []
    assert len(seen) > 10_000


def test_units_have_a_bed_history_and_census_times(demo: dict[str, pd.DataFrame]) -> None:
    units = demo["units.csv"]
    crit = units[units.unit == CRIT].sort_values("valid_from")
    assert crit.beds.astype(int).tolist() == [14, 16]
    assert (crit.valid_from != "").all()
    assert set(crit.census_time) == {"00:00"}
    ward = units[units.unit == WARD]
    assert ward.beds.astype(int).tolist() == [28]
    assert ward.census_time.tolist() == ["23:00"]


def test_stays_follow_the_contract(stays: pd.DataFrame) -> None:
    assert stays.stay_id.is_unique
    assert stays.stay_id.str.match(r"^S-[0-9a-f]{7}$").all()
    assert set(stays.unit) == {CRIT, WARD}
    done = stays.discharged_at.notna()
    assert (stays.admitted_at[done] <= stays.discharged_at[done]).all()
    # Blank discharge and blank outcome go together: the patient is still in the unit.
    assert ((stays.outcome == "") == ~done).all()
    assert set(stays.outcome[done]) == {"home", "ward", "transfer", "died"}
    assert set(stays.admission_type) == {"emergency", "elective"}
    assert set(stays.sex) <= {"f", "m", "x"}
    assert {"f", "m", "x"} <= set(stays.sex)
    assert stays.age.between(18, 95).all()
    assert set(stays.source) <= {
        "emergency-dept", "theatre", "ward", "other-hospital", "home", "critical-care",
    }
    # Every stay in the history overlaps the history window, or is the critical-care stay
    # that a ward stay in it continues (a patient's spell is kept whole).
    before = stays[stays.discharged_at.fillna(ANCHOR) <= pd.Timestamp(START)]
    after = stays[stays.from_unit != ""]
    joined = before.merge(after, left_on=["patient", "discharged_at", "to_unit"],
                          right_on=["patient", "admitted_at", "unit"], how="left")
    assert len(before) < 20 and joined.stay_id_y.notna().all()
    for unit in (CRIT, WARD):
        assert (~done & (stays.unit == unit)).sum() >= 5  # a current census at the anchor


def test_outcome_shares_are_plausible(stays: pd.DataFrame) -> None:
    shares = {
        unit: stays[(stays.unit == unit) & (stays.outcome != "")].outcome.value_counts(
            normalize=True
        )
        for unit in (CRIT, WARD)
    }
    assert shares[CRIT].idxmax() == "ward"
    assert 0.03 < shares[CRIT]["died"] < 0.20
    assert shares[WARD].idxmax() == "home"
    assert shares[WARD]["died"] < shares[CRIT]["died"]


def test_bookings_follow_the_contract(demo: dict[str, pd.DataFrame]) -> None:
    bookings = demo["bookings.csv"]
    assert bookings.booking_id.is_unique
    assert bookings.booking_id.str.match(r"^B-[0-9a-f]{7}$").all()
    cancelled = bookings.cancelled_at.notna()
    assert (bookings.cancelled_at[cancelled] >= bookings.booked_at[cancelled]).all()
    planned = pd.to_datetime(bookings.planned_date, format="%Y-%m-%d")
    assert (planned.dt.weekday < 5).all()  # operating lists run Monday to Friday
    lead = (planned - bookings.booked_at.dt.normalize()).dt.days
    assert lead.between(1, 28).all()
    # Cancellations come before the planned day is over, some on the day itself.
    assert (bookings.cancelled_at[cancelled] < planned[cancelled] + pd.Timedelta(days=1)).all()
    assert (bookings.cancelled_at[cancelled].dt.normalize() == planned[cancelled]).sum() > 20
    future = planned > ANCHOR.normalize()
    assert future.sum() >= 20
    assert (future & cancelled).sum() >= 1
    assert planned.max() <= ANCHOR.normalize() + pd.Timedelta(days=21)


def test_elective_stays_come_from_their_bookings(
    demo: dict[str, pd.DataFrame], stays: pd.DataFrame
) -> None:
    bookings = demo["bookings.csv"].set_index("booking_id")
    elective = stays[stays.admission_type == "elective"]
    assert (stays[stays.admission_type == "emergency"].booking_id == "").all()
    assert (elective.booking_id != "").all()
    assert elective.booking_id.is_unique
    assert elective.booking_id.isin(bookings.index).all()
    matched = bookings.loc[elective.booking_id]
    assert (matched.unit.to_numpy() == elective.unit.to_numpy()).all()
    assert (matched.planned_date.to_numpy() == elective.admitted_at.dt.strftime("%Y-%m-%d")).all()
    assert matched.cancelled_at.isna().all()
    for column in ("age", "sex", "specialty", "source"):
        assert (matched[column].astype(str).to_numpy() == elective[column].astype(str)).all()
    # Critical care takes booked patients after afternoon theatre, the ward in the morning.
    hours = elective.admitted_at.dt.hour
    assert hours[elective.unit == CRIT].between(13, 18).all()
    assert hours[elective.unit == WARD].between(7, 10).all()
    # Every past booking that was not cancelled became a stay.
    planned = pd.to_datetime(bookings.planned_date)
    past = bookings[(planned < ANCHOR.normalize()) & bookings.cancelled_at.isna()]
    assert past.index.isin(elective.booking_id).all()


def test_observations_follow_the_contract(
    demo: dict[str, pd.DataFrame], stays: pd.DataFrame
) -> None:
    obs = demo["observations.csv"].merge(
        stays[["stay_id", "unit", "admitted_at", "discharged_at", "outcome"]],
        on="stay_id", how="left", validate="many_to_one",
    )
    assert obs.unit.notna().all()  # only for stays that exist
    assert (obs.observed_at >= obs.admitted_at).all()
    assert (obs.observed_at <= obs.discharged_at.fillna(ANCHOR)).all()
    assert (obs.recorded_at >= obs.observed_at).all()
    value = obs.value.astype(float)
    assert (value == value.round()).all()
    for name, (low, high) in SCORE_RANGE.items():
        rows = obs.name == name
        assert rows.sum() > 1000
        assert value[rows].between(low, high).all()
    assert set(obs.name[obs.unit == CRIT]) == {"sofa", "fit_for_discharge"}
    assert set(obs.name[obs.unit == WARD]) == {"news2", "fit_for_discharge"}
    flags = obs.name == "fit_for_discharge"
    assert set(value[flags]) == {0.0, 1.0}
    assert not ((value == 1) & flags & (obs.outcome == "died")).any()
    key = ["stay_id", "observed_at", "name"]
    assert not obs.duplicated(key + ["recorded_at"]).any()
    # Append-only corrections: same stay, time and name, later recorded_at, new value.
    repeated = obs[obs.duplicated(key, keep=False)].sort_values(key + ["recorded_at"])
    assert repeated.groupby(key).ngroups >= 20
    for _, group in repeated.groupby(key):
        assert group.recorded_at.is_monotonic_increasing
        assert group.value.nunique() == len(group)


def test_scores_are_taken_once_a_morning(demo: dict[str, pd.DataFrame]) -> None:
    obs = demo["observations.csv"]
    scores = obs[obs.name.isin(list(SCORE_RANGE))].drop_duplicates(
        ["stay_id", "observed_at", "name"]
    )
    # Besides the admission score, one a day between 06:00 and 08:00.
    later = scores.sort_values("observed_at").groupby("stay_id").tail(-1)
    assert later.observed_at.dt.hour.between(6, 8).all()
    per_day = later.assign(day=later.observed_at.dt.date)
    assert not per_day.duplicated(["stay_id", "name", "day"]).any()
    assert len(later) > 20_000


def test_census_agrees_with_stays(demo: dict[str, pd.DataFrame], stays: pd.DataFrame) -> None:
    census = demo["census.csv"]
    units = demo["units.csv"]
    by_id = stays.set_index("stay_id")
    for unit, prefix, clock in ((CRIT, "C", "00:00"), (WARD, "W", "23:00")):
        rows = census[census.unit == unit]
        instants = sorted(rows.taken_at.unique())
        assert len(instants) == 57  # 56 daily census instants and the anchor itself
        assert pd.Timestamp(instants[-1]) == ANCHOR
        assert all(pd.Timestamp(t).strftime("%H:%M") == clock for t in instants[:-1])
        for taken_at, snap in rows.groupby("taken_at"):
            assert snap.stay_id.is_unique and snap.bed.is_unique
            assert snap.bed.str.match(rf"^{prefix}(\d\d|X1)$").all()
            present = stays[
                (stays.unit == unit)
                & (stays.admitted_at <= taken_at)
                & (stays.discharged_at.fillna(pd.Timestamp.max) > taken_at)
            ]
            assert set(snap.stay_id) == set(present.stay_id)
            beds = _beds(units, unit, pd.DatetimeIndex([taken_at]))[0]
            assert len(snap) <= beds + 1
        joined = by_id.loc[rows.stay_id]
        assert (joined.admitted_at.to_numpy() == rows.admitted_at.to_numpy()).all()
        for column in ("admission_type", "age", "sex", "specialty", "source", "booking_id"):
            assert (joined[column].astype(str).to_numpy() == rows[column].to_numpy()).all()
        # A stay keeps its bed.
        assert (rows.groupby("stay_id").bed.nunique() == 1).all()


def test_occupancy_never_exceeds_beds_plus_one(
    demo: dict[str, pd.DataFrame], stays: pd.DataFrame
) -> None:
    # Check at every admission instant, where occupancy is highest.
    for unit in (CRIT, WARD):
        at = pd.DatetimeIndex(stays[stays.unit == unit].admitted_at)
        occupancy = _occupancy(stays, unit, at)
        assert (occupancy <= _beds(demo["units.csv"], unit, at) + 1).all()


# ---------------------------------------------------------------- realism
# Common practice, no source, unless a comment says otherwise.


@pytest.fixture(scope="module")
def history_days() -> pd.DatetimeIndex:
    return pd.date_range(pd.Timestamp(START), ANCHOR.normalize() - pd.Timedelta(days=1))


@pytest.mark.parametrize("unit", [CRIT, WARD])
def test_fewer_discharges_per_day_at_weekends(
    stays: pd.DataFrame, history_days: pd.DatetimeIndex, unit: str
) -> None:
    # Common practice, no source: units discharge noticeably less on Saturdays and Sundays.
    day = stays[stays.unit == unit].discharged_at.dropna().dt.normalize()
    per_day = day.value_counts().reindex(history_days, fill_value=0)
    weekend = per_day.index.weekday >= 5
    assert per_day[weekend].mean() < 0.8 * per_day[~weekend].mean()


@pytest.mark.parametrize("unit", [CRIT, WARD])
def test_discharges_happen_mostly_in_the_daytime(stays: pd.DataFrame, unit: str) -> None:
    # Common practice, no source: most discharges fall between 10:00 and 19:00.
    hour = stays[(stays.unit == unit) & (stays.outcome != "died")].discharged_at.dropna().dt.hour
    assert hour.between(10, 18).mean() > 0.6


@pytest.mark.parametrize("unit", [CRIT, WARD])
def test_emergency_admissions_vary_by_weekday(
    stays: pd.DataFrame, history_days: pd.DatetimeIndex, unit: str
) -> None:
    # scipy.stats.chisquare against equal counts on each weekday; the history spans
    # whole weeks, so a flat weekly pattern would give near-equal counts.
    rows = stays[
        (stays.unit == unit)
        & (stays.admission_type == "emergency")
        & stays.admitted_at.dt.normalize().isin(history_days)
    ]
    whole_weeks = history_days[: len(history_days) // 7 * 7]
    counts = (
        rows[rows.admitted_at.dt.normalize().isin(whole_weeks)]
        .admitted_at.dt.weekday.value_counts()
        .reindex(range(7), fill_value=0)
    )
    assert stats.chisquare(counts.to_numpy()).pvalue < 0.01
    assert counts[[0, 1]].mean() > counts[[5, 6]].mean()


@pytest.mark.parametrize("unit", [CRIT, WARD])
def test_cancellation_share(demo: dict[str, pd.DataFrame], unit: str) -> None:
    bookings = demo["bookings.csv"]
    planned = pd.to_datetime(bookings.planned_date)
    past = bookings[(bookings.unit == unit) & (planned < ANCHOR.normalize())]
    assert 0.05 <= past.cancelled_at.notna().mean() <= 0.25


def test_critical_care_stays_have_a_long_right_tail(stays: pd.DataFrame) -> None:
    los = stays[stays.unit == CRIT].los_days.dropna()
    assert los.quantile(0.95) > 3 * los.median()


@pytest.mark.parametrize("unit", [CRIT, WARD])
def test_sicker_on_admission_stays_longer(
    demo: dict[str, pd.DataFrame], stays: pd.DataFrame, unit: str
) -> None:
    # scipy.stats.spearmanr between the first recorded score and the length of stay.
    obs = demo["observations.csv"]
    scores = obs[obs.name == SCORE_OF[unit]].sort_values(["observed_at", "recorded_at"])
    first = scores.groupby("stay_id").value.first().astype(int).rename("score")
    done = stays[(stays.unit == unit) & stays.los_days.notna()].join(first, on="stay_id")
    done = done.dropna(subset=["score"])
    assert len(done) > 1000
    result = stats.spearmanr(done.score, done.los_days)
    assert result.statistic > 0.1
    assert result.pvalue < 1e-6


@pytest.mark.parametrize("unit", [CRIT, WARD])
def test_mean_occupancy_is_high_but_below_capacity(
    demo: dict[str, pd.DataFrame], stays: pd.DataFrame, unit: str
) -> None:
    at = pd.date_range(pd.Timestamp(START), ANCHOR, freq="h")
    share = _occupancy(stays, unit, at) / _beds(demo["units.csv"], unit, at)
    assert 0.70 <= share.mean() <= 1.00
