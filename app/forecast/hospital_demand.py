"""The hospital's yearly pattern of emergency demand at training, from every unit's history as
known then (app/stats/hospital_season.py); each unit's demand model may take it as a
candidate pattern (app/forecast/arrivals.py)."""

from __future__ import annotations

from collections.abc import Collection, Iterable

from app.forecast.arrivals import emergency_counts
from app.state import UnitState
from app.stats.hospital_season import pooled_season


def hospital_season_at(states: Iterable[UnitState], units: Collection[str]
                       ) -> tuple[float, float] | None:
    """The annual pair shared by the units' emergency admissions (``states``: one per unit,
    all known at the same instant); None where it cannot be learnt (too short a history,
    fewer than two units)."""
    return pooled_season([emergency_counts(state, units) for state in states])
