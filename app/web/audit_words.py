"""Each audit event in words a person reads: who changed which patient, bed, score or record,
from what to what, with times on the site's clock."""

from __future__ import annotations

from datetime import datetime
from typing import Any
from zoneinfo import ZoneInfo

from app import score_names

# How the record kinds of the trail are offered in the page's filter.
KIND_LABELS = {
    "observation": "score entries",
    "observations": "score files and forms",
    "stay": "stays",
    "stays": "stay files",
    "census": "census files",
    "booking": "bookings",
    "bookings": "booking files",
    "unit": "units",
    "units": "unit files",
    "unit_beds": "staffed beds",
    "user": "people",
    "token": "API tokens",
}
PLURALS = {"units": "units", "stays": "stays", "census": "census rows",
           "observations": "scores", "bookings": "bookings"}


def kind_label(kind: str) -> str:
    return f"{KIND_LABELS[kind]} ({kind})" if kind in KIND_LABELS else kind


def _shown(value: Any, tz: ZoneInfo) -> str:
    """A stored value for a sentence: instants on the site's clock, blanks as a dash."""
    if value is None or value == "":
        return "–"
    if isinstance(value, float) and value == int(value):
        return str(int(value))
    if isinstance(value, str) and len(value) >= 16 and value[4:5] == "-" and value[10:11] == "T":
        try:
            moment = datetime.fromisoformat(value)
        except ValueError:
            return value
        if moment.tzinfo is not None:
            return moment.astimezone(tz).strftime("%a %d %b %Y %H:%M")
    return str(value)


def _patient(values: dict[str, Any]) -> str:
    bed, stay = values.get("bed"), values.get("stay_id")
    if bed:
        return f"bed {bed} (stay {stay})"
    return f"stay {stay}"


def _observation(action: str, before: dict[str, Any], after: dict[str, Any],
                 tz: ZoneInfo) -> str:
    values = {**before, **after}
    label = score_names.label(str(values.get("name", "score")))
    observed = _shown(values.get("observed_at"), tz)
    who = _patient(values)
    if action == "withdraw":
        return (f"withdrew {label} {_shown(before.get('value'), tz)} of {who}, "
                f"observed {observed}")
    if action == "correct":
        return (f"corrected {label} of {who}, observed {observed}, from "
                f"{_shown(before.get('value'), tz)} to {_shown(after.get('value'), tz)}")
    return f"recorded {label} {_shown(after.get('value'), tz)} for {who}, observed {observed}"


def _fields(values: dict[str, Any], tz: ZoneInfo) -> str:
    return ", ".join(f"{k.replace('_', ' ')} {_shown(v, tz)}" for k, v in sorted(values.items()))


def describe(action: str, entity: str, entity_id: str, before: dict[str, Any] | None,
             after: dict[str, Any] | None, tz: ZoneInfo) -> str:
    """One sentence (without the person, who has a column of their own)."""
    before, after = before or {}, after or {}
    if entity == "observation":
        return _observation(action, before, after, tz)
    if action == "import":
        what = PLURALS.get(entity, entity)
        source = "the score form" if entity_id == "score entry form" else entity_id
        parts = [f"imported {after.get('inserted', 0)} new {what} from {source}"]
        if after.get("updated"):
            parts.append(f"{after['updated']} updated")
        if after.get("unchanged"):
            parts.append(f"{after['unchanged']} unchanged")
        return "; ".join(parts)
    name = {"unit_beds": "staffed beds of", "stay": "stay", "booking": "booking",
            "unit": "unit"}.get(entity, entity.replace("_", " "))
    if action == "insert":
        return f"added {name} {entity_id}" + (f": {_fields(after, tz)}" if after else "")
    if action == "update":
        changes = "; ".join(f"{k.replace('_', ' ')} from {_shown(before.get(k), tz)} to "
                            f"{_shown(v, tz)}" for k, v in sorted(after.items()))
        return f"changed {name} {entity_id}: {changes}"
    if action == "delete":
        return f"removed {name} {entity_id}"
    detail = _fields(after, tz) if after else ""
    return f"{action.replace('_', ' ')} {name} {entity_id}" + (f" ({detail})" if detail else "")
