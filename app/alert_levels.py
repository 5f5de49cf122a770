"""Alert levels: the chance of more patients than staffed beds that a unit treats as a
warning and as an alarm, and the one wording every page, sheet and command uses for it.

A unit's bed manager sets its levels (stored on the unit, audited); a unit without its own
uses the site's defaults below. The defaults are common practice with no published source:
a one-in-ten chance is worth a look at the huddle, one in four calls for action.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

DEFAULT_WARNING = 0.10
DEFAULT_ALARM = 0.25
# The one name of the idea, everywhere (tiles, tables, charts, sentences, CLI).
RISK_TERM = "chance of more patients than staffed beds"

Level = Literal["calm", "warning", "alarm"]


@dataclass(frozen=True)
class AlertLevels:
    warning: float = DEFAULT_WARNING
    alarm: float = DEFAULT_ALARM

    def __post_init__(self) -> None:
        if not (0.0 < self.warning < self.alarm <= 1.0):
            raise ValueError("alert levels need 0 < warning < alarm <= 1")

    def level(self, p_over: float) -> Level:
        """``alarm`` at or above the alarm level, ``warning`` at or above the warning level."""
        if p_over >= self.alarm:
            return "alarm"
        if p_over >= self.warning:
            return "warning"
        return "calm"


def levels_of(warning: float | None, alarm: float | None) -> AlertLevels:
    """A unit's stored levels, each falling back to the site default when not set."""
    return AlertLevels(DEFAULT_WARNING if warning is None else warning,
                       DEFAULT_ALARM if alarm is None else alarm)


# A patient is marked as likely to leave by a night when the chance is this or more: "more
# likely than not" (common practice, no source). Every page that highlights states it.
LIKELY_TO_LEAVE = 0.5


def percent(p: float, levels: AlertLevels | None = None) -> str:
    """``14%``; with one decimal when whole percent would put ``p`` on the wrong side of a
    level (9.6% below a 10% warning level reads "10%" otherwise)."""
    if 0 < p < 0.005:
        return "<1%"
    if 0.995 < p < 1:
        return ">99%"
    whole = f"{p * 100:.0f}%"
    if levels is not None:
        for level in (levels.warning, levels.alarm):
            rounded = round(p * 100)
            if rounded == round(level * 100) and (p >= level) != (rounded >= level * 100):
                return f"{p * 100:.1f}%"
    return whole


def level_phrase(p_over: float, levels: AlertLevels) -> str:
    """Where ``p_over`` stands against the unit's levels, in words."""
    found = levels.level(p_over)
    if found == "calm":
        return f"below this unit's {percent(levels.warning)} warning level"
    level = levels.alarm if found == "alarm" else levels.warning
    where = "at" if p_over == level else "above"
    return f"{where} this unit's {percent(level)} {found} level"


def risk_sentence(night_name: str, p_over: float, beds: int | None, levels: AlertLevels) -> str:
    """``Fri night: 14% chance of more patients than 16 staffed beds, above this unit's 10%
    warning level``."""
    beds_text = "staffed beds" if beds is None else f"{beds} staffed beds"
    return (f"{night_name}: {percent(p_over, levels)} chance of more patients than {beds_text}, "
            f"{level_phrase(p_over, levels)}")
