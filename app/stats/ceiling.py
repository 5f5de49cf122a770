"""The unit's ceiling: the occupancy at which it stops admitting emergencies, learnt from the
admission chance by occupancy level, with an allowance for discharges recorded late.

An emergency that finds the unit full is turned away and leaves no row, so the admissions per
demand-day, read by the occupancy level found at arrival, are a step: the open rate below the
ceiling, (nearly) nothing at and above it. :func:`step_ceiling` fits that step as a Poisson
change point over the ordered levels: the admissions at the levels below a candidate ceiling
and at those from it on each have a rate of their own (their count over their demand-days),
and the ceiling is the candidate of largest likelihood among those where the rate above is
below ``admit_share`` of the rate below (an arrival there is more likely turned away than
admitted) over at least ``min_days`` of demand. One night of escalation beds far above the
ceiling barely moves the likelihood, so it does not loosen the ceiling, as the single largest
overflow would.

Discharges recorded some hours after the patient left make the occupancy read from the
recorded times too high exactly when the unit admits (afternoons, after the rounds): the
admitted patient seems to have found the unit at or over its ceiling, the step softens, and a
rule that reads one level at a time learns a ceiling a few beds too high. :func:`best_ceiling`
reads the occupancy with every recorded discharge moved earlier by each allowance of a grid and
keeps the allowance whose step has the largest likelihood: the same admission instants
explained by the occupancy that best separates open from full. A unit that records discharges
on time keeps an allowance of 0 (moving them earlier then blurs the step).
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

# An arrival at or above the ceiling is more likely turned away than admitted.
ADMIT_SHARE = 0.5
# The levels from the ceiling on must have been held for this many days of demand
# (clock-profile weighted) to say anything about the admission chance there.
MIN_LEVEL_DAYS = 1.0
# Allowances for late recording tried (minutes): up to half a day, in half hours.
LAG_GRID_MINUTES = tuple(range(0, 12 * 60 + 1, 30))


@dataclass(frozen=True)
class StepFit:
    """The ceiling beyond staffed beds and the step's Poisson log-likelihood (None: no level
    qualified; ``excess`` is then the highest level admitted at, plus one)."""

    excess: int
    log_likelihood: float | None


@dataclass(frozen=True)
class Ceiling:
    """The learnt ceiling beyond staffed beds and the allowance (minutes) by which recorded
    discharges are moved earlier to read the occupancy that it applies to."""

    excess: int
    lag_minutes: int
    log_likelihood: float | None


def _poisson_part(count: float, exposure: float) -> float:
    """Maximised Poisson log-likelihood of ``count`` events over ``exposure`` (rate = their
    ratio), without the data's constant term."""
    if count <= 0:
        return 0.0
    return float(count * np.log(count / exposure) - count)


def step_ceiling(admitted_over: npt.ArrayLike, time_over: npt.ArrayLike,
                 time_days: npt.ArrayLike, *, admit_share: float = ADMIT_SHARE,
                 min_days: float = MIN_LEVEL_DAYS) -> StepFit:
    """The ceiling beyond staffed beds as the change point of the admission rate by level.

    ``admitted_over``: occupancy minus staffed beds just before each emergency admission;
    ``time_over`` and ``time_days``: the same level at instants of a regular grid and the days
    of demand each stands for. Candidates are the levels c >= 0; the one kept has the largest
    likelihood among those whose rate from c on is below ``admit_share`` of the rate below c
    over at least ``min_days`` of demand from c on. Without one: the highest level admitted at,
    plus one (at least 0)."""
    admitted = np.asarray(admitted_over, dtype=np.int64)
    levels = np.asarray(time_over, dtype=np.int64)
    weight = np.asarray(time_days, dtype=float)
    fallback = StepFit(max(0, int(admitted.max(initial=-1)) + 1), None)
    if not admitted.size or not levels.size:
        return fallback
    low = min(int(admitted.min()), int(levels.min()), 0)
    n_levels = max(int(admitted.max()), int(levels.max())) - low + 2
    count = np.cumsum(np.bincount(admitted - low, minlength=n_levels))
    exposure = np.cumsum(np.bincount(levels - low, weights=weight, minlength=n_levels))
    total_n, total_e = float(count[-1]), float(exposure[-1])
    best: StepFit | None = None
    best_ll = -np.inf
    for i in range(-low, n_levels):
        # Below c = low + i: the levels low .. c - 1, i.e. the first i bins.
        n_below = float(count[i - 1]) if i > 0 else 0.0
        e_below = float(exposure[i - 1]) if i > 0 else 0.0
        n_above, e_above = total_n - n_below, total_e - e_below
        if e_below <= 0 or n_below <= 0 or e_above < min_days:
            continue
        if n_above / e_above >= admit_share * n_below / e_below:
            continue
        ll = _poisson_part(n_below, e_below) + _poisson_part(n_above, e_above)
        if best is None or ll > best_ll:
            best, best_ll = StepFit(low + i, ll), ll
    return fallback if best is None else best


Levels = tuple[npt.NDArray[np.int64], npt.NDArray[np.int64], npt.NDArray[np.float64]]


def best_ceiling(levels_for_lag: Callable[[int], Levels],
                 lags: Iterable[int] = LAG_GRID_MINUTES, *,
                 admit_share: float = ADMIT_SHARE, min_days: float = MIN_LEVEL_DAYS) -> Ceiling:
    """The ceiling and the recording-lag allowance of largest step likelihood.

    ``levels_for_lag(minutes)``: the arguments of :func:`step_ceiling` (levels at the emergency
    admissions, levels on the grid and the grid's demand-days) with every recorded discharge
    moved ``minutes`` earlier. The likelihoods compare one model of the same admission instants
    under different readings of the occupancy; on a tie the smaller allowance is kept. Without
    a step at any allowance: the fallback of the allowance 0."""
    fits = [Ceiling(fit.excess, int(minutes), fit.log_likelihood)
            for minutes in lags
            for fit in [step_ceiling(*levels_for_lag(int(minutes)), admit_share=admit_share,
                                     min_days=min_days)]]
    if not fits:
        raise ValueError("lags: at least one allowance is needed")
    stepped = [(f.log_likelihood, f) for f in fits if f.log_likelihood is not None]
    if not stepped:
        return Ceiling(fits[0].excess, 0, None)
    # max keeps the first of equal likelihoods: the smaller allowance on a tie.
    return max(stepped, key=lambda pair: pair[0])[1]
