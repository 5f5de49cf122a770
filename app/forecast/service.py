"""Services: train a unit's model and forecast its occupancy, as the contract's JSON.

The forecast uses the newest model whose ``trained_until`` is not after ``as_of`` and reads
data only through the "as of" state, so a forecast for a past instant equals the one that
would have been made then from the same data.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass, replace
from datetime import UTC, date, datetime, time, timedelta
from functools import cached_property, lru_cache
from typing import TYPE_CHECKING, Any
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session

from app.forecast.arrivals import (
    MAX_LEAD,
    emergency_demand,
    emergency_rate,
    excess_beds,
    passed_on_excess_beds,
    recent_days_read,
    train_arrivals,
    unbooked_means,
)
from app.forecast.hospital_demand import hospital_season_at
from app.forecast.los import LosModel, train_los
from app.forecast.los.constants import NS_PER_DAY
from app.forecast.models import newest_model, save_model
from app.forecast.newcomer_clock import elapsed
from app.forecast.routing import fit_routing
from app.forecast.stay_grid import census_offsets, days_after, on_instants, predicted_on_grid
from app.state import UnitState, load_state
from app.stats.loss import LOSS_PATHS, LossDraws, draw_losses, losses
from app.stats.occupancy import (
    ArrivalStream,
    BookedAdmissions,
    Newcomers,
    StayMixture,
    day_to_json,
    with_current,
)
from app.stats.occupancy import newcomers as newcomers_present
from app.stats.occupancy_paths import PathDraws, any_night_over, draw_paths
from app.stats.transfer_presence import PassedOn
from app.store import repo
from app.store.models import StoredForecast
from app.timeutil import census_instants_after, iso, localize

if TYPE_CHECKING:
    from app.forecast.transfers import AtHand

FORMAT = 1
DEFAULT_DAYS = 7
# Joint paths of the week for the any-night risk where the unit has no ceiling; under a
# ceiling the ceiling's own paths serve (app.stats.loss.LOSS_PATHS).
WEEK_PATHS = 5000


class NoModel(LookupError):
    """No trained model may be used for this instant."""


@dataclass(frozen=True)
class ModelRecord:
    id: str
    trained_until: datetime
    payload: dict[str, Any]


def train_model(session: Session, unit: str, until: datetime, tz: ZoneInfo,
                *, test_days: float | None = None) -> tuple[str, dict[str, Any]]:
    """Fit the length-of-stay and arrivals models on what was known at ``until``; store them."""
    state = load_state(session, unit, until, tz, with_history=True)
    payload = train_los(state, test_days=test_days)
    units = [u.code for u in repo.list_units(session)]
    # Every unit as known at ``until``, read once: the hospital's yearly pattern is learnt
    # from all of them, and the exit blocks read the units this one passes patients on to.
    every = {u: state if u == unit else load_state(session, u, until, tz, with_history=True)
             for u in units}
    payload["arrivals"] = train_arrivals(state, units, hospital_season_at(every.values(), units))
    los = LosModel.from_payload(payload)
    payload["routing"] = fit_routing(state, units, los.groups, los.design)
    payload["exit_block"] = _exit_blocks(session, state, payload, tz, every)
    model_id = save_model(session, unit, state.as_of.to_pydatetime(), payload)
    return model_id, payload


def _exit_blocks(session: Session, state: UnitState, payload: dict[str, Any], tz: ZoneInfo,
                 loaded: dict[str, UnitState]) -> dict[str, Any]:
    """How ready patients' moves to each unit this one passes patients on to were held back
    while that unit was full (app/forecast/exit_block.py), from what was known at training."""
    from app.forecast.exit_block import exit_blocks
    from app.forecast.routing import Routing

    routing = Routing.from_payload(payload)
    if routing is None:
        return {}
    overall = routing.shares_for(None)
    receivers = {code: loaded[code] if code in loaded
                 else load_state(session, code, state.as_of.to_pydatetime(), tz,
                                 with_history=True)
                 for code in routing.receiving_units()
                 if code != state.unit and overall.get(code, 0.0) > 0}
    return exit_blocks(state, receivers)


def model_for(session: Session, unit: str, as_of: datetime) -> ModelRecord:
    found = newest_model(session, unit, as_of)
    if found is None:
        raise NoModel(f"no model of unit {unit} was trained until {as_of.isoformat()} or "
                      f"earlier; run: morrow train --unit {unit} --until {as_of.isoformat()}")
    return ModelRecord(*found)


@lru_cache(maxsize=64)
def _slot_offsets(tz: ZoneInfo, as_of: pd.Timestamp, first_day: date, days: int, hours: int
                  ) -> np.ndarray:
    """(days, hours) days after as_of of each local day's hourly slot midpoints (hh:30);
    every stream of every unit forecast at this as_of shares them."""
    out = np.empty((days, hours))
    for d in range(days):
        local_day = first_day + timedelta(days=d)
        for hour in range(hours):
            out[d, hour] = days_after(localize(datetime.combine(local_day, time(hour, 30)), tz),
                                       as_of)
    out.setflags(write=False)
    return out


def _hourly_stream(name: str, state: UnitState, first_day: date, day_means: list[float],
                   profile: list[float], size: float | None, stay: Any,
                   level_size: float | None = None) -> ArrivalStream:
    offsets = _slot_offsets(state.tz, state.as_of, first_day, len(day_means), len(profile))
    means = (np.asarray(day_means, dtype=float)[:, None]
             * np.asarray(profile, dtype=float)[None, :])
    keep = (offsets > 0) & (means > 0)
    day = np.nonzero(keep)[0]
    return ArrivalStream(name, tuple(offsets[keep].tolist()), tuple(means[keep].tolist()),
                         tuple(day.tolist()), size, stay, level_size=level_size)


def clock_lags(los: LosModel, state: UnitState, offsets: list[float] | tuple[float, ...],
              census_at: np.ndarray) -> np.ndarray:
    """(arrivals, instants) time on the unit's discharge clock from each arrival (days after
    as_of) to each census instant (``app.forecast.newcomer_clock``)."""
    origin = state.as_of.value
    start = origin + np.round(np.asarray(offsets, dtype=float) * NS_PER_DAY).astype(np.int64)
    census = origin + np.round(census_at * NS_PER_DAY).astype(np.int64)
    return elapsed(los.hazard.profile, state.tz, start, census)


def newcomer_stay_of(los: LosModel, group: Any) -> Any:
    """A group's stay for newcomers: on the discharge clock when the model has those fits."""
    return group.clock_distribution if los.groups.on_clock else group.distribution


def _newcomer_stay(los: LosModel, admission_type: str) -> StayMixture:
    groups = los.groups.groups
    parts = [(g.share.get(admission_type, 0.0), newcomer_stay_of(los, g)) for g in groups]
    parts = [(w, d) for w, d in parts if w > 0] or [(1.0, newcomer_stay_of(los, g))
                                                    for g in groups]
    return StayMixture(tuple(w for w, _ in parts), tuple(d for _, d in parts))


def admit_hour(profile: list[float]) -> float:
    """The median clock hour of elective admissions (slot midpoint)."""
    cumulative = np.cumsum(profile)
    return float(np.searchsorted(cumulative, 0.5)) + 0.5


def _booked(state: UnitState, los: LosModel, elective: dict[str, Any], last_day: date
            ) -> BookedAdmissions:
    bookings = state.open_bookings()
    bookings = bookings.loc[bookings["planned_date"] <= last_day]
    if bookings.empty:
        return BookedAdmissions((), (), ())
    today = state.as_of.tz_convert(state.tz).date()
    frame = bookings.assign(admission_type="elective")
    covariates = los.design.covariate_matrix(frame)
    p_go_by_lead = elective["p_go_by_lead"]
    hour = admit_hour(elective["hour_profile"])
    p_go, admit_at, stays = [], [], []
    for planned, row in zip(bookings["planned_date"], covariates, strict=True):
        lead = min((planned - today).days, MAX_LEAD)
        when = localize(datetime.combine(planned, time(0)) + timedelta(hours=hour), state.tz)
        # A booking for today whose usual admission hour has passed may still come.
        offset = max(days_after(when, state.as_of), 1 / 24)
        p_go.append(float(p_go_by_lead[lead]))
        admit_at.append(offset)
        stays.append(_booked_stay(los, row))
    return BookedAdmissions(tuple(p_go), tuple(admit_at), tuple(stays))


def _booked_stay(los: LosModel, covariates: np.ndarray) -> Any:
    """A booking's stay: its group's, or where the booking lacks a value the admission tree
    splits on, the mixture of the elective groups its known values allow
    (``StayGroups.leaves_given``)."""
    weights = los.groups.leaves_given(covariates, "elective")
    parts = [newcomer_stay_of(los, los.groups.get(n)) for n in weights]
    if len(parts) == 1:
        return parts[0]
    return StayMixture(tuple(weights.values()), tuple(parts))


def _with_clock(los: LosModel, state: UnitState, census_at: np.ndarray,
                booked: BookedAdmissions, streams: list[ArrivalStream]
                ) -> tuple[BookedAdmissions, list[ArrivalStream]]:
    """The newcomers with their stays on the unit's discharge clock (a model trained before
    the clock fits existed keeps calendar time)."""
    if not los.groups.on_clock:
        return booked, streams
    if booked.stays:
        booked = replace(booked, clock=clock_lags(los, state, booked.admit_at, census_at))
    return booked, [replace(s, clock=clock_lags(los, state, s.slot_at, census_at))
                    for s in streams]


def forecast(session: Session, unit: str, as_of: datetime, tz: ZoneInfo, *,
             days: int = DEFAULT_DAYS, paths: int = WEEK_PATHS, seed: int = 0) -> dict[str, Any]:
    """The forecast JSON (``"format": 1``, DATA_CONTRACT.md) for ``unit`` at ``as_of``."""
    if days < 1:
        raise ValueError(f"days: must be at least 1, got {days}")
    as_of = as_of.astimezone(UTC)
    record = model_for(session, unit, as_of)
    state = forecast_state(session, unit, as_of, tz, record.payload)
    return forecast_from_state(state, record, days=days, paths=paths, seed=seed,
                               senders=senders_of(session, state, record))


def forecast_state(session: Session, unit: str, as_of: datetime, tz: ZoneInfo,
                   payload: dict[str, Any] | None) -> UnitState:
    """What a forecast from the model ``payload`` reads at ``as_of``: the stays in the unit
    then and those discharged in the days its demand looks back on (the local level's
    recent admissions; ``recent_days_read``), not the whole history."""
    recent = 0.0 if payload is None else recent_days_read(payload["arrivals"])
    return load_state(session, unit, as_of, tz, with_history=False, recent_days=recent)


def senders_of(session: Session, state: UnitState, record: ModelRecord,
               loaded: AtHand | None = None) -> list[Any]:
    """The units passing patients on to ``state.unit``, each with its state and model at the
    same as_of (app/forecast/transfers.py; ``loaded``: those at hand already)."""
    from app.forecast.transfers import senders_for

    return senders_for(session, state.unit, state.as_of.to_pydatetime(), state.tz,
                       record.payload, loaded=loaded)


@dataclass(frozen=True, eq=False)
class ForecastInputs:
    """Everything the occupancy distribution is computed from, for one unit and as_of."""

    instants: list[datetime]
    census_at: np.ndarray
    local_days: list[date]
    beds: list[int | None]
    predictions: Any
    booked: BookedAdmissions
    streams: list[ArrivalStream]
    # The most patients the unit holds at each instant (None: no ceiling known).
    limits: list[int | None] | None = None
    # Current stays' P(in) at the instants of the ceiling's paths (``Backdrop.losses.grid``).
    p_grid: Any = None


@dataclass(frozen=True, eq=False)
class Backdrop:
    """The part of a forecast that the current patients' scores cannot change.

    Census instants, beds, bookings, the arrival streams, the newcomers' exact occupancy and
    the joint paths' random draws depend only on the model, ``as_of`` and which stays and
    bookings there are. A page computes this once and, when a score comes in, redoes only
    the current patients' probabilities (:func:`forecast_on`).
    """

    unit: str
    as_of: pd.Timestamp
    stay_ids: tuple[str, ...]
    los: LosModel
    instants: list[datetime]
    census_at: np.ndarray
    local_days: list[date]
    beds: list[int | None]
    booked: BookedAdmissions
    streams: list[ArrivalStream]
    limits: list[int | None]
    # The week's joint paths for the any-night risk (None: not asked for, or a bed count
    # unknown). Under a ceiling they are the ceiling's own paths (``losses``), which turn
    # arrivals away at the instant they come, and ``draws`` stays None.
    draws: PathDraws | None
    # Paths that turn arrivals away at their arrival instant (None: no ceiling).
    losses: LossDraws | None = None
    week: bool = False
    # Patients other units pass on (None: no sending unit; app/forecast/transfers.py), and
    # the ceiling they come in below at each census instant (None: the unit's ``limits``).
    passed: PassedOn | None = None
    passed_limits: list[int | None] | None = None

    @cached_property
    def newcomers(self) -> Newcomers:
        """Bookings and arrivals still present, exactly; made when first needed, so callers
        that only want the inputs (booking check, backtest) do not pay for it."""
        return newcomers_present(self.booked, self.streams, self.census_at)


def forecast_backdrop(state: UnitState, record: ModelRecord, *, days: int = DEFAULT_DAYS,
                      paths: int = WEEK_PATHS, seed: int = 0,
                      senders: Sequence[Any] | None = None) -> Backdrop:
    """Everything but the current patients' probabilities, for ``days`` census instants.

    ``senders``: the units passing patients on to this one at the same as_of
    (:func:`senders_of`); their current patients and admissions to come join this unit's
    forecast (app/forecast/transfers.py). None (a caller without the store): the transfers
    the model learnt come as streams of this unit's own."""
    los = LosModel.of(record.payload)
    arrivals = record.payload["arrivals"]
    instants = census_instants_after(state.as_of.to_pydatetime(), state.census_time, state.tz,
                                     days)
    local_days = [h.astimezone(state.tz).date() for h in instants]
    today = state.as_of.tz_convert(state.tz).date()
    span = [today + timedelta(days=d) for d in range((local_days[-1] - today).days + 1)]
    rate = emergency_rate(arrivals)
    means, level_size = emergency_demand(state, arrivals, span)
    emergency = _hourly_stream("emergency", state, today, means,
                               arrivals["emergency"]["hour_profile"], rate.size,
                               _newcomer_stay(los, "emergency"), level_size)
    not_yet_booked = unbooked_means(arrivals["elective"], span,
                                    state.as_of.tz_convert(state.tz).to_pydatetime())
    unbooked = _hourly_stream("elective", state, today, not_yet_booked,
                              arrivals["elective"]["hour_profile"], None,
                              _newcomer_stay(los, "elective"))
    census_at = census_offsets(state, instants)
    passed: PassedOn | None = None
    fallback: list[ArrivalStream] = []
    if senders is None:
        from app.forecast.transfers import Sender, sender_units

        senders = [Sender(u) for u in sender_units(record.payload) if u != state.unit]
    if senders:
        from app.forecast.transfers import passed_on

        passed, fallback = passed_on(state, los, record.payload, instants, census_at,
                                     senders, _hourly_stream)
    booked, streams = _with_clock(los, state, census_at,
                                  _booked(state, los, arrivals["elective"], local_days[-1]),
                                  [emergency, unbooked, *fallback])
    beds = [state.beds_on(d) for d in local_days]
    stay_ids = tuple(str(s) for s in state.stays.loc[state.present_mask(state.as_of), "stay_id"])
    limits = _limits(beds, excess_beds(arrivals), len(stay_ids))
    loss_draws = None
    if any(c is not None for c in limits):
        loss_draws = draw_losses(booked, streams, census_at, LOSS_PATHS,
                                 np.random.default_rng(seed), seed=seed)
    week = paths > 0 and all(b is not None for b in beds)
    draws = None
    if week and loss_draws is None:
        draws = draw_paths(len(stay_ids), booked, streams, census_at, paths,
                           np.random.default_rng(seed))
    if passed is not None:
        from app.forecast.transfers import fallback_means

        passed = replace(passed, fallback_means=fallback_means(streams, census_at))
    return Backdrop(unit=state.unit, as_of=state.as_of, stay_ids=stay_ids, los=los,
                    instants=instants, census_at=census_at, local_days=local_days, beds=beds,
                    booked=booked, streams=streams, limits=limits, draws=draws, losses=loss_draws,
                    passed=passed, week=week,
                    passed_limits=_limits(beds, passed_on_excess_beds(arrivals), len(stay_ids)))


def _limits(beds: list[int | None], excess: int | None, in_unit: int) -> list[int | None]:
    """The unit's ceiling at each census instant: staffed beds plus the escalation beds it has
    been seen to use, and never below the patients in the unit now (it holds them already)."""
    if excess is None:
        return [None] * len(beds)
    return [None if b is None else max(b + excess, in_unit) for b in beds]


def forecast_inputs(state: UnitState, record: ModelRecord, days: int) -> ForecastInputs:
    """Per-stay probabilities, known bookings and the arrival streams for the next ``days``."""
    return _inputs(forecast_backdrop(state, record, days=days, paths=0), state, record)


def _inputs(backdrop: Backdrop, state: UnitState, record: ModelRecord) -> ForecastInputs:
    predictions, p_grid = _predictions(backdrop, state, record)
    return ForecastInputs(
        instants=backdrop.instants, census_at=backdrop.census_at,
        local_days=backdrop.local_days, beds=backdrop.beds, predictions=predictions,
        booked=backdrop.booked, streams=backdrop.streams, limits=backdrop.limits,
        p_grid=p_grid)


def _predictions(backdrop: Backdrop, state: UnitState, record: ModelRecord
                 ) -> tuple[Any, np.ndarray | None]:
    """The current stays at the census instants and, under a ceiling, also at every instant
    of the paths' grid: one call of the length-of-stay model on the shared grid
    (app/forecast/stay_grid.py), linear in time in between."""
    u, on_grid = predicted_on_grid(record.payload, backdrop.los, state, backdrop.census_at)
    census_pos = np.searchsorted(u, backdrop.census_at) - 1
    predictions = replace(on_grid, instants=tuple(backdrop.instants),
                          p_present=on_grid.p_present[:, census_pos])
    if backdrop.losses is None:
        return predictions, None
    return predictions, on_instants(u, on_grid.p_present, backdrop.losses.grid)


def expected_admissions(inputs: ForecastInputs) -> list[float]:
    """Expected admissions between consecutive census instants (the first from as_of)."""
    out = []
    start = 0.0
    booked_at = np.asarray(inputs.booked.admit_at, dtype=float)
    p_go = np.asarray(inputs.booked.p_go, dtype=float)
    for end in inputs.census_at:
        total = float(p_go[(booked_at > start) & (booked_at <= end)].sum())
        for stream in inputs.streams:
            at = np.asarray(stream.slot_at)
            total += float(np.asarray(stream.slot_mean)[(at > start) & (at <= end)].sum())
        out.append(total)
        start = end
    return out


def forecast_from_state(state: UnitState, record: ModelRecord, *, days: int = DEFAULT_DAYS,
                        paths: int = WEEK_PATHS, seed: int = 0,
                        senders: Sequence[Any] | None = None) -> dict[str, Any]:
    """The forecast from an already loaded state (the page reuses it after a score entry)."""
    return forecast_with_inputs(state, record, days=days, paths=paths, seed=seed,
                                senders=senders)[0]


def forecast_with_inputs(state: UnitState, record: ModelRecord, *, days: int = DEFAULT_DAYS,
                         paths: int = WEEK_PATHS, seed: int = 0,
                         senders: Sequence[Any] | None = None
                         ) -> tuple[dict[str, Any], ForecastInputs]:
    """The forecast JSON and the inputs it was computed from (for the page's day table)."""
    backdrop = forecast_backdrop(state, record, days=days, paths=paths, seed=seed,
                                 senders=senders)
    return forecast_on(backdrop, state, record)


def forecast_on(backdrop: Backdrop, state: UnitState, record: ModelRecord
                ) -> tuple[dict[str, Any], ForecastInputs]:
    """The forecast from a backdrop and a state with the same as_of, stays and bookings
    (observations may be newer than the backdrop's)."""
    if state.unit != backdrop.unit or state.as_of != backdrop.as_of:
        raise ValueError("state: another unit or as_of than the backdrop's")
    inputs = _inputs(backdrop, state, record)
    if tuple(inputs.predictions.stay_ids) != backdrop.stay_ids:
        raise ValueError("state: other current stays than the backdrop's")
    p_present = inputs.predictions.p_present
    lost = None
    if backdrop.losses is not None:
        lost = losses(backdrop.losses, inputs.p_grid, backdrop.limits)
    results = with_current(p_present, backdrop.newcomers, inputs.beds, backdrop.limits,
                           passed=backdrop.passed, lost=lost,
                           passed_limits=backdrop.passed_limits)
    out_days = []
    for k, (instant, local_day, bed_count, result) in enumerate(zip(
            inputs.instants, inputs.local_days, inputs.beds, results, strict=True)):
        day = {"date": local_day.isoformat(), "census_at": iso(instant, state.tz),
               "beds": bed_count, **day_to_json(result)}
        if backdrop.passed is not None:
            offered = backdrop.newcomers.arriving_mean[k].get("emergency", 0.0)
            kept = result.components["emergency"] - (result.passed_mean or 0.0)
            day["transfers_in"] = backdrop.passed.by_unit(
                k, result.passed_mean, min(1.0, kept / offered) if offered > 0 else 1.0)
            day["moved_in"] = backdrop.passed.current_rows(k)
        out_days.append(day)
    payload: dict[str, Any] = {
        "format": FORMAT,
        "unit": state.unit,
        "as_of": iso(state.as_of.to_pydatetime(), state.tz),
        "model": {"id": record.id, "trained_until": iso(record.trained_until, state.tz)},
        "days": out_days,
        "stays": inputs.predictions.records(),
    }
    if backdrop.week:                   # every night's bed count is known
        if lost is not None and backdrop.losses is not None:
            raw, tie_break = lost.kept(), backdrop.losses.tie_break
        else:
            assert backdrop.draws is not None
            raw = backdrop.draws.counts(p_present, backdrop.limits)
            tie_break = backdrop.draws.tie_break
        payload["p_over_capacity_any_day"] = any_night_over(
            raw, [r.pmf for r in results], tie_break, [int(b or 0) for b in inputs.beds])
    return payload, inputs


def store_forecast(session: Session, payload: dict[str, Any], origin: str,
                   hour: datetime | None = None) -> int:
    """Keep a forecast as shown, to compare with the census that follows. With ``hour``, at
    most one per unit, model, origin and hour is stored (a second raises IntegrityError)."""
    row = StoredForecast(unit=payload["unit"], as_of=datetime.fromisoformat(payload["as_of"]),
                         model_id=payload["model"]["id"], origin=origin, hour=hour,
                         payload=json.dumps(payload, allow_nan=False))
    session.add(row)
    session.flush()
    return row.id
