"""The "as of" state of a unit as plain pandas frames (no database here).

Every timestamp column is ``datetime64[ns, UTC]``. The rules (DATA_CONTRACT.md, "as of"):

- a stay is in the unit at ``t`` when ``admitted_at <= t`` and it has no ``discharged_at``
  or ``discharged_at > t``; a discharge after ``as_of`` is unknown, so it is NaT here;
- observations count only with ``observed_at <= as_of`` and ``recorded_at <= as_of``; each
  (stay, observed_at, name) takes its latest value recorded by the instant asked about;
  entries with the same ``recorded_at`` count in the order of the frame's rows, which
  ``load_state`` gives in the order they were entered (a correction within the clock's
  resolution supersedes the value before it);
- covariates of a stay are known from admission;
- bookings count with ``booked_at <= as_of``; a cancellation after ``as_of`` is unknown.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from datetime import date, datetime, time
from typing import Any, NamedTuple
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

STAY_COLUMNS = ["stay_id", "admitted_at", "discharged_at", "admission_type", "outcome", "age",
                "sex", "specialty", "source", "booking_id", "patient", "from_unit", "to_unit"]
OBSERVATION_COLUMNS = ["stay_id", "observed_at", "name", "value", "recorded_at"]
BOOKING_COLUMNS = ["booking_id", "booked_at", "planned_date", "age", "sex", "specialty", "source",
                   "procedure", "cancelled_at"]
SNAPSHOT_COLUMNS = ["taken_at", "occupancy"]


@dataclass(frozen=True, eq=False)
class UnitState:
    """Everything known about one unit at ``as_of``.

    Attributes
    ----------
    unit : str
    as_of : pandas.Timestamp
        Aware, UTC.
    tz : ZoneInfo
        The site's time zone; census instants are wall-clock times in it.
    census_time : datetime.time
        The unit's daily census instant (local wall-clock).
    bed_plan : tuple of (date or None, int)
        Staffed beds from each ``valid_from`` on (None: always), oldest first. Bed plans are
        known before they take effect, so the whole plan is here.
    stays : DataFrame
        Stays admitted by ``as_of`` (``STAY_COLUMNS``), discharges after ``as_of`` blanked.
    observations : DataFrame
        Observation rows known at ``as_of`` (``OBSERVATION_COLUMNS``), corrections included.
    bookings : DataFrame
        Bookings made by ``as_of`` (``BOOKING_COLUMNS``), later cancellations blanked.
    snapshots : DataFrame
        Census snapshots taken by ``as_of`` with their occupancy (``SNAPSHOT_COLUMNS``).
    memo : dict
        Answers computed from this state and kept with it (app/forecast/stay_grid.py); not
        copied by ``dataclasses.replace``, so a state with other frames starts empty.
    """

    unit: str
    as_of: pd.Timestamp
    tz: ZoneInfo
    census_time: time
    bed_plan: tuple[tuple[date | None, int], ...]
    stays: pd.DataFrame
    observations: pd.DataFrame
    bookings: pd.DataFrame
    snapshots: pd.DataFrame
    memo: dict[Any, Any] = field(default_factory=dict, init=False, repr=False)

    def known_at(self, at: datetime | pd.Timestamp) -> UnitState:
        """What this state knew at an earlier instant: the "as of" rule applied to its frames
        (the same rule ``load_state`` applies in SQL; backtests replay many mornings this way)."""
        moment = pd.Timestamp(at)
        moment = moment.tz_localize("UTC") if moment.tzinfo is None else moment.tz_convert("UTC")
        if moment > self.as_of:
            raise ValueError(f"at: {moment} is after the state's as_of {self.as_of}")
        stays = self.stays.loc[self.stays["admitted_at"] <= moment].copy()
        later = stays["discharged_at"].notna() & (stays["discharged_at"] > moment)
        stays.loc[later, "discharged_at"] = pd.NaT
        stays.loc[later, "outcome"] = None
        if "to_unit" in stays:
            stays.loc[later, "to_unit"] = None
        obs = self.observations
        obs = obs.loc[(obs["observed_at"] <= moment) & (obs["recorded_at"] <= moment)
                      & obs["stay_id"].isin(stays["stay_id"])]
        bookings = self.bookings.loc[self.bookings["booked_at"] <= moment].copy()
        cancelled_later = bookings["cancelled_at"].notna() & (bookings["cancelled_at"] > moment)
        bookings.loc[cancelled_later, "cancelled_at"] = pd.NaT
        snapshots = self.snapshots.loc[self.snapshots["taken_at"] <= moment]
        return replace(self, as_of=moment, stays=stays.reset_index(drop=True),
                       observations=obs.reset_index(drop=True),
                       bookings=bookings.reset_index(drop=True),
                       snapshots=snapshots.reset_index(drop=True))

    def beds_on(self, day: date) -> int | None:
        """Staffed beds on a local day (from that day's census instant on)."""
        beds = None
        for valid_from, count in self.bed_plan:
            if valid_from is None or valid_from <= day:
                beds = count
        return beds

    def present_mask(self, instant: pd.Timestamp) -> np.ndarray:
        """Which rows of ``stays`` are in the unit at ``instant`` (must not be after as_of)."""
        if instant > self.as_of:
            raise ValueError(f"instant {instant} is after as_of {self.as_of}: unknown then")
        at = instant.value
        admitted = utc_ns(self.stays["admitted_at"]) <= at
        discharged = self.stays["discharged_at"]
        still_in = discharged.isna().to_numpy() | (utc_ns(discharged) > at)
        return admitted & still_in

    def occupancy_at(self, instant: pd.Timestamp) -> int:
        """Stays in the unit at a past instant (the census count it implies)."""
        return int(self.present_mask(instant).sum())

    def history(self) -> pd.DataFrame:
        """Stays with their length of stay in days so far, censored at ``as_of``.

        Adds ``end`` (discharge, or as_of while in the unit), ``event`` (True when discharged)
        and ``los_days``.
        """
        frame = self.stays.copy()
        frame["event"] = frame["discharged_at"].notna()
        frame["end"] = frame["discharged_at"].where(frame["event"], self.as_of)
        frame["los_days"] = (frame["end"] - frame["admitted_at"]).dt.total_seconds() / 86400.0
        return frame

    def current_stays(self) -> pd.DataFrame:
        """Stays in the unit at ``as_of``, with days in and their latest observations.

        For each observation name ``n`` the columns ``n`` (latest value), ``n_change``
        (change since the previous observation, NaN when there is none) and ``n_hours``
        (hours since it was observed) are added.
        """
        rows = np.flatnonzero(self.present_mask(self.as_of))
        columns = {name: self.stays[name].array.take(rows) for name in self.stays.columns}
        columns["days_in"] = (self.as_of.value - utc_ns(columns["admitted_at"])) / 8.64e13
        latest = _latest(self.observations, self.as_of, stay_ids=columns["stay_id"])
        columns.update(_widened(columns["stay_id"], latest, self.as_of))
        return pd.DataFrame(columns)

    def open_bookings(self) -> pd.DataFrame:
        """Bookings not cancelled by as_of, not yet admitted, planned for today or later
        (made once per state and kept in ``memo``: not to be changed in place)."""
        found = self.memo.get("open_bookings")
        if found is None:
            found = self.memo["open_bookings"] = self._open_bookings()
        return found

    def _open_bookings(self) -> pd.DataFrame:
        b = self.bookings
        if b.empty:
            return b
        today = self.as_of.tz_convert(self.tz).date()
        admitted = set(self.stays["booking_id"].dropna())
        keep = (b["cancelled_at"].isna().to_numpy()
                & (b["planned_date"].to_numpy() >= today)
                & ~b["booking_id"].isin(admitted).to_numpy())
        return b.take(np.flatnonzero(keep)).reset_index(drop=True)


# Nanoseconds in a day, the unit of :func:`utc_ns` instants.
NS_PER_DAY = 86_400 * 10**9


def utc_ns(values: Any) -> np.ndarray:
    """UTC instants as int64 nanoseconds (NaT: the least int64; naive times read as UTC). A
    column of the state's frames is datetime64 already and is read as it is; other values
    (lists of datetimes, an empty or hand-built column of objects) go through
    ``pandas.to_datetime``."""
    dtype = getattr(values, "dtype", None)
    if dtype is not None and (isinstance(dtype, pd.DatetimeTZDtype) or dtype.kind == "M"):
        return np.asarray(pd.DatetimeIndex(values).asi8, dtype=np.int64)
    return np.asarray(pd.DatetimeIndex(pd.to_datetime(values, utc=True)).asi8, dtype=np.int64)


class _Latest(NamedTuple):
    """Per (stay, name), ordered by stay and name: the latest value known and its time (UTC
    ns), and the value before it (NaN: none)."""

    stay_id: np.ndarray
    name: np.ndarray
    observed_ns: np.ndarray
    value: np.ndarray
    previous: np.ndarray


def latest_observations(observations: pd.DataFrame, at: pd.Timestamp,
                        stay_ids: Any = None) -> pd.DataFrame:
    """Per (stay, name): the latest value known at ``at``, its time, and the previous value.

    Only rows with ``observed_at <= at`` and ``recorded_at <= at`` count, and each
    (stay, observed_at, name) takes the value recorded last by ``at`` (corrections).
    Returns columns stay_id, name, observed_at, value, previous, ordered by stay and name.
    A page recomputes this after every score, so it works on plain arrays.
    """
    found = _latest(observations, at, stay_ids)
    if found is None:
        return pd.DataFrame({"stay_id": pd.Series(dtype=object), "name": pd.Series(dtype=object),
                             "observed_at": pd.Series(dtype="datetime64[ns, UTC]"),
                             "value": pd.Series(dtype=float), "previous": pd.Series(dtype=float)})
    return pd.DataFrame({
        "stay_id": found.stay_id, "name": found.name,
        "observed_at": pd.to_datetime(found.observed_ns, utc=True),
        "value": found.value, "previous": found.previous})


def _latest(observations: pd.DataFrame, at: pd.Timestamp, stay_ids: Any = None
            ) -> _Latest | None:
    """:func:`latest_observations` as arrays (None: nothing known)."""
    obs = observations
    at_ns = pd.Timestamp(at).value
    observed_all, recorded_all = utc_ns(obs["observed_at"]), utc_ns(obs["recorded_at"])
    keep = (observed_all <= at_ns) & (recorded_all <= at_ns)
    if stay_ids is not None:
        keep &= obs["stay_id"].isin(stay_ids).to_numpy()
    if not keep.any():
        return None
    stay, stays = pd.factorize(obs["stay_id"].to_numpy()[keep], sort=True)
    name, names = pd.factorize(obs["name"].to_numpy()[keep], sort=True)
    observed = observed_all[keep]
    recorded = recorded_all[keep]
    value = obs["value"].to_numpy(dtype=float)[keep]
    order = np.lexsort((recorded, observed, name, stay))  # stable, like a mergesort
    stay, name, observed, value = stay[order], name[order], observed[order], value[order]
    # The last recorded row of each (stay, name, observed_at): corrections replace values.
    same_series = np.r_[(stay[1:] == stay[:-1]) & (name[1:] == name[:-1]), False]
    last_of_instant = ~(same_series & np.r_[observed[1:] == observed[:-1], False])
    stay, name = stay[last_of_instant], name[last_of_instant]
    observed, value = observed[last_of_instant], value[last_of_instant]
    continues = np.r_[False, (stay[1:] == stay[:-1]) & (name[1:] == name[:-1])]
    previous = np.where(continues, np.r_[np.nan, value[:-1]], np.nan)
    last = np.r_[~continues[1:], True]
    return _Latest(np.asarray(stays)[stay[last]], np.asarray(names)[name[last]],
                   observed[last], value[last], previous[last])


def _widened(stay_ids: Any, latest: _Latest | None, at: pd.Timestamp
             ) -> dict[str, np.ndarray]:
    """One column triple per observation name (value, change, hours), aligned to
    ``stay_ids``."""
    if latest is None:
        return {}
    row = pd.Index(stay_ids).get_indexer(latest.stay_id)
    hours = (at.value - latest.observed_ns) / 3.6e12
    change = latest.value - latest.previous
    names = latest.name
    columns: dict[str, np.ndarray] = {}
    for name in sorted(set(names)):
        found = (names == name) & (row >= 0)
        for suffix, source in (("", latest.value), ("_change", change), ("_hours", hours)):
            column = np.full(len(stay_ids), np.nan)
            column[row[found]] = source[found]
            columns[f"{name}{suffix}"] = column
    return columns
