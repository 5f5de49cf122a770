"""The one Jinja2 environment every page renders with."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from fastapi.templating import Jinja2Templates

from app.config import PROJECT_ROOT, get_settings
from app.web import security


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
templates.env.filters["script_json"] = _script_json
templates.env.globals["replay_now"] = lambda: get_settings().now
