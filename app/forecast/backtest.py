"""Backtests: forecast each past morning from what was known then, score it against the
census that followed, beside the baselines a bed manager might use instead.

Models are retrained every ``retrain_days`` on what was known at that morning (held in
memory, never stored), so no forecast sees data from after its ``as_of``. Outcomes are the
occupancy at each census instant, counted from the stays as finally known.

Baselines (METHODS.md section 5), each a full distribution so that proper scores compare:

- ``yesterday``: the last census before as_of, plus the spread of k-step census changes
  over the previous half year (persistence with its empirical error);
- ``same_weekday``: the census at the same weekday and time over the last eight weeks,
  as an empirical distribution;
- ``mean_stay``: each current patient leaves at their admission group's mean remaining stay
  (given the time already spent); arrivals, bookings and the unit's ceiling as in Morrow's
  forecast;
- ``one_distribution``: one Kaplan-Meier stay distribution for everyone, current patients by
  their time spent, and Poisson arrivals at the past year's mean daily rate;
- ``time_series``: a seasonal ARIMA (statsmodels SARIMAX, weekly season) of the daily census,
  its normal predictive distribution rounded to whole beds.
"""

from __future__ import annotations

import math
import sys
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, time, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
from scipy import stats
from sqlalchemy.orm import Session

from app.forecast.arrivals import train_arrivals
from app.forecast.hospital_demand import hospital_season_at
from app.forecast.los import LosModel, train_los
from app.forecast.routing import fit_routing
from app.forecast.service import ModelRecord, forecast_from_state, forecast_inputs
from app.forecast.training_data import TooLittleHistory
from app.state import UnitState, load_state
from app.stats.kaplan_meier import kaplan_meier
from app.stats.occupancy import ArrivalStream, BookedAdmissions, occupancy_days
from app.stats.poisson_binomial import pmf_quantile
from app.stats.scoring import batch_means_se, crps_pmf, log_score, pit_band_shares, randomised_pit
from app.timeutil import census_instants_after, localize

METHODS = ("morrow", "yesterday", "same_weekday", "mean_stay", "one_distribution",
           "time_series")
Progress = Callable[[int, int, str], None]
# Mornings per batch of the coverage shares' standard error. A forecast's seven nights overlap
# those of the six mornings after it, so neighbouring batches are correlated and the batch
# means understate the error: measured on simulated series of 126 mornings, each the mean of
# seven overlapping nights (4,000 series), the variance came out 0.67 of the true one with
# weekly batches and 0.84 with fortnightly ones (tests/stats/test_scoring.py).
BATCH_MORNINGS = 14


@dataclass
class Scored:
    """Forecast pmfs and outcomes of one method, one row per (day, horizon)."""

    horizon: list[int] = field(default_factory=list)
    morning: list[int] = field(default_factory=list)   # index of the forecast's morning
    pmf: list[np.ndarray] = field(default_factory=list)
    outcome: list[int] = field(default_factory=list)


def _empirical_pmf(values: np.ndarray) -> np.ndarray:
    values = np.clip(np.asarray(values, dtype=int), 0, None)
    return np.bincount(values) / values.size


def _normal_pmf(mean: float, sd: float, kmax: int) -> np.ndarray:
    edges = np.arange(kmax + 2) - 0.5
    cdf = stats.norm.cdf(edges, loc=mean, scale=max(sd, 1e-6))
    cdf[0], cdf[-1] = 0.0, 1.0  # counts below 0 and above kmax fold into the ends
    return np.diff(cdf)


def census_series(state: UnitState, end: datetime, days: int) -> pd.Series:
    """Occupancy at each census instant of the ``days`` local days up to ``end``."""
    instants = census_instants_after(end - timedelta(days=days + 1), state.census_time,
                                     state.tz, days + 2)
    instants = [h for h in instants if h <= end][-days:]
    return pd.Series([state.occupancy_at(pd.Timestamp(h)) for h in instants],
                     index=pd.DatetimeIndex(instants))


def _baselines(known: UnitState, record: ModelRecord, instants: list[datetime],
               history: pd.Series) -> dict[str, list[np.ndarray]]:
    """The five baselines' pmfs at each instant, from what ``known`` knew."""
    n = len(instants)
    census_at = np.array([(pd.Timestamp(h) - known.as_of).value / 86_400e9 for h in instants])
    return {
        "yesterday": yesterday_baseline(history, n),
        "same_weekday": same_weekday_baseline(history, instants, known.tz),
        "mean_stay": _mean_stay_baseline(known, record, census_at),
        "one_distribution": one_distribution_baseline(known, census_at),
        "time_series": _sarimax(history.to_numpy()[-365:], n,
                                kmax=int(history.to_numpy().max() * 2 + 10)),
    }


def yesterday_baseline(history: pd.Series, steps: int) -> list[np.ndarray]:
    """Persistence: the last census plus the k-step census changes of the last half year."""
    values = history.to_numpy()
    last = int(values[-1])
    return [_empirical_pmf(last + (values[k:] - values[:-k])[-182:]) for k in range(1, steps + 1)]


def same_weekday_baseline(history: pd.Series, instants: list[datetime], tz: ZoneInfo
                          ) -> list[np.ndarray]:
    """The census at the same local weekday over the last eight weeks, as it was."""
    weekdays = np.array([i.weekday() for i in history.index.tz_convert(tz)])
    values = history.to_numpy()
    return [_empirical_pmf(values[weekdays == h.astimezone(tz).weekday()][-8:])
            for h in instants]


def _mean_stay_baseline(known: UnitState, record: ModelRecord, census_at: np.ndarray
                        ) -> list[np.ndarray]:
    """Deterministic departures at each group's mean remaining stay; Morrow's arrivals."""
    n = census_at.size
    los = LosModel.from_payload(record.payload)
    current = known.current_stays()
    morrow_like = forecast_inputs(known, record, n)
    groups = (los.groups.group_of(los.design.covariate_matrix(current)) if len(current)
              else np.zeros(0, dtype=np.int64))
    leave = np.array([los.groups.get(int(g)).distribution.conditional(float(d)).mean()
                      for g, d in zip(groups, current["days_in"], strict=True)])
    p_det = ((leave[:, None] > census_at[None, :]).astype(float) if len(current)
             else np.zeros((0, n)))
    det_days = occupancy_days(p_det, morrow_like.booked, morrow_like.streams, census_at,
                              [None] * n, morrow_like.limits)
    return [d.pmf for d in det_days]


def one_distribution_baseline(known: UnitState, census_at: np.ndarray) -> list[np.ndarray]:
    """One Kaplan-Meier stay curve for everyone (current patients given their days in) and
    Poisson arrivals at the past year's mean daily rate, in hourly slots."""
    n = census_at.size
    current = known.current_stays()
    hist = known.history()
    km = kaplan_meier(hist["los_days"].clip(lower=0).to_numpy(), hist["event"].to_numpy())
    spent = current["days_in"].to_numpy()
    s_now = np.maximum(km.sf(spent), 1e-12)
    p_km = ((km.sf(spent[:, None] + census_at[None, :]) / s_now[:, None]) if len(current)
            else np.zeros((0, n)))
    # Admissions in the last year (or since the first admission, if later) over its length.
    opens = max(known.as_of - pd.Timedelta(days=365), hist["admitted_at"].min())
    recent = hist.loc[hist["admitted_at"] > opens]
    rate = len(recent) / max((known.as_of - opens).total_seconds() / 86400, 1.0)
    slots = np.arange(1, int(math.ceil(census_at[-1] * 24)) + 1) / 24 - 1 / 48
    stream = ArrivalStream("emergency", tuple(slots), tuple([rate / 24] * slots.size),
                           tuple((slots // 1).astype(int)), None, _KmStay(km))
    km_days = occupancy_days(p_km, BookedAdmissions((), (), ()), [stream], census_at, [None] * n)
    return [d.pmf for d in km_days]


class _KmStay:
    """A Kaplan-Meier curve used as a stay distribution (survival only)."""

    def __init__(self, km: Any) -> None:
        self.km = km

    def sf(self, x: Any) -> np.ndarray:
        return np.asarray(self.km.sf(np.asarray(x, dtype=float)), dtype=float)


def _sarimax(series: np.ndarray, steps: int, kmax: int) -> list[np.ndarray]:
    """The seasonal ARIMA baseline's pmfs for the next ``steps`` days.

    A fit that runs onto its boundary (autoregressive terms at -1) can report negative
    predictive variances; that morning the baseline falls back to its simplest form, the last
    census with the series' own spread, rather than giving up the whole backtest.
    """
    from statsmodels.tsa.statespace.sarimax import SARIMAX
    from threadpoolctl import threadpool_limits

    # One BLAS thread: the fit's small matrices gain nothing from more, and on a busy machine
    # two threads made one fit six times slower (6.4 s against 1.05 s, measured here).
    with warnings.catch_warnings(), threadpool_limits(1):
        warnings.simplefilter("ignore")
        fit = SARIMAX(series.astype(float), order=(1, 0, 0), seasonal_order=(1, 0, 0, 7),
                      trend="c").fit(disp=False)
        prediction = fit.get_forecast(steps)
    means = np.asarray(prediction.predicted_mean, dtype=float)
    variances = np.asarray(prediction.var_pred_mean, dtype=float)
    if not (np.all(np.isfinite(means)) and np.all(np.isfinite(variances))
            and np.all(variances > 0)):
        spread = max(float(np.std(series)), 0.5)
        means, variances = np.full(steps, float(series[-1])), np.full(steps, spread**2)
    return [_normal_pmf(m, s, kmax) for m, s in zip(means, np.sqrt(variances), strict=True)]


def _trained(known: UnitState, units: list[str], morning: datetime,
             season: tuple[float, float] | None = None) -> ModelRecord:
    """A model of ``known``'s unit on what it knew (held in memory, as ``train_model``
    would store it: length of stay, arrivals, routing); ``season``: the hospital's annual
    pair as known then (app/forecast/hospital_demand.py)."""
    payload = train_los(known, evaluate=False, compare=False)
    payload["arrivals"] = train_arrivals(known, units, season)
    los = LosModel.from_payload(payload)
    payload["routing"] = fit_routing(known, units, los.groups, los.design)
    return ModelRecord(f"backtest-{known.unit}-{morning:%Y%m%d}", morning, payload)


def run_backtest(session: Session, unit: str, start: date, end: date, tz: ZoneInfo, *,
                 days: int = 7, at: time = time(8, 0), retrain_days: int = 28,
                 progress: Progress | None = None, transfers: str = "pass-on",
                 baselines: bool = True) -> dict[str, Any]:
    """Forecast each local day from ``start`` to ``end`` at clock time ``at``; score all methods.

    ``transfers``: ``pass-on`` forecasts the patients other units pass on through those
    units' own models (retrained on the same mornings, app/forecast/transfers.py);
    ``stream`` takes them as a stream of the unit's own (the comparison the network issue
    asks for). ``baselines=False`` scores Morrow's forecast alone."""
    from app.forecast.transfers import MODES, Sender, sender_units
    from app.store import repo

    if transfers not in MODES:
        raise ValueError(f"transfers: one of {MODES}, got {transfers!r}")
    if end < start:
        raise ValueError(f"end {end} is before start {start}")
    units = [u.code for u in repo.list_units(session)]
    mornings = [localize(datetime.combine(start + timedelta(days=i), at), tz).astimezone(UTC)
                for i in range((end - start).days + 1)]
    last_needed = census_instants_after(mornings[-1], _census_time(session, unit), tz, days)[-1]
    # Every unit as finally known (the hospital's season is learnt from all of them, each
    # as known at the retraining morning); other units pass patients on from these too.
    every = {code: load_state(session, code, last_needed + timedelta(hours=1), tz,
                              with_history=True) for code in units}
    full = every[unit]
    sender_records: dict[str, ModelRecord] = {}
    history_all = census_series(full, last_needed, (last_needed - mornings[0]).days + 400)
    scored = {m: Scored() for m in (METHODS if baselines else METHODS[:1])}
    record: ModelRecord | None = None
    trained_on: datetime | None = None
    for i, morning in enumerate(mornings):
        known = full.known_at(morning)
        if trained_on is None or (morning - trained_on).days >= retrain_days:
            if progress:
                progress(i, len(mornings), f"training on what was known at {morning:%Y-%m-%d}")
            known_all = {code: known if code == unit else state.known_at(morning)
                         for code, state in every.items()}
            season = hospital_season_at(known_all.values(), units)
            record = _trained(known, units, morning, season)
            trained_on = morning
            for code in sender_units(record.payload) if transfers == "pass-on" else ():
                try:
                    sender_records[code] = _trained(known_all[code], units, morning, season)
                except (TooLittleHistory, ValueError):  # too little history there: a stream
                    sender_records.pop(code, None)
        assert record is not None
        senders = [Sender(code, every[code].known_at(morning),
                          sender_records[code].payload) if code in sender_records
                   else Sender(code) for code in sender_units(record.payload) if code != unit]
        result = forecast_from_state(known, record, days=days, paths=0, senders=senders)
        instants = [datetime.fromisoformat(d["census_at"]) for d in result["days"]]
        outcomes = [full.occupancy_at(pd.Timestamp(h)) for h in instants]
        history = history_all[history_all.index <= pd.Timestamp(morning)]
        pmfs = {"morrow": [np.asarray(d["pmf"]) for d in result["days"]],
                **(_baselines(known, record, instants, history) if baselines else {})}
        for method, per_day in pmfs.items():
            for k, (pmf, y) in enumerate(zip(per_day, outcomes, strict=True), start=1):
                scored[method].horizon.append(k)
                scored[method].morning.append(i)
                scored[method].pmf.append(pmf / pmf.sum())
                scored[method].outcome.append(int(y))
        if progress:
            progress(i + 1, len(mornings), f"{morning:%Y-%m-%d}")
    summary = summarise(unit, start, end, days, scored)
    summary["transfers"] = transfers
    return summary


def _census_time(session: Session, unit: str) -> time:
    from app.store import repo
    from app.timeutil import parse_clock

    found = repo.get_unit(session, unit)
    if found is None:
        raise LookupError(f"unit {unit!r} is not known")
    return parse_clock(found.census_time)


def _scores(s: Scored, rows: np.ndarray) -> dict[str, float | None]:
    pmfs = [s.pmf[i] for i in rows]
    y = np.array([s.outcome[i] for i in rows])
    width = max(max(p.size for p in pmfs), int(y.max()) + 1)
    matrix = np.zeros((len(pmfs), width))
    for j, p in enumerate(pmfs):
        matrix[j, : p.size] = p
    matrix /= matrix.sum(axis=1, keepdims=True)
    q = np.array([pmf_quantile(p, [0.025, 0.1, 0.5, 0.9, 0.975]) for p in matrix])
    in_80 = pit_band_shares(matrix, y, 0.1, 0.9)
    in_95 = pit_band_shares(matrix, y, 0.025, 0.975)
    return {
        "n": int(len(rows)),
        "crps": float(np.mean(crps_pmf(matrix, y))),
        "mae_median": float(np.mean(np.abs(q[:, 2] - y))),
        "coverage_80": float(np.mean((q[:, 1] <= y) & (y <= q[:, 3]))),
        "coverage_95": float(np.mean((q[:, 0] <= y) & (y <= q[:, 4]))),
        "log_score": float(np.mean(log_score(matrix, y))),
        # The randomised PIT's shares averaged over its randomisation: the same target without
        # the noise of one set of draws (over one stress unit's 882 forecasts, 500 sets of
        # draws gave PIT80 shares 0.713-0.763, standard deviation 0.008).
        "pit_80": float(np.mean(in_80)),
        "pit_95": float(np.mean(in_95)),
        # How far each share could be from its long-run value: forecasts of neighbouring
        # mornings share nights and miss together, so by batch means over fortnights of mornings
        # (None with too few fortnights; JSON has no NaN).
        "pit_80_se": _batched_se(s, rows, in_80),
        "pit_95_se": _batched_se(s, rows, in_95),
    }


def _batched_se(s: Scored, rows: np.ndarray, values: np.ndarray) -> float | None:
    """Batch-means standard error of the mean of ``values`` (one per row of ``rows``), each
    batch the rows of :data:`BATCH_MORNINGS` consecutive mornings."""
    mornings = np.asarray(s.morning)[rows]
    per_morning = np.bincount(mornings - mornings.min(), weights=values)
    counts = np.bincount(mornings - mornings.min())
    keep = counts > 0
    return batch_means_se(per_morning[keep] / counts[keep], BATCH_MORNINGS)


def summarise(unit: str, start: date, end: date, days: int,
              scored: dict[str, Scored]) -> dict[str, Any]:
    rng = np.random.default_rng(20261201)
    table: dict[str, Any] = {}
    pits: dict[str, list[float]] = {}
    for method, s in scored.items():
        horizons = np.asarray(s.horizon)
        table[method] = {
            "by_horizon": [_scores(s, np.flatnonzero(horizons == k))
                           for k in range(1, days + 1)],
            "all": _scores(s, np.arange(horizons.size)),
        }
        width = max(max(p.size for p in s.pmf), max(s.outcome) + 1)
        matrix = np.zeros((len(s.pmf), width))
        for j, p in enumerate(s.pmf):
            matrix[j, : p.size] = p
        pit = np.atleast_1d(randomised_pit(matrix, np.asarray(s.outcome), rng=rng))
        pits[method] = [float(v) for v in pit]
    return {"unit": unit, "from": start.isoformat(), "to": end.isoformat(), "days": days,
            "methods": table, "pit": pits}


def text_progress(done: int, total: int, what: str) -> None:
    width = 30
    filled = int(width * done / max(total, 1))
    sys.stderr.write(f"\r[{'#' * filled}{'.' * (width - filled)}] {done}/{total} {what:<45}")
    if done >= total:
        sys.stderr.write("\n")
    sys.stderr.flush()


def store_backtest(session: Session, result: dict[str, Any]) -> int:
    """Keep a backtest's summary for the model page."""
    import json

    from app.store.models import BacktestRun

    row = BacktestRun(unit=result["unit"], date_from=date.fromisoformat(result["from"]),
                      date_to=date.fromisoformat(result["to"]), days=int(result["days"]),
                      result=json.dumps(result, allow_nan=False))
    session.add(row)
    session.flush()
    return row.id
