"""Patients a sending unit passes on, present in a receiving unit at its census instants.

A patient of the sending unit S leaves it at a random time T_S; with probability r (the
routing share of the patient's group to the receiving unit R) the patient then starts a stay
T_R in R. The patient is in R at t exactly when T_S <= t < T_S + T_R and the move went to R:

    q(t) = r * integral_0^t f_S(u) G_R(t - u) du,

with G_R the survival of R's stay. The integral is taken on a grid of leaving instants
u_0 = 0 < u_1 < ... (leaving in (u_{j-1}, u_j] counts as leaving at the bin's midpoint),
so for a current patient whose chance of being still in S is P(u_j) on the grid,
q(t_k) = r * sum_{u_j <= t_k} [P(u_{j-1}) - P(u_j)] G_R(t_k - m_j).

Each current patient of S is a Bernoulli in R's count, independent of the others (the
patients' stays are independent in the forecast); so are S's bookings. S's arrivals still to
come form, per arrival day, a thinned Poisson (or negative binomial sharing the day's rate:
``app.stats.occupancy.stream_presence``) with the tandem survival h(x) = r * integral f_S G_R
in place of a stay's survival. Where both stays are exponential with rates mu_S and mu_R and
arrivals Poisson with rate lambda, the count in R is Poisson with mean
lambda r / mu_R at steady state: the infinite-server tandem's product form (Jackson 1957,
Operations Research 5:518-521; Little 1961, Operations Research 9:383-387).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np
import numpy.typing as npt

from app.stats.poisson_binomial import (
    convolve_pmfs,
    negative_binomial_pmf,
    poisson_binomial_pmf,
    poisson_pmf,
)

FloatArray = npt.NDArray[np.float64]
Survival = Callable[[FloatArray], FloatArray]


def leaving_grid(census_at: npt.ArrayLike, step: float) -> FloatArray:
    """Leaving instants 0 < u_1 < ... every ``step`` days up to the last census instant, with
    every census instant among them (so no bin straddles one)."""
    h = np.asarray(census_at, dtype=float)
    if not h.size:
        return np.zeros(1)
    regular = np.arange(step, float(h.max()) + step / 2, step)
    return np.union1d(np.r_[0.0, regular[regular < h.max()]], h)


def passed_presence(p_in_sender: npt.ArrayLike, grid: npt.ArrayLike, census_at: npt.ArrayLike,
                    receiving_sf: Survival) -> FloatArray:
    """(patients, instants) chance each current patient of S has left S and is still in R
    at each census instant, before the routing share (module docstring).

    ``p_in_sender``: (patients, len(grid)) chance of being still in S at each grid instant,
    ``grid[0] = 0`` (as_of, where it is 1); ``receiving_sf``: G_R at an array of lags."""
    u = np.asarray(grid, dtype=float)
    h = np.asarray(census_at, dtype=float)
    p = np.minimum.accumulate(np.clip(np.asarray(p_in_sender, dtype=float)
                                      .reshape(-1, u.size), 0.0, 1.0), axis=1)
    if u.size < 2 or not p.shape[0]:
        return np.zeros((p.shape[0], h.size))
    leave = p[:, :-1] - p[:, 1:]                        # (patients, bins)
    mid = (u[:-1] + u[1:]) / 2.0
    lag = h[None, :] - mid[:, None]                    # (bins, instants)
    ended = u[1:, None] <= h[None, :] + 1e-12
    g = np.where(ended, _sf_on(receiving_sf, np.where(ended, lag, 0.0)), 0.0)
    return np.asarray(leave @ g, dtype=float)


def _sf_on(sf: Survival, lags: FloatArray) -> FloatArray:
    flat = np.round(lags.ravel(), 9)
    unique, inverse = np.unique(flat, return_inverse=True)
    return np.asarray(sf(unique), dtype=float)[inverse].reshape(lags.shape)


def tandem_kernel(receiving_sf: Survival, span: float, step: float = 1.0 / 24.0
                  ) -> tuple[FloatArray, FloatArray]:
    """The grid x = 0, step, ..., span and G_R(x_n - m_j) for leaving bins j ending by x_n
    (zero otherwise): what every tandem stay into the same receiving unit shares."""
    x = np.arange(0.0, span + step, step)
    # The lag from bin j's midpoint to x_n is (n - j - 0.5) steps: G_R is needed only at
    # those x.size lags, and bin j counts at x_n once it has ended (n >= j + 1).
    apart = np.arange(x.size)[None, :] - np.arange(x.size - 1)[:, None]     # (bins, x)
    g_at = np.asarray(receiving_sf(np.maximum(np.arange(x.size) - 0.5, 0.0) * step),
                      dtype=float)
    return x, np.where(apart >= 1, g_at[np.clip(apart, 0, x.size - 1)], 0.0)


@dataclass(frozen=True)
class TandemStay:
    """The "stay" of a patient who arrives in S and goes on to R, seen from R: its ``sf(x)``
    is the chance of being in R x days after arriving in S, h(x) = sum_g w_g r_g
    integral_0^x f_g(u) G_R(x - u) du (S's groups g with their shares w_g among arrivals
    and routing shares r_g to R), tabulated on a grid of ``step`` days up to ``span``."""

    x: FloatArray
    h: FloatArray

    @classmethod
    def of(cls, parts: Sequence[tuple[float, Any]], receiving_sf: Survival, span: float,
           step: float = 1.0 / 24.0) -> TandemStay:
        """``parts``: (w_g r_g, survival of the stay in S) per group of S."""
        return cls.on_kernel(parts, tandem_kernel(receiving_sf, span, step))

    @classmethod
    def on_kernel(cls, parts: Sequence[tuple[float, Any]],
                  kernel: tuple[FloatArray, FloatArray]) -> TandemStay:
        """As :meth:`of`, with R's survival already tabulated (:func:`tandem_kernel`)."""
        x, g = kernel
        h = np.zeros(x.size)
        for weight, sender_sf in parts:
            if weight <= 0:
                continue
            s = np.minimum.accumulate(np.asarray(sender_sf(x), dtype=float))
            h += weight * ((s[:-1] - s[1:]) @ g)
        return cls(x, h)

    def sf(self, lags: npt.ArrayLike) -> FloatArray:
        t = np.asarray(lags, dtype=float)
        return np.where(t >= 0, np.interp(t, self.x, self.h, right=0.0), 0.0)


@dataclass(frozen=True)
class PassedOn:
    """What the sending units pass on to one receiving unit, at its K census instants.

    ``p``: (rows, K) Bernoulli chances (current patients and bookings of the senders);
    ``row_unit``/``row_id``: each row's sender and stay (or booking) id; ``future``: per
    sender stream, its (arrival days, K) expected presence in R and the negative binomial
    size of a day's count (None: Poisson); ``future_unit``: each stream's sender;
    ``fallback_means``: per sender whose patients come as a stream of R's own (no model of
    the sender at as_of), its expected presence at each instant (those arrivals are in R's
    streams, not here)."""

    p: FloatArray
    row_unit: tuple[str, ...]
    row_id: tuple[str, ...]
    future: tuple[tuple[FloatArray, float | None], ...] = ()
    future_unit: tuple[str, ...] = ()
    fallback_means: Mapping[str, FloatArray] = field(default_factory=dict)

    @property
    def n_instants(self) -> int:
        return int(self.p.shape[1])

    @cached_property
    def _rows_pmf(self) -> FloatArray:
        """(K, rows + 1) the Bernoulli rows' count at every instant."""
        return poisson_binomial_pmf(self.p)

    def pmf(self, k: int) -> FloatArray:
        """The count passed on and still in R at instant k (Poisson-binomial and the streams'
        day-by-day counts, convolved)."""
        parts = [self._rows_pmf[k]]
        for presence, size in self.future:
            day_means = presence[:, k]
            if size is None:
                parts.append(poisson_pmf(float(day_means.sum())))
            else:
                parts.extend(negative_binomial_pmf(float(m), size) for m in day_means if m > 0)
        return convolve_pmfs(*parts)

    def mean(self, k: int) -> float:
        return float(self.p[:, k].sum() + sum(float(f[:, k].sum()) for f, _ in self.future))

    def by_unit(self, k: int, admitted: float | None = None,
                stream_share: float = 1.0) -> dict[str, float]:
        """Expected patients present at instant k by sending unit (fallback streams too).

        ``admitted``: the expected number of the passed-on patients actually in after the
        receiving unit's ceiling (the rest wait in their units); each sender's part is
        scaled to it. ``stream_share``: the share of the receiving unit's emergency streams
        still in after its ceiling turned arrivals away, applied to the fallback streams."""
        out: dict[str, float] = {}
        total = self.mean(k)
        scale = 1.0 if admitted is None or total <= 0 else admitted / total
        for unit, row in zip(self.row_unit, self.p[:, k], strict=True):
            out[unit] = out.get(unit, 0.0) + float(row) * scale
        for unit, (presence, _) in zip(self.future_unit, self.future, strict=True):
            out[unit] = out.get(unit, 0.0) + float(presence[:, k].sum()) * scale
        for unit, means in self.fallback_means.items():
            out[unit] = out.get(unit, 0.0) + float(means[k]) * stream_share
        return out

    def current_rows(self, k: int) -> dict[str, dict[str, float]]:
        """Per sender, each current row's chance at instant k (for the hospital total)."""
        out: dict[str, dict[str, float]] = {}
        for unit, row_id, value in zip(self.row_unit, self.row_id, self.p[:, k], strict=True):
            if value > 0 and not row_id.startswith("booking:"):
                out.setdefault(unit, {})[row_id] = float(value)
        return out


def no_passed_on(n_instants: int) -> PassedOn:
    return PassedOn(np.zeros((0, n_instants)), (), ())
