"""A unit's alert levels: read them (falling back to the site's defaults) and set them,
audited with the values before and after. The page, the API and the command line all set
them here, after the same bounds check (``app.bounds.check_alert_levels``)."""

from __future__ import annotations

from sqlalchemy.orm import Session

from app import bounds
from app.alert_levels import AlertLevels, levels_of
from app.store.audit import record_audit
from app.store.models import Unit


class UnknownUnit(LookupError):
    """No unit of that code is stored."""


def unit_levels(session: Session, unit: str) -> AlertLevels:
    """The unit's levels, each falling back to the site default when not set."""
    found = session.get(Unit, unit)
    if found is None:
        raise UnknownUnit(f"unit {unit} is not known")
    return levels_of(found.warning_level, found.alarm_level)


def set_unit_levels(session: Session, unit: str, warning: float, alarm: float, *,
                    actor: str, form: str) -> AlertLevels:
    """Store the unit's levels (checked against the bounds) and audit the change.

    ``form`` names where the change came from ("POST /units/{unit}/levels", "cli", ...).
    Setting the values already stored writes nothing. The caller commits."""
    bounds.check_alert_levels(warning, alarm)
    found = session.get(Unit, unit)
    if found is None:
        raise UnknownUnit(f"unit {unit} is not known")
    before = {"warning_level": found.warning_level, "alarm_level": found.alarm_level}
    after = {"warning_level": float(warning), "alarm_level": float(alarm)}
    if before != after:
        found.warning_level, found.alarm_level = after["warning_level"], after["alarm_level"]
        session.flush()
        record_audit(session, actor, "update", "unit", unit, before, after, form=form)
    return levels_of(found.warning_level, found.alarm_level)
