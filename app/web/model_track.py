"""The model page's track record in plain words: how often the census fell inside the 80%
band of the forecast for tonight, from the forecasts the unit page showed (one a morning) and
from the latest stored backtest.

The census that followed a stored forecast is counted from the stays as known now (the rule
of ``UnitState.occupancy_at``: admitted by the instant and not discharged by it), in one query
for all the instants rather than by loading the unit's whole history.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any
from zoneinfo import ZoneInfo

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.store.models import Stay, StoredForecast
from app.timeutil import as_utc

MORNINGS = 30
# The forecast of a day that counts as its morning's: the first one stored from this hour on
# (a huddle's time; common practice, no source), else the day's first.
MORNING_FROM_HOUR = 6


@dataclass(frozen=True)
class PastForecast:
    as_of: datetime
    census_at: datetime
    median: int
    low80: int
    high80: int
    actual: int

    @property
    def inside(self) -> bool:
        return self.low80 <= self.actual <= self.high80


def _morning_ids(session: Session, unit: str, tz: ZoneInfo, now: datetime,
                 limit: int) -> list[int]:
    """Ids of the stored forecasts that are each local day's morning one, newest day first."""
    rows = session.execute(select(StoredForecast.id, StoredForecast.as_of)
                           .where(StoredForecast.unit == unit, StoredForecast.as_of <= now)
                           .order_by(StoredForecast.as_of.desc())
                           .limit(limit * 48)).all()
    by_day: dict[Any, tuple[int, int]] = {}
    for row_id, as_of in rows:
        local = as_utc(as_of).astimezone(tz)
        rank = (0 if local.hour >= MORNING_FROM_HOUR else 1, local.hour * 60 + local.minute)
        rank_key = rank[0] * 10_000 + rank[1]
        day = local.date()
        if day not in by_day or rank_key < by_day[day][0]:
            by_day[day] = (rank_key, int(row_id))
    days = sorted(by_day, reverse=True)
    return [by_day[d][1] for d in days[:limit + 2]]


def census_counts(session: Session, unit: str, instants: list[datetime]) -> list[int]:
    """Stays in ``unit`` at each past instant, counted from the stays as known now."""
    if not instants:
        return []
    first, last = min(instants), max(instants)
    rows = session.execute(select(Stay.admitted_at, Stay.discharged_at).where(
        Stay.unit == unit, Stay.admitted_at <= last,
        Stay.discharged_at.is_(None) | (Stay.discharged_at > first))).all()
    spans = [(as_utc(a), None if d is None else as_utc(d)) for a, d in rows]
    return [sum(1 for a, d in spans if a <= t and (d is None or d > t)) for t in instants]


def past_forecasts(session: Session, unit: str, tz: ZoneInfo, now: datetime,
                   limit: int = MORNINGS) -> list[PastForecast]:
    """The unit page's morning forecasts whose first census has passed, newest first, beside
    the census that followed (at most ``limit``)."""
    now = as_utc(now)
    ids = _morning_ids(session, unit, tz, now, limit)
    if not ids:
        return []
    payloads = dict(session.execute(select(StoredForecast.id, StoredForecast.payload)
                                    .where(StoredForecast.id.in_(ids))).all())
    found: list[tuple[datetime, datetime, dict[str, Any]]] = []
    for row_id in ids:
        forecast = json.loads(payloads[row_id])
        if not forecast.get("days"):
            continue
        day = forecast["days"][0]
        census = datetime.fromisoformat(day["census_at"]).astimezone(UTC)
        if census <= now:
            found.append((datetime.fromisoformat(forecast["as_of"]), census, day["quantiles"]))
    found = found[:limit]
    actual = census_counts(session, unit, [census for _, census, _ in found])
    return [PastForecast(as_of, census, int(q["0.5"]), int(q["0.1"]), int(q["0.9"]), y)
            for (as_of, census, q), y in zip(found, actual, strict=True)]


def shown_sentence(past: list[PastForecast]) -> str | None:
    """'Of the last 30 mornings' forecasts for tonight, the census fell inside the 80% band
    24 times.'"""
    if not past:
        return None
    inside = sum(p.inside for p in past)
    mornings = "morning's forecast" if len(past) == 1 else f"{len(past)} mornings' forecasts"
    times = "once" if inside == 1 else f"{inside} times"
    return (f"Of the last {mornings} for tonight shown on the unit page, the census fell "
            f"inside the 80% band {times} (about {round(0.8 * len(past))} expected if the "
            "bands are right).")


@dataclass(frozen=True)
class BacktestVerdict:
    tonight: str
    week: str
    against: str | None


BASELINE_NAMES = {"yesterday": "last census carried forward",
                  "same_weekday": "same weekday in recent weeks",
                  "mean_stay": "everyone leaves at their group's mean stay",
                  "one_distribution": "one stay curve for everyone",
                  "time_series": "a seasonal time series (ARIMA)"}


def backtest_verdict(result: dict[str, Any]) -> BacktestVerdict | None:
    """A stored backtest's summary in sentences: the 80% band's hits for tonight and over the
    week, and how Morrow's CRPS compares with the best baseline."""
    methods = result.get("methods", {})
    morrow = methods.get("morrow")
    if not morrow or not morrow.get("by_horizon"):
        return None
    first = morrow["by_horizon"][0]
    n, hits = int(first["n"]), round(first["coverage_80"] * first["n"])
    tonight = (f"Of {n} mornings replayed from {result['from']} to {result['to']}, the census "
               f"that night fell inside the 80% band of the forecast {hits} times "
               f"(about {round(0.8 * n)} expected if the bands are right).")
    whole = morrow["all"]
    week = (f"Over all {int(whole['n'])} forecasts, 1 to {result['days']} nights ahead, "
            f"{round(whole['coverage_80'] * whole['n'])} fell inside the 80% band "
            f"({whole['coverage_80']:.0%}), and the median was off by "
            f"{whole['mae_median']:.1f} patients on average.")
    others = {name: m["all"]["crps"] for name, m in methods.items()
              if name != "morrow" and name in BASELINE_NAMES}
    against = None
    if others:
        best = min(others, key=lambda k: others[k])
        ours, theirs = whole["crps"], others[best]
        if theirs > 0:
            change = (theirs - ours) / theirs
            word = "better" if change > 0 else "worse"
            against = (f"Against the best simple method ({BASELINE_NAMES[best]}), Morrow's "
                       f"forecasts scored {abs(change):.0%} {word} on CRPS "
                       f"({ours:.2f} against {theirs:.2f} patients; lower is better).")
    return BacktestVerdict(tonight, week, against)
