"""FastAPI application factory."""

from __future__ import annotations

from datetime import UTC, datetime

from fastapi import FastAPI, Request
from fastapi.responses import HTMLResponse
from fastapi.staticfiles import StaticFiles
from fastapi.templating import Jinja2Templates
from app import __version__
from app.config import PROJECT_ROOT, get_settings
from app.state import load_state
from app.store import db, repo
from app.web.deps import SessionDep

templates = Jinja2Templates(directory=str(PROJECT_ROOT / "templates"))


def create_app(database_url: str | None = None) -> FastAPI:
    """Build the app for one database; migrations are applied before it serves."""
    url = database_url or get_settings().database_url
    db.upgrade(url)
    app = FastAPI(title="Morrow", version=__version__)
    app.state.database_url = url
    app.mount("/static", StaticFiles(directory=str(PROJECT_ROOT / "static")), name="static")

    @app.get("/health")
    def health() -> dict[str, object]:
        """Liveness and the database's migration revision."""
        return {"status": "ok", "version": __version__, "revision": db.current_revision(url)}

    @app.get("/", response_class=HTMLResponse)
    def home(request: Request, session: SessionDep) -> HTMLResponse:
        """Units with their staffed beds and occupancy now."""
        tz = get_settings().tz
        now = datetime.now(UTC)
        rows = []
        for unit in repo.list_units(session):
            state = load_state(session, unit.code, now, tz, with_history=False)
            rows.append({"code": unit.code, "census_time": unit.census_time,
                         "beds": state.beds_on(now.astimezone(tz).date()),
                         "occupied": state.occupancy_at(state.as_of)})
        return templates.TemplateResponse(request, "home.html", {"units": rows})

    return app
