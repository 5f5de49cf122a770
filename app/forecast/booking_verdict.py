"""The booking check's answer in words: a verdict against the unit's alert levels, the best
days near the requested one, and the weekdays on which the unit admits electives at all.

Pure functions on plain values (the numbers come from ``app.forecast.booking_check``), so
the rules can be read and tested on their own:

- A night of the candidate's likely stay counts against the levels by its chance of more
  patients than staffed beds *with* the booking. The verdict is the worst level any such
  night reaches: "fits" (every night below the warning level), a warning or an alarm. It
  names the first night that reaches that level and says whether the booking raises it there
  or the night was there already.
- Best days: future days (after today) within ``NEAR_DAYS`` of the requested date, on the
  weekdays the unit admits electives, ranked by the worst level reached, then the chance a
  bed is free on the night of admission, then the worst night's chance; the best
  ``BEST_COUNT`` are shown in date order.
- Admission weekdays: the weekdays that saw at least ``ADMITS_SHARE`` of the busiest
  weekday's elective admissions (common practice, no source: a weekday with a stray
  elective or two a year is not a theatre day).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date

from app.alert_levels import AlertLevels, Level, percent

NEAR_DAYS = 7
BEST_COUNT = 3
ADMITS_SHARE = 0.2
_RANK: dict[Level, int] = {"calm": 0, "warning": 1, "alarm": 2}


@dataclass(frozen=True)
class NightRisk:
    """One night of the candidate's likely stay: its name and the chance of more patients
    than staffed beds without and with the booking."""

    name: str
    before: float
    after: float


@dataclass(frozen=True)
class DayOption:
    """A day the candidate could be admitted on, with the nights of its likely stay."""

    day: date
    p_bed_free: float
    nights: tuple[NightRisk, ...]

    def worst(self, levels: AlertLevels) -> tuple[Level, float]:
        """The worst level any night reaches with the booking, and the highest chance."""
        top = max((n.after for n in self.nights), default=0.0)
        return levels.level(top), top


@dataclass(frozen=True)
class Verdict:
    level: Level  # "calm" means it fits
    text: str
    night: str | None  # the night that reaches the level (None when it fits)
    alternative: date | None  # a better day near the requested one, if any


def day_label(day: date) -> str:
    """``Mon 7 Dec``."""
    return f"{day:%a} {day.day} {day:%b}"


def verdict(option: DayOption, levels: AlertLevels,
            alternatives: Sequence[DayOption] = ()) -> Verdict:
    """The answer for ``option`` against ``levels``; ``alternatives`` are the best days in
    rank order (as ``best_days`` ranks them), from which a better one is suggested."""
    level, _ = option.worst(levels)
    if level == "calm":
        return Verdict("calm", f"Fits: no night of the likely stay reaches this unit's "
                       f"{percent(levels.warning)} warning level.", None, None)
    mark = levels.alarm if level == "alarm" else levels.warning
    night = next(n for n in option.nights if n.after >= mark)
    if night.before >= mark:
        what = (f"{night.name} is already above the {level} level "
                f"({percent(night.before, levels)}; {percent(night.after, levels)} with this "
                "booking)")
    else:
        what = (f"raises {night.name} above the {level} level "
                f"({percent(night.before, levels)} to {percent(night.after, levels)})")
    head = "Fits, but" if level == "warning" else "Does not fit well:"
    better = next((a for a in alternatives if a.day != option.day
                   and _RANK[a.worst(levels)[0]] < _RANK[level]), None)
    # "Better" means a lower level: days at the same level may still differ a little in
    # their figures (the best days list them), but none of them avoids this level.
    tail = (f" Consider {day_label(better.day)}." if better is not None
            else f" Every day near it reaches the {level} level too.")
    return Verdict(level, f"{head} {what}.{tail}", night.name,
                   None if better is None else better.day)


def rank_key(option: DayOption, levels: AlertLevels) -> tuple[int, float, float]:
    level, top = option.worst(levels)
    return (_RANK[level], -round(option.p_bed_free, 2), top)


def best_days(options: Sequence[DayOption], requested: date, today: date,
              admits_on: frozenset[int], levels: AlertLevels, *, near: int = NEAR_DAYS,
              count: int = BEST_COUNT) -> tuple[list[DayOption], list[DayOption]]:
    """(the best ``count`` days in rank order, the same in date order) among future days
    within ``near`` days of ``requested`` on the weekdays in ``admits_on``."""
    usable = [o for o in options
              if o.day > today and abs((o.day - requested).days) <= near
              and o.day.weekday() in admits_on]
    ranked = sorted(usable, key=lambda o: (*rank_key(o, levels), o.day))[:count]
    return ranked, sorted(ranked, key=lambda o: o.day)


def admission_weekdays(counts: Sequence[int], share: float = ADMITS_SHARE) -> frozenset[int]:
    """Weekdays (0 = Monday) with at least ``share`` of the busiest weekday's elective
    admissions; every weekday when there were none."""
    if len(counts) != 7:
        raise ValueError("counts: one per weekday, Monday first")
    busiest = max(counts)
    if busiest <= 0:
        return frozenset(range(7))
    return frozenset(w for w, c in enumerate(counts) if c > 0 and c >= share * busiest)
