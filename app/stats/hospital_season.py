"""The hospital's yearly pattern of emergency demand, learnt from all its units at once.

A unit with one year of history cannot tell its own season from a change of level, and one
with two years whose level changed in the meantime tells them apart badly (the season
absorbs the change). Winter pressure is usually shared across a hospital's units, so one
annual pair is fitted to every unit's daily emergency counts together, each unit keeping its
own weekday pattern and its own linear drift (which takes up slow changes of level), in one
Poisson GLM:

    log mu_{u,d} = a_{u,weekday(d)} + b_u t_d + c1 cos(2 pi doy/365.25) + c2 sin(2 pi doy/365.25)

with t_d in years before the unit's last day. A unit's demand model may then use (c1, c2) as
a fixed offset, estimating only its own level: whether it helps is decided on the unit's own
held-out weeks (:func:`app.stats.arrivals.choose_demand_terms`), like every other term.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from datetime import date

import numpy as np
import numpy.typing as npt

# The pooled history must span this many days (a year and a half: one full cycle and the
# drifts beside it); shorter, no hospital pattern is offered. Common practice, no source.
HOSPITAL_SEASON_MIN_DAYS = 548
# Fewer units than this (with 14 days each) offer no hospital pattern: one unit's history
# alone gives its own season, which that unit's own candidate already tries.
MIN_UNITS = 2


def annual_angle(days: Sequence[date]) -> npt.NDArray[np.float64]:
    doy = np.array([d.timetuple().tm_yday for d in days], dtype=float)
    return 2 * np.pi * doy / 365.25


def season_offset(days: Sequence[date], pair: tuple[float, float]) -> npt.NDArray[np.float64]:
    """c1 cos + c2 sin of each day's annual angle: the log-scale offset of the pattern."""
    angle = annual_angle(days)
    return pair[0] * np.cos(angle) + pair[1] * np.sin(angle)


def pooled_season(series: Sequence[tuple[Sequence[date], npt.ArrayLike]]
                  ) -> tuple[float, float] | None:
    """The annual pair (c1, c2) shared by the units' daily emergency counts.

    Parameters
    ----------
    series : sequence of (days, counts)
        One per unit: every day of its window, in order, and its count of emergency
        admissions on each.

    Returns
    -------
    (float, float) or None
        None with fewer than ``MIN_UNITS`` units that have at least 14 days and an
        admission, or a pooled span under ``HOSPITAL_SEASON_MIN_DAYS``.
    """
    import statsmodels.api as sm

    # A unit without an emergency admission in its window says nothing of the season (and
    # its weekday effects would run off to minus infinity): it stays out.
    usable = [(list(d), np.asarray(y, dtype=float)) for d, y in series
              if len(d) >= 14 and np.asarray(y).sum() > 0]
    if len(usable) < MIN_UNITS:
        return None
    first = min(d[0] for d, _ in usable)
    last = max(d[-1] for d, _ in usable)
    if (last - first).days + 1 < HOSPITAL_SEASON_MIN_DAYS:
        return None
    n_units = len(usable)
    blocks, outcomes = [], []
    for u, (days, y) in enumerate(usable):
        if y.shape != (len(days),) or np.any(y < 0):
            raise ValueError("counts: one whole number >= 0 per day")
        weekday = np.array([d.weekday() for d in days])
        x = np.zeros((len(days), 8 * n_units + 2))
        x[np.arange(len(days)), 7 * u + weekday] = 1.0              # the unit's weekdays
        x[:, 7 * n_units + u] = np.array([(d - days[-1]).days for d in days]) / 365.25
        angle = annual_angle(days)
        x[:, -2], x[:, -1] = np.cos(angle), np.sin(angle)
        blocks.append(x)
        outcomes.append(y)
    y_all = np.concatenate(outcomes)
    design = np.vstack(blocks)
    # A unit with no admission on some weekday has no finite weekday effect; such columns
    # only slow the fit, so they leave it (the pair is not affected).
    keep = np.r_[y_all @ design[:, : 7 * n_units] > 0, np.ones(n_units + 2, dtype=bool)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = sm.GLM(y_all, design[:, keep], family=sm.families.Poisson()).fit()
    params = np.asarray(fit.params, dtype=float)
    pair = (float(params[-2]), float(params[-1]))
    if not all(math.isfinite(v) for v in pair):
        return None
    return pair
