"""Exit block: how a full receiving unit holds back patients ready to leave the sending one.

A patient flagged ready to move on waits in the sending unit until the receiving unit has a
bed. Each wait, from the flag to the transfer (or, censored, to as_of or to leaving for
somewhere else), is split into the time the receiving unit was full and the time it had room.
With a constant transfer rate in each of the two states (a piecewise-constant hazard) the
maximum likelihood rate of a state is its transfers over its exposure, exactly as a Poisson
regression with log exposure as offset and the state as the only covariate would give
(McCullagh and Nelder, Generalized Linear Models, 2nd ed. 1989, section 6.2: the Poisson
likelihood of a piecewise exponential model).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy.stats import chi2

FloatArray = npt.NDArray[np.float64]


@dataclass(frozen=True)
class StateRate:
    """Transfers per day of waiting in one state of the receiving unit, with an exact 95%
    interval (Garwood 1936: chi-square quantiles of the Poisson count)."""

    events: int
    exposure_days: float

    @property
    def rate(self) -> float | None:
        return self.events / self.exposure_days if self.exposure_days > 0 else None

    @property
    def interval(self) -> tuple[float, float] | None:
        if self.exposure_days <= 0:
            return None
        low = 0.0 if self.events == 0 else chi2.ppf(0.025, 2 * self.events) / 2
        high = chi2.ppf(0.975, 2 * self.events + 2) / 2
        return float(low / self.exposure_days), float(high / self.exposure_days)

    def to_dict(self) -> dict[str, float | int | None]:
        interval = self.interval
        return {"events": self.events, "exposure_days": self.exposure_days,
                "rate_per_day": self.rate,
                "low": None if interval is None else interval[0],
                "high": None if interval is None else interval[1]}


@dataclass(frozen=True)
class ExitBlock:
    """The transfer rate of a ready patient while the receiving unit has room and while it is
    full; ``waits`` is how many waits (flag to transfer or censoring) they come from."""

    with_room: StateRate
    when_full: StateRate
    waits: int

    @property
    def slowdown(self) -> float | None:
        """How many times slower a ready patient moves on while the receiving unit is full
        (None when either rate is unknown or the full-state rate is zero)."""
        room, full = self.with_room.rate, self.when_full.rate
        if room is None or full is None or full <= 0:
            return None
        return room / full

    def to_dict(self) -> dict[str, object]:
        return {"with_room": self.with_room.to_dict(), "when_full": self.when_full.to_dict(),
                "waits": self.waits}

    @classmethod
    def from_dict(cls, payload: dict[str, dict[str, float]] | dict[str, object]) -> ExitBlock:
        def state(d: object) -> StateRate:
            assert isinstance(d, dict)
            return StateRate(int(d["events"]), float(d["exposure_days"]))
        return cls(state(payload["with_room"]), state(payload["when_full"]),
                   int(payload["waits"]))  # type: ignore[call-overload]


def full_time_before(t: npt.ArrayLike, change_at: npt.ArrayLike, full_after: npt.ArrayLike
                     ) -> FloatArray:
    """Time the receiving unit had been full before each instant ``t`` (since the first change).

    ``change_at`` (increasing) are the instants its state changes and ``full_after`` whether it
    is full from each of them until the next; before the first change it counts as having room.
    """
    at = np.asarray(change_at, dtype=float)
    full = np.asarray(full_after, dtype=bool)
    if at.size == 0:
        return np.zeros(np.shape(t))
    if at.size != full.size:
        raise ValueError(f"full_after: needs one state per change ({at.size}), got {full.size}")
    if np.any(np.diff(at) < 0):
        raise ValueError("change_at: must be increasing")
    spans = np.diff(at) * full[:-1]
    cumulative = np.r_[0.0, np.cumsum(spans)]
    query = np.asarray(t, dtype=float)
    k = np.clip(np.searchsorted(at, query, side="right") - 1, 0, at.size - 1)
    since = np.clip(query - at[k], 0.0, None) * full[k]
    return np.where(query <= at[0], 0.0, cumulative[k] + since)


def full_at(t: npt.ArrayLike, change_at: npt.ArrayLike, full_after: npt.ArrayLike
            ) -> npt.NDArray[np.bool_]:
    """Whether the receiving unit was full just before each instant ``t``."""
    at = np.asarray(change_at, dtype=float)
    full = np.asarray(full_after, dtype=bool)
    if at.size == 0:
        return np.zeros(np.shape(t), dtype=bool)
    k = np.searchsorted(at, np.asarray(t, dtype=float), side="left") - 1
    return np.where(k >= 0, full[np.clip(k, 0, None)], False)


def exit_block_rates(start: npt.ArrayLike, end: npt.ArrayLike, moved: npt.ArrayLike,
                     change_at: npt.ArrayLike, full_after: npt.ArrayLike, *,
                     full_then: npt.ArrayLike | None = None) -> ExitBlock:
    """Transfer rates while the receiving unit has room and while it is full.

    Parameters
    ----------
    start, end : array_like, shape (n,)
        Each wait's flag instant and its end (the transfer, or where it is censored), in days
        on any common origin; ``end >= start``.
    moved : array_like of bool, shape (n,)
        True where the wait ended by the transfer to the receiving unit.
    change_at, full_after : array_like
        The receiving unit's state as a step function (:func:`full_time_before`).
    full_then : array_like of bool, shape (n,), optional
        Whether each transfer counts as made while the receiving unit was full; by default
        its state just before ``end`` (:func:`full_at`). Data whose discharge and transfer
        share an instant need the caller's answer (a bed freed and filled at once).

    Returns
    -------
    ExitBlock
    """
    s = np.asarray(start, dtype=float)
    e = np.asarray(end, dtype=float)
    event = np.asarray(moved, dtype=bool)
    if not (s.shape == e.shape == event.shape):
        raise ValueError(f"start, end, moved: need one shape, got {s.shape}, {e.shape}, "
                         f"{event.shape}")
    if np.any(e < s):
        raise ValueError("end: a wait cannot end before it starts")
    full_time = full_time_before(e, change_at, full_after) - full_time_before(s, change_at,
                                                                             full_after)
    total = float(np.sum(e - s))
    full_exposure = float(np.sum(full_time))
    full_then = (full_at(e, change_at, full_after) if full_then is None
                 else np.asarray(full_then, dtype=bool))
    return ExitBlock(
        with_room=StateRate(int(np.sum(event & ~full_then)), total - full_exposure),
        when_full=StateRate(int(np.sum(event & full_then)), full_exposure),
        waits=int(s.size))
