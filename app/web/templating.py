"""The one Jinja2 environment every page renders with."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

from fastapi.templating import Jinja2Templates

from app import alert_levels, score_names
from app.config import PROJECT_ROOT, get_settings
from app.nights import Night, night_of
from app.web import security


def _night(census_at: Any) -> Night:
    """The night a census instant (ISO text or aware datetime) counts on the site's clock."""
    if isinstance(census_at, str):
        census_at = datetime.fromisoformat(census_at)
    return night_of(census_at, get_settings().tz)


def _local(value: Any, fmt: str = "%a %d %b %H:%M") -> str:
    if value is None:
        return ""
    if isinstance(value, str):
        value = datetime.fromisoformat(value)
    return value.astimezone(get_settings().tz).strftime(fmt)


def _pct(value: float | None, digits: int = 0) -> str:
    if value is None:
        return "–"
    if 0 < value < 0.005 and digits == 0:
        return "<1%"
    if 0.995 < value < 1 and digits == 0:
        return ">99%"
    return f"{value * 100:.{digits}f}%"


def _script_json(text: str) -> str:
    """JSON text safe inside <script type="application/json">: no '</script>' can close it."""
    from markupsafe import Markup

    return Markup(text.replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026"))


templates = Jinja2Templates(directory=str(PROJECT_ROOT / "templates"),
                            context_processors=[security.template_context])
templates.env.filters["local"] = _local
templates.env.filters["pct"] = _pct
templates.env.filters["score_label"] = score_names.label  # "SOFA", "APACHE II", site's own as given
templates.env.filters["script_json"] = _script_json
templates.env.globals["replay_now"] = lambda: get_settings().now
# The real clock (also when replaying): the printed sheet says when its page was made.
templates.env.globals["wall_clock"] = lambda: datetime.now(UTC)
# A chance shown against a unit's alert levels (app/alert_levels.py; templates/_levels.html).
templates.env.globals["risk_pct"] = alert_levels.percent
# The night a census instant counts, as people name it (app/nights.py):
# {{ (d.census_at|night).name }} is "Fri night", .census_label "census Sat 00:00".
templates.env.filters["night"] = _night
