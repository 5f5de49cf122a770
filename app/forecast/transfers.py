"""Patients other units pass on to a receiving unit R, for R's forecast at ``as_of``.

For each sending unit S (a unit R received patients from by its training cut-off):

- S has a usable model at ``as_of`` (trained by then, with routing): its current patients are
  read off the curves S's own forecast asks its length-of-stay model for (every three hours
  and S's census instants: ``app.forecast.stay_grid``, asked once for both), linearly in
  time at R's census instants; each one's chance of leaving S in each bin times its group's
  routing share to R times the survival in R from the bin's midpoint
  (:func:`app.stats.transfer_presence.passed_presence`); S's bookings and arrival streams
  (emergency, electives not yet booked) reach R through the tandem survival
  (:class:`app.stats.transfer_presence.TandemStay`), each arrival day's count still negative
  binomial with S's day-rate size where S's counts are overdispersed (as
  ``stream_presence`` does for R's own arrivals);
- otherwise (no model of S at ``as_of``, or the ``stream`` mode the backtest compares with)
  S's transfers come as a stream of R's own: the weekday rate and clock profile of
  transfers in from S learnt with R's arrivals (``arrivals["transfers_in"]``).

The survival in R, G_R, of a patient from S is the mixture of R's admission groups' stays
weighted by where R's stays that came from S fell (``Routing.received_groups``), on calendar
time; R's emergency mixture where none came. Everything is read at the same ``as_of``: S's
state and model follow the "as of" rule as R's do.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import date, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
from sqlalchemy.orm import Session

from app.forecast.arrivals import emergency_means, unbooked_means
from app.forecast.los import LosModel
from app.forecast.routing import Routing
from app.forecast.stay_grid import on_instants, own_census_offsets, predicted_on_grid
from app.state import UnitState
from app.stats.arrivals import DailyRateModel
from app.stats.occupancy import ArrivalStream, StayMixture, stream_presence
from app.stats.transfer_presence import (
    PassedOn,
    TandemStay,
    passed_presence,
    tandem_kernel,
)

MODES = ("pass-on", "stream")
# Units whose state and newest model payload (None: no model) at the forecast's as_of are at
# hand already (a page or a hospital forecast computing several units), used as they are.
AtHand = Mapping[str, tuple[UnitState, dict[str, Any] | None]]


@dataclass(frozen=True, eq=False)
class Sender:
    """A sending unit at the receiving forecast's ``as_of``: its state and model, or None
    for both when it has no usable model then (its transfers come as R's fallback stream)."""

    unit: str
    state: UnitState | None = None
    payload: dict[str, Any] | None = None


def sender_units(record_payload: dict[str, Any]) -> tuple[str, ...]:
    """The units the receiving model learnt transfers in from."""
    routing = Routing.from_payload(record_payload)
    came = set(record_payload.get("arrivals", {}).get("transfers_in", {}))
    if routing is not None:
        came |= set(routing.senders())
    return tuple(sorted(came))


def senders_for(session: Session, unit: str, as_of: Any, tz: ZoneInfo,
                record_payload: dict[str, Any], *, mode: str = "pass-on",
                loaded: AtHand | None = None) -> list[Sender]:
    """Each sending unit of ``unit`` with its state and newest model at ``as_of`` (the same
    "as of" rule as the receiving forecast's), those in ``loaded`` taken as they are."""
    from app.forecast.models import newest_model

    if mode not in MODES:
        raise ValueError(f"mode: one of {MODES}, got {mode!r}")
    out = []
    for code in sender_units(record_payload):
        if code == unit:
            continue
        if mode != "pass-on":
            out.append(Sender(code))
            continue
        if loaded is not None and code in loaded:
            state, payload = loaded[code]
        else:
            found = newest_model(session, code, as_of)
            state, payload = None, None if found is None else found[2]
        if payload is None or Routing.from_payload(payload) is None:
            out.append(Sender(code))
            continue
        if state is None:
            from app.forecast.service import forecast_state

            state = forecast_state(session, code, as_of, tz, payload)
        out.append(Sender(code, state, payload))
    return out


def _receiving_sf(los: LosModel, routing: Routing | None, sender: str, *,
                  on_clock: bool = False) -> Any:
    """G_R for patients from ``sender`` (module docstring); on the receiving unit's
    discharge clock with ``on_clock`` (for a fallback stream, whose lags the service puts on
    that clock when the model has those fits)."""
    def law(g: Any) -> Any:
        return g.clock_distribution if on_clock and los.groups.on_clock else g.distribution

    weights = {} if routing is None else routing.received_groups(sender)
    known = {g.node for g in los.groups.groups}
    parts = [(w, law(los.groups.get(g))) for g, w in weights.items() if g in known and w > 0]
    if not parts:
        parts = [(g.share.get("emergency", 0.0), law(g)) for g in los.groups.groups]
        parts = [(w, d) for w, d in parts if w > 0] or [(1.0, law(g))
                                                      for g in los.groups.groups]
    return StayMixture(tuple(w for w, _ in parts), tuple(d for _, d in parts))


def _fallback_stream(state: UnitState, los: LosModel, routing: Routing | None,
                     arrivals: dict[str, Any], sender: str, span: list[date],
                     hourly: Any) -> ArrivalStream | None:
    fitted = arrivals.get("transfers_in", {}).get(sender)
    if fitted is None:
        return None
    rate = DailyRateModel.from_dict(fitted["rate"])
    means = [float(m) for m in rate.mean(span)]
    stay = _receiving_sf(los, routing, sender, on_clock=True)
    return hourly("emergency", state, span[0], means, fitted["hour_profile"], rate.size, stay)


def passed_on(receiver: UnitState, los: LosModel, payload: dict[str, Any],
              instants: Sequence[Any], census_at: np.ndarray, senders: Sequence[Sender],
              hourly: Any) -> tuple[PassedOn, list[ArrivalStream]]:
    """What ``senders`` pass on to the receiving unit at its census instants, and the
    fallback streams (to join the receiving unit's own streams) of those without a model.

    ``hourly``: the service's builder of hourly arrival streams (``_hourly_stream``)."""
    routing = Routing.from_payload(payload)
    h = np.asarray(census_at, dtype=float)
    today = receiver.as_of.tz_convert(receiver.tz).date()
    last = instants[-1].astimezone(receiver.tz).date() if instants else today
    span = [today + timedelta(days=d) for d in range((last - today).days + 1)]
    rows: list[np.ndarray] = []
    row_unit: list[str] = []
    row_id: list[str] = []
    future: list[tuple[np.ndarray, float | None]] = []
    future_unit: list[str] = []
    fallback: list[ArrivalStream] = []
    fallback_unit: list[str] = []
    for sender in senders:
        if sender.state is None or sender.payload is None:
            stream = _fallback_stream(receiver, los, routing, payload["arrivals"], sender.unit,
                                      span, hourly)
            if stream is not None:
                fallback.append(stream)
                fallback_unit.append(sender.unit)
            continue
        g_r = _receiving_sf(los, routing, sender.unit)
        p, ids, streams = _from_sender(receiver, sender, h, g_r, span, hourly)
        rows.append(p)
        row_unit.extend([sender.unit] * p.shape[0])
        row_id.extend(ids)
        for presence, size in streams:
            future.append((presence, size))
            future_unit.append(sender.unit)
    p_all = np.vstack(rows) if rows else np.zeros((0, h.size))
    passed = PassedOn(p_all, tuple(row_unit), tuple(row_id), tuple(future),
                      tuple(future_unit), {})
    return passed, fallback if not fallback else _named(fallback, fallback_unit)


def _named(streams: list[ArrivalStream], units: list[str]) -> list[ArrivalStream]:
    """The fallback streams, each remembering its sender (``transfer_from``)."""
    return [TransferStream(**{**s.__dict__, "transfer_from": u})
            for s, u in zip(streams, units, strict=True)]


@dataclass(frozen=True)
class TransferStream(ArrivalStream):
    """A fallback stream of transfers in from one sending unit (R's own emergency
    component; ``transfer_from`` names the sender for ``transfers_in``)."""

    transfer_from: str = ""


def fallback_means(streams: Sequence[ArrivalStream], census_at: np.ndarray
                   ) -> dict[str, np.ndarray]:
    """Expected patients of each fallback stream still in at each instant (before any
    arrival is turned away at the ceiling)."""
    out: dict[str, np.ndarray] = {}
    for s in streams:
        unit = getattr(s, "transfer_from", "")
        if unit:
            out[unit] = out.get(unit, 0.0) + stream_presence(s, census_at).sum(axis=0)
    return out


def _sender_curves(payload: dict[str, Any], los: LosModel, state: UnitState, h: np.ndarray
                   ) -> tuple[np.ndarray, np.ndarray, Any]:
    """The leaving grid u (the receiver's census instants among its instants), the sender's
    current patients' chance of being still in at each u (1 at u[0] = as_of), and their
    predictions. Read off the curves the sender's own forecast asks for (on its grid, with
    its census instants; ``stay_grid``), linear in time between its instants, when they
    reach the receiver's last census instant; otherwise asked on the receiver's grid."""
    own, predicted = predicted_on_grid(payload, los, state, own_census_offsets(state, h.size))
    if own[-1] >= h.max(initial=0.0):
        u = np.union1d(own, h)
        return u, on_instants(own, predicted.p_present, u), predicted
    u, predicted = predicted_on_grid(payload, los, state, h)
    return u, np.hstack([np.ones((len(predicted.stay_ids), 1)), predicted.p_present]), predicted


def _from_sender(receiver: UnitState, sender: Sender, h: np.ndarray, g_r: Any,
                 span: list[date], hourly: Any
                 ) -> tuple[np.ndarray, list[str], list[tuple[np.ndarray, float | None]]]:
    """One sender's Bernoulli rows (current patients, then bookings) and its arrival
    streams' presence in R."""
    assert sender.state is not None and sender.payload is not None
    state, payload = sender.state, sender.payload
    s_los = LosModel.of(payload)
    s_routing = Routing.from_payload(payload)
    assert s_routing is not None
    target = receiver.unit
    u, p_in, predicted = _sender_curves(payload, s_los, state, h)
    n = len(predicted.stay_ids)
    rows = [np.zeros((0, h.size))]
    ids: list[str] = []
    if n:
        share = np.array([s_routing.to_unit(target, g) for g in predicted.admission_group])
        rows.append(share[:, None] * passed_presence(p_in, u, h, g_r.sf))
        ids.extend(predicted.stay_ids)
    span_days = float(h.max()) + 0.25 if h.size else 1.0
    kernel = tandem_kernel(g_r.sf, span_days)
    through: dict[int, np.ndarray] = {}

    def tandem(parts: list[tuple[float, int]]) -> TandemStay:
        """The tandem stay of S's groups ``(weight, group)``: each group's term (its stay
        through R's kernel, ``TandemStay.on_kernel``) made once, then weighted."""
        h_x = np.zeros(kernel[0].size)
        for weight, group in parts:
            if weight <= 0:
                continue
            if group not in through:
                law = s_los.groups.get(group).distribution
                through[group] = TandemStay.on_kernel([(1.0, law.sf)], kernel).h
            h_x += weight * through[group]
        return TandemStay(kernel[0], h_x)

    bookings = state.open_bookings()
    bookings = bookings.loc[bookings["planned_date"] <= span[-1]] if len(bookings) else bookings
    if len(bookings):
        from app.forecast.service import _booked

        booked = _booked(state, s_los, payload["arrivals"]["elective"], span[-1])
        covariates = s_los.design.covariate_matrix(bookings.assign(admission_type="elective"))
        for j, (row, a, b_id) in enumerate(zip(covariates, booked.admit_at,
                                               bookings["booking_id"], strict=True)):
            # The groups the booking's known values allow (as its own unit's forecast).
            through_r = tandem([(w * s_routing.to_unit(target, g), g) for g, w in
                                s_los.groups.leaves_given(row, "elective").items()])
            rows.append((booked.p_go[j] * through_r.sf(h - a))[None, :])
            ids.append(f"booking:{b_id}")
    streams = []
    arrivals = payload["arrivals"]
    for kind, means, profile, size in (
            ("emergency", emergency_means(state, arrivals, span),
             arrivals["emergency"]["hour_profile"],
             DailyRateModel.from_dict(arrivals["emergency"]["rate"]).size),
            ("elective", unbooked_means(arrivals["elective"], span,
                                        state.as_of.tz_convert(state.tz).to_pydatetime()),
             arrivals["elective"]["hour_profile"], None)):
        weights = [(g.share.get(kind, 0.0) * s_routing.to_unit(target, g.node), g.node)
                   for g in s_los.groups.groups]
        if sum(w for w, _ in weights) <= 0:
            continue
        stay = tandem(weights)
        stream = hourly(kind, state, span[0], means, profile, size, stay)
        streams.append((stream_presence(stream, h), size))
    return np.vstack(rows), ids, streams
