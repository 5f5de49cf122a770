"""Nights named as people on a ward say them, whatever a unit's census time.

A census taken in the small hours counts the night that began the evening before; one taken
in the late evening counts the night that is starting. So a census at Sat 00:00 and one at
Fri 23:00 are both "Fri night", and every page, chart, sheet and command line names them
alike. The cut is noon: a census before 12:00 local time belongs to the previous evening
(a rule of thumb with no published source: wards call the night by the evening it starts).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime, timedelta
from zoneinfo import ZoneInfo

NIGHT_STARTS_BEFORE_HOUR = 12


@dataclass(frozen=True)
class Night:
    evening: date  # the local date of the evening the night starts
    census_local: datetime  # the census instant on the site's clock

    @property
    def name(self) -> str:
        """``Fri night``."""
        return f"{self.evening:%a} night"

    @property
    def dated_name(self) -> str:
        """``Fri 4 Dec night``: for lists that span more than a week."""
        return f"{self.evening:%a} {self.evening.day} {self.evening:%b} night"

    @property
    def census_label(self) -> str:
        """``census Sat 00:00``: the instant the night's figures count."""
        return f"census {self.census_local:%a %H:%M}"

    def relative_name(self, today: date) -> str:
        """``Tonight`` for the night starting this evening, else the weekday's name."""
        if self.evening == today:
            return "Tonight"
        if self.evening == today - timedelta(days=1):
            return "Last night"
        return self.name


def night_of(census_at: datetime, tz: ZoneInfo) -> Night:
    """The night a census instant (aware) counts, on the site's clock ``tz``."""
    local = census_at.astimezone(tz)
    evening = local.date()
    if local.hour < NIGHT_STARTS_BEFORE_HOUR:
        evening -= timedelta(days=1)
    return Night(evening=evening, census_local=local)
