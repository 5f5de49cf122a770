"""How a score or flag is named to a person, with its published range, and why a value is refused.

The importer checks every value against these ranges (``app.ingest.importer``, DATA_CONTRACT.md
"observations.csv"), so a file, the page and the API refuse the same values with the same
words. A site-defined score keeps the name it was given and any number.
"""

from __future__ import annotations

import math

# Published names and ranges: SOFA 0-24 (Vincent et al., Intensive Care Med 1996), NEWS2 0-20
# (Royal College of Physicians, 2017), APACHE II 0-71 (Knaus et al., Crit Care Med 1985).
LABELS: dict[str, str] = {
    "sofa": "SOFA",
    "news2": "NEWS2",
    "apache_ii": "APACHE II",
    "apache2": "APACHE II",
    "fit_for_discharge": "Fit for discharge",
}
RANGES: dict[str, tuple[int, int]] = {
    "sofa": (0, 24),
    "news2": (0, 20),
    "apache_ii": (0, 71),
    "apache2": (0, 71),
}
FLAGS = ("fit_for_discharge",)


def label(name: str) -> str:
    """"SOFA", "NEWS2", "Fit for discharge"; a site-defined score as given."""
    return LABELS.get(name, name)


def hint(name: str) -> str:
    """The range a person may type: "0-24", "yes (1) or no (0)", or "" when the site sets it."""
    if name in RANGES:
        low, high = RANGES[name]
        return f"{low}\u2013{high}"
    if name in FLAGS:
        return "1 yes, 0 no"
    return ""


def label_with_range(name: str) -> str:
    """"SOFA (0-24)"; a flag with its two values; a site-defined score by its name."""
    shown = hint(name)
    return f"{label(name)} ({shown})" if shown else label(name)


def rule(name: str) -> str:
    """What a value of ``name`` must be, as a sentence ending without a full stop."""
    if name in RANGES:
        low, high = RANGES[name]
        return f"{label(name)} must be a whole number from {low} to {high}"
    if name in FLAGS:
        return f"{label(name)} is a flag: 1 (yes) or 0 (no)"
    return f"{label(name)} must be a number"


def problem(name: str, value: float | None) -> str | None:
    """Why ``value`` cannot be stored for ``name`` (None: it can); ``None`` value: not a number."""
    if value is None or not math.isfinite(value):
        return rule(name)
    if name in RANGES:
        low, high = RANGES[name]
        if not (low <= value <= high and value == int(value)):
            return rule(name)
    elif name in FLAGS and value not in (0.0, 1.0):
        return rule(name)
    return None
