"""The hospital's total census on each night, from the units' forecasts.

A total is not the sum of the units' medians (nor of their bands): its distribution is the
convolution of the units' pmfs for the same night. A patient a unit passes on is counted once:
a receiving unit's forecast lists, per night, each current patient of a sending unit that may
be in it by then (``moved_in``: the chance q_i), and the sending unit's forecast gives the
same patient's chance p_i of still being there. Being in one excludes being in the other, so
the patient is one Bernoulli with p_i + q_i in the total, not two independent ones: the same
mean, and a variance smaller by 2 p_i q_i. Without ceilings the units' pmfs are convolutions
with those Bernoullis and could be divided by them exactly, but a unit at its ceiling folds
its pmf (arrivals turned away, transfers waiting), and dividing then fails. So the total is
the convolution of the units' pmfs squeezed about its mean to the variance without the double
count (:func:`with_variance`): mean and variance exact given the units' pmfs, the shape
approximate. Units are otherwise treated as independent; a hospital-wide surge moves them
together, so the true spread of the total is likely wider than this one. Also ignored:
patients still to come who pass through two units within the week (counted in each unit
independently) and bookings of a sending unit that the receiving unit expects.

Nights are matched by name (app/nights.py), not by instant, so a unit counting
at 23:00 and one counting at 00:00 add up to the same "Fri night".
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np

from app.nights import Night, night_of
from app.stats.poisson_binomial import convolve_pmfs, pmf_mean, pmf_quantile, pmf_sf_over

LEVELS = (0.1, 0.5, 0.9)


@dataclass(frozen=True)
class NightTotal:
    night: Night  # named from the first unit's census instant; the evening is shared
    units: tuple[str, ...]
    median: int
    band80: tuple[int, int]
    mean: float
    beds: int | None
    p_over: float | None  # chance the total exceeds the total staffed beds
    variance: float = 0.0


def nights_of(forecast: dict[str, Any], tz: ZoneInfo) -> list[Night]:
    """The night each census day of a forecast counts."""
    return [night_of(datetime.fromisoformat(d["census_at"]), tz) for d in forecast["days"]]


def total_by_night(forecasts: dict[str, dict[str, Any]], tz: ZoneInfo) -> list[NightTotal]:
    """Each night every unit's forecast covers, in order, with the total's median, 80% band
    and chance over the summed staffed beds. ``forecasts`` maps unit code to forecast JSON."""
    if not forecasts:
        return []
    by_unit: dict[str, dict[date, tuple[Night, dict[str, Any]]]] = {}
    for unit, forecast in forecasts.items():
        by_unit[unit] = {n.evening: (n, d)
                         for n, d in zip(nights_of(forecast, tz), forecast["days"], strict=True)}
    units = tuple(sorted(by_unit))
    shared = sorted(set.intersection(*(set(v) for v in by_unit.values())))
    out = []
    for evening in shared:
        days = [by_unit[u][evening][1] for u in units]
        pmf = convolve_pmfs(*(np.asarray(d["pmf"], dtype=float) for d in days))
        overlap = _moved_covariance(forecasts, by_unit, units, evening)
        if overlap > 0:
            pmf = with_variance(pmf, _moments(pmf)[1] - 2.0 * overlap)
        beds_each = [d["beds"] for d in days]
        beds = None if any(b is None for b in beds_each) else int(sum(beds_each))
        low, median, high = (int(v) for v in np.atleast_1d(pmf_quantile(pmf, LEVELS)))
        out.append(NightTotal(
            night=by_unit[units[0]][evening][0], units=units, median=median,
            band80=(low, high), mean=float(pmf_mean(pmf)), beds=beds,
            p_over=None if beds is None else float(pmf_sf_over(pmf, beds)),
            variance=_moments(pmf)[1]))
    return out



def _moments(pmf: np.ndarray) -> tuple[float, float]:
    k = np.arange(pmf.size)
    mean = float((k * pmf).sum())
    return mean, float((k**2 * pmf).sum() - mean**2)


def with_variance(pmf: np.ndarray, variance: float) -> np.ndarray:
    """A pmf on the integers with the same mean as ``pmf`` and the given smaller variance.

    Each count x moves to m + c (x - m) (m the mean) and its mass is split between the two
    integers around it in proportion to closeness, which keeps the mean and adds
    f (1 - f) to the variance where f is the fractional part; c in [0, 1] is found by
    bisection so that the variance is the one asked for (within 1e-10)."""
    p = np.asarray(pmf, dtype=float)
    k = np.arange(p.size)
    mean = float((k * p).sum())
    current = float((k**2 * p).sum() - mean**2)
    if variance >= current or p.size < 2:
        return p

    def squeezed(c: float) -> tuple[np.ndarray, float]:
        x = mean + c * (k - mean)
        low = np.floor(x).astype(int)
        frac = x - low
        out = np.zeros(p.size + 1)
        np.add.at(out, low, p * (1 - frac))
        np.add.at(out, np.minimum(low + 1, p.size), p * frac)
        kk = np.arange(out.size)
        m = float((kk * out).sum())
        return out, float((kk**2 * out).sum() - m**2)

    lo, hi = 0.0, 1.0
    out, var = squeezed(hi)
    for _ in range(60):
        mid = (lo + hi) / 2
        out, var = squeezed(mid)
        if abs(var - variance) < 1e-10:
            break
        lo, hi = (mid, hi) if var < variance else (lo, mid)
    nonzero = np.flatnonzero(out > 0)
    out = out[: int(nonzero[-1]) + 1]
    return out / out.sum()


def _p_in(forecast: dict[str, Any], k: int) -> dict[str, float]:
    return {str(s["stay_id"]): float(s["p_present"][k]) for s in forecast.get("stays", [])
            if len(s.get("p_present", [])) > k}


def _moved_covariance(forecasts: dict[str, dict[str, Any]],
                      by_unit: dict[str, dict[date, tuple[Night, dict[str, Any]]]],
                      units: tuple[str, ...], evening: date) -> float:
    """Sum over patients passed on of p_i q_i: the convolution of independent units counts
    each such patient as B(p_i) + B(q_i), whose variance exceeds that of the one Bernoulli
    B(p_i + q_i) by 2 p_i q_i (module docstring)."""
    total = 0.0
    for receiver in units:
        moved = by_unit[receiver][evening][1].get("moved_in") or {}
        for sender, rows in moved.items():
            if sender not in by_unit or sender == receiver:
                continue
            day = by_unit[sender][evening][1]
            p_in = _p_in(forecasts[sender], forecasts[sender]["days"].index(day))
            total += sum(p_in.get(str(stay_id), 0.0) * float(q) for stay_id, q in rows.items())
    return total
