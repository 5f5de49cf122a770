"""FastAPI application factory."""

from __future__ import annotations

import sys

from fastapi import FastAPI
from fastapi.responses import JSONResponse
from fastapi.staticfiles import StaticFiles

from app import __version__
from app.config import PROJECT_ROOT, get_settings
from app.store import db
from app.web import (
    api,
    busy,
    errors,
    limits,
    model_page,
    pages,
    planning_page,
    routes_alerts,
    routes_audit,
    routes_auth,
    routes_backtest,
    routes_booking,
    routes_feeds,
    routes_home,
    routes_scores,
    routes_training,
    security,
    vendor,
)
from app.web.security import ReadActor

# How long a thread may hold the interpreter lock before another waiting thread gets it
# (Python's default is 5 ms). A request waits for the lock again after every database call;
# while an import or a forecast computes in a worker thread, each of those waits took up to
# the whole interval, so a page with a few dozen queries stalled for hundreds of
# milliseconds. Measured with tests/benchmarks/test_bench_upload_stall.py on this project's
# 2-core machine: /health and pages during a refused 50 MB upload, p95 506-654 ms with the
# default, 28-32 ms with 0.5 ms.
GIL_SWITCH_INTERVAL_S = 0.0005


def create_app(database_url: str | None = None) -> FastAPI:
    """Build the app for one database; migrations are applied before it serves."""
    sys.setswitchinterval(GIL_SWITCH_INTERVAL_S)
    url = database_url or get_settings().database_url
    db.upgrade(url)
    # FastAPI's /docs and /redoc pages load Swagger UI and ReDoc from a CDN and start them
    # with an inline script: offline and under the Content-Security-Policy they cannot work,
    # and no installed package carries those assets. They are off; the schema itself is
    # served below to signed-in users only.
    app = FastAPI(title="Morrow", version=__version__, docs_url=None, redoc_url=None,
                  openapi_url=None, lifespan=limits.lifespan)
    app.state.database_url = url
    app.mount("/static", StaticFiles(directory=str(PROJECT_ROOT / "static")), name="static")
    security.install(app)
    errors.install(app)  # after security: the site's own 403, 404, 405, 422 pages
    busy.install(app)
    limits.install(app)  # added last, so it runs first: the limit covers the whole request
    app.include_router(routes_auth.router)
    app.include_router(routes_home.router)  # "/" and "/wall": the hospital at a glance
    app.include_router(vendor.router)  # Plotly's JavaScript, compressed
    app.include_router(routes_audit.router)
    app.include_router(routes_alerts.router)
    app.include_router(routes_booking.router)
    app.include_router(pages.router)
    app.include_router(routes_scores.router)
    app.include_router(api.router)
    app.include_router(model_page.router)
    app.include_router(planning_page.router)
    app.include_router(routes_training.router)
    app.include_router(routes_backtest.router)
    app.include_router(routes_feeds.router)  # POST /api/feeds/fhir

    @app.get("/openapi.json", include_in_schema=False)
    def openapi_schema(actor: ReadActor) -> JSONResponse:
        """The API's OpenAPI schema (signed in: it lists every route and parameter)."""
        return JSONResponse(app.openapi())

    @app.get("/health")
    def health() -> dict[str, object]:
        """Liveness and the database's migration revision."""
        return {"status": "ok", "version": __version__, "revision": db.current_revision(url)}

    return app
