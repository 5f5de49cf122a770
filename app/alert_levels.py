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
RISK_SHORT = "chance over staffed beds"

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
