"""Errors as the site's own pages: 403, 404, 405, 422, 500 and 503 for a person, JSON for the API.

A page request that fails gets ``templates/error.html`` (the menu, the caution, what went
wrong in plain words and where to go next); a request under /api/ keeps FastAPI's JSON
(``{"detail": ...}``) so scripts see the same contract as before. The middleware's own
answers (a form without its CSRF token, an upload over the limit, the 500 of the error
shield) and the busy and time-limit 503s render through the same template by way of
``security.message_page_renderer``.
"""

from __future__ import annotations

from typing import Any

from fastapi import FastAPI, Request
from fastapi.exception_handlers import (
    http_exception_handler,
    request_validation_exception_handler,
)
from fastapi.exceptions import RequestValidationError
from fastapi.responses import Response
from starlette.concurrency import run_in_threadpool
from starlette.exceptions import HTTPException as StarletteHTTPException

from app.store import db
from app.web import security
from app.web.security import PermissionDenied, current_actor, is_api_path
from app.web.templating import templates

TITLES = {
    400: "The request could not be read",
    401: "Please sign in",
    403: "Not allowed",
    404: "Not found",
    405: "Not a way to use this address",
    413: "Upload too large",
    422: "Some of what was sent cannot be used",
    500: "Something went wrong",
    503: "Please try again shortly",
}

# What a form field is called on the page, for a 422 that names it.
FIELD_NAMES = {
    "value": "value", "name": "score", "stay_id": "patient", "observed_at": "observation time",
    "planned_date": "planned date", "age": "age", "who": "who", "batch": "batch",
    "since": "from", "until": "to", "page": "page", "kind": "file kind", "file": "file",
}


def _readable(detail: Any) -> list[str]:
    """An HTTPException's or a validation error's detail as sentences."""
    if detail is None:
        return []
    if isinstance(detail, str):
        return [detail]
    lines = []
    for item in detail if isinstance(detail, list) else [detail]:
        if isinstance(item, dict):
            where = [str(part) for part in item.get("loc", ()) if part not in ("body", "query",
                                                                                "path", "form")]
            field = FIELD_NAMES.get(where[-1], where[-1]) if where else ""
            why = str(item.get("msg") or item.get("why") or item)
            if item.get("type") == "missing":
                why = "is missing: fill it in and send the form again"
            lines.append(f"{field} {why}".strip() if field else why)
        else:
            lines.append(str(item))
    return lines


def _actor_known(request: Request) -> None:
    """Find who is signed in when no route did (an address that matches no route), so the
    page shows their menu. A failure here must not hide the error being answered."""
    if hasattr(request.state, "actor"):
        return
    try:
        with db.session_scope(request.app.state.database_url) as session:
            current_actor(request, session)
    except Exception:  # the error page is shown anyway, without the menu
        request.state.actor = None


async def render(request: Request, status: int, lines: list[str],
                 title: str | None = None, headers: dict[str, str] | None = None) -> Response:
    await run_in_threadpool(_actor_known, request)
    return templates.TemplateResponse(request, "error.html", {
        "status": status, "title": title or TITLES.get(status, "Something went wrong"),
        "lines": lines, "path": request.url.path}, status_code=status, headers=headers)


async def _on_http_exception(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, StarletteHTTPException)
    if is_api_path(request.url.path):
        return await http_exception_handler(request, exc)
    if exc.status_code < 400 or exc.status_code in (401,):
        return await http_exception_handler(request, exc)
    lines = _readable(exc.detail)
    if exc.status_code == 404 and lines == ["Not Found"]:
        lines = [f"There is no page at {request.url.path}."]
    if exc.status_code == 405:
        lines = [f"{request.url.path} cannot be used with {request.method}: "
                 "open it from a link or a form on the site."]
    return await render(request, exc.status_code, lines, headers=getattr(exc, "headers", None))


async def _on_validation_error(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, RequestValidationError)
    if is_api_path(request.url.path):
        return await request_validation_exception_handler(request, exc)
    lines = _readable(list(exc.errors()))
    return await render(request, 422, lines + ["Nothing was changed. Go back, correct it and "
                                               "send it again."])


async def _on_permission_denied(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, PermissionDenied)
    text = (f"Signed in as {exc.actor.username} ({exc.actor.role_label}): this needs the "
            f"'{exc.permission}' permission, which your role does not have. Nothing was "
            "changed.")
    if is_api_path(request.url.path):
        from fastapi.responses import JSONResponse

        return JSONResponse({"detail": text.removesuffix(" Nothing was changed.")},
                            status_code=403)
    return await render(request, 403, [text])


def message_page(title: str, text: str) -> str:
    """The page for answers built outside a route (middleware), without a request: no menu,
    the caution, and a link home."""
    return templates.env.get_template("error.html").render(
        status=None, title=title, lines=[text], path="", actor=None, csrf_token="")


def install(app: FastAPI) -> None:
    """Register the handlers (after ``security.install``, so these answer 403 and the rest)."""
    app.add_exception_handler(StarletteHTTPException, _on_http_exception)
    app.add_exception_handler(RequestValidationError, _on_validation_error)
    app.add_exception_handler(PermissionDenied, _on_permission_denied)
    security.message_page_renderer = message_page

