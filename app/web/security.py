"""Sign-in, roles, CSRF, upload limits, security headers and error logging for the web layer.

How other routes use it
-----------------------
Permissions: "read", "scores" (enter scores and flags), "bookings" (book electives),
"data" (upload CSVs, units), "admin" (users, tokens, audit). Roles: bed_manager has all;
scheduler read + bookings; nurse_in_charge read + scores; viewer read.

    from app.web.security import Actor, require            # or the aliases below

    @router.post("/units/{unit}/scores")
    def enter_score(..., actor: Annotated[Actor, Depends(require("scores"))]) -> ...:
        ...
        record_audit(session, actor.username, "insert", "observation", key, None, values,
                     form="POST /units/{unit}/scores")   # app.store.audit

``require(permission)`` gives a dependency yielding the signed-in ``Actor`` (username,
role, via "session" or "token"). Without a valid sign-in, a request under /api/ gets 401
JSON and any other request a 303 redirect to /signin; a signed-in user whose role lacks
the permission gets 403. Aliases: ``ReadActor``, ``ScoresActor``, ``BookingsActor``,
``DataActor``, ``AdminActor`` (``Annotated[Actor, Depends(require(...))]``).

CSRF: every POST/PUT/PATCH/DELETE carrying the session cookie must carry the token, as the
form field ``csrf_token`` or the header ``X-CSRF-Token``; requests with
``Authorization: Bearer`` are exempt (a browser cannot add that header across sites).
The check runs in middleware, before any route, so no route can forget it. Templates
rendered through a ``Jinja2Templates`` built with ``context_processors=[template_context]``
have ``{{ csrf_token }}`` and ``actor`` (the signed-in Actor, once a ``require``
dependency ran); ``csrf_token_for(request)`` gives the same token in Python.

Pages must not use inline script (the Content-Security-Policy forbids it): put data for a
chart in ``<script type="application/json" id="...">`` and read it from a file in static/.

Request bodies over ``Settings.max_upload_bytes`` are refused with 413 and a message.
CSV exports pass every cell through ``csv_safe`` so a spreadsheet does not run formulas.
Unhandled errors are logged with their type and route only, never values or data.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import logging
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from functools import cache
from html import escape
from typing import Annotated, Any
from urllib.parse import parse_qs, quote

from fastapi import Depends, FastAPI, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from sqlalchemy.exc import IntegrityError, OperationalError
from sqlalchemy.orm import Session
from starlette.datastructures import Headers, MutableHeaders
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from app.config import get_settings
from app.store import users as accounts
from app.store.models import UserAccount
from app.store.retry import is_busy, run_transaction
from app.store.users import PERMISSIONS, ROLE_LABELS, ROLE_PERMISSIONS, ROLES
from app.web.deps import SessionDep

__all__ = [
    "PERMISSIONS", "ROLES", "ROLE_PERMISSIONS", "Actor", "require", "current_actor",
    "csrf_token_for", "template_context", "csv_safe", "install", "ReadActor", "ScoresActor",
    "BookingsActor", "DataActor", "AdminActor", "SESSION_COOKIE", "CSRF_FIELD", "CSRF_HEADER",
]

logger = logging.getLogger("morrow.web")

SESSION_COOKIE = "morrow_session"
PRESESSION_COOKIE = "morrow_presession"
CSRF_FIELD = "csrf_token"
CSRF_HEADER = "x-csrf-token"
SIGNIN_PATH = "/signin"
UNSAFE_METHODS = frozenset({"POST", "PUT", "PATCH", "DELETE"})

CONTENT_SECURITY_POLICY = "; ".join([
    "default-src 'self'",
    "script-src 'self'",
    # Plotly sets style attributes from its script; styles cannot run code.
    "style-src 'self' 'unsafe-inline'",
    "img-src 'self' data:",
    "font-src 'self'",
    "connect-src 'self'",
    "object-src 'none'",
    "base-uri 'none'",
    "form-action 'self'",
    "frame-ancestors 'none'",
])
SECURITY_HEADERS = {
    "content-security-policy": CONTENT_SECURITY_POLICY,
    "x-content-type-options": "nosniff",
    "referrer-policy": "no-referrer",
    "x-frame-options": "DENY",
    "cross-origin-opener-policy": "same-origin",
    "cross-origin-resource-policy": "same-origin",
    "permissions-policy": "camera=(), microphone=(), geolocation=()",
}


def is_api_path(path: str) -> bool:
    return path == "/api" or path.startswith("/api/")


# -- who is asking -----------------------------------------------------------------------------

@dataclass(frozen=True)
class Actor:
    """The signed-in person (or the person an API token acts for)."""

    username: str
    role: str
    via: str  # "session" or "token"

    @property
    def permissions(self) -> frozenset[str]:
        return ROLE_PERMISSIONS.get(self.role, frozenset())

    def can(self, permission: str) -> bool:
        return permission in self.permissions

    @property
    def role_label(self) -> str:
        return ROLE_LABELS.get(self.role, self.role)


class SignInRequired(Exception):
    """No valid session or token: 401 for the API, a redirect to the sign-in page otherwise."""


class PermissionDenied(Exception):
    def __init__(self, actor: Actor, permission: str):
        self.actor, self.permission = actor, permission
        super().__init__(f"{actor.role} may not {permission}")


_bearer = HTTPBearer(auto_error=False, description="an API token a bed manager issued")


def current_actor(request: Request, session: Session) -> Actor | None:
    """The request's Actor from its bearer token or session cookie (checked once per request)."""
    if hasattr(request.state, "actor"):
        return request.state.actor  # type: ignore[no-any-return]
    settings = get_settings()
    now = datetime.now(UTC)
    actor: Actor | None = None
    scheme, _, raw = request.headers.get("authorization", "").partition(" ")
    if scheme.lower() == "bearer":
        # A bearer header is the only credential looked at: it is also what exempts the
        # request from the CSRF check, so a session cookie must not fill in for a bad token.
        token = raw.strip()
        user = _checked(request, session, lambda s: accounts.token_user(
            s, token, now=now)) if token else None
        if user is not None:
            actor = Actor(user.username, user.role, "token")
    else:
        cookie = request.cookies.get(SESSION_COOKIE)
        if cookie:
            idle = timedelta(minutes=settings.session_idle_minutes)
            user = _checked(request, session, lambda s: accounts.session_user(
                s, cookie, now=now, idle=idle))
            if user is not None:
                actor = Actor(user.username, user.role, "session")
    request.state.actor = actor
    return actor


def _checked(request: Request, session: Session,
             find: Callable[[Session], UserAccount | None]) -> UserAccount | None:
    """``find`` (a credential lookup) in a transaction of its own, committed at once.

    A lookup notes when the credential was last used (once a minute). Noted in the request's
    session, that UPDATE took SQLite's write lock until the request ended, so every writer
    waited while a page computed its forecast (measured under 20 clients: 0.5 to 0.8 s a
    time). Committed on its own it holds the lock for milliseconds. Should the database stay
    busy, the request's session looks it up instead and the note waits for the request's end
    (one attempt only: every request passes here, and each retry could wait a whole busy
    timeout).
    """
    try:
        return run_transaction(request.app.state.database_url, find, attempts=1)
    except OperationalError as exc:
        if not is_busy(exc):
            raise
        return find(session)


@cache
def require(permission: str) -> Callable[..., Actor]:
    """A FastAPI dependency yielding the Actor when their role holds ``permission``.

    The same object is returned for the same permission, so tests can replace it with
    ``app.dependency_overrides[require("read")] = ...`` (see tests/security/fixtures.py).
    """
    if permission not in PERMISSIONS:
        raise ValueError(f"permission must be one of {', '.join(PERMISSIONS)}; got {permission!r}")

    def dependency(request: Request, session: SessionDep,
                   _credentials: Annotated[HTTPAuthorizationCredentials | None,
                                           Depends(_bearer)] = None) -> Actor:
        actor = current_actor(request, session)
        if actor is None:
            raise SignInRequired()
        if not actor.can(permission):
            raise PermissionDenied(actor, permission)
        return actor

    dependency.__name__ = f"require_{permission}"
    return dependency


ReadActor = Annotated[Actor, Depends(require("read"))]
ScoresActor = Annotated[Actor, Depends(require("scores"))]
BookingsActor = Annotated[Actor, Depends(require("bookings"))]
DataActor = Annotated[Actor, Depends(require("data"))]
AdminActor = Annotated[Actor, Depends(require("admin"))]


def form_origin(request: Request) -> str:
    """How the audit trail names where a change came from: method and route template."""
    route = request.scope.get("route")
    path = getattr(route, "path", None) or "?"
    return f"{request.method} {path}"


# -- CSRF ----------------------------------------------------------------------------------------

def _token(key: bytes, kind: str, value: str) -> str:
    digest = hmac.new(key, f"{kind}:{value}".encode(), hashlib.sha256).digest()
    return base64.urlsafe_b64encode(digest).decode("ascii").rstrip("=")


def _binding(path: str, cookies: dict[str, str], presession: str | None = None
             ) -> tuple[str, str] | None:
    """What a CSRF token is tied to: the session cookie, or on the sign-in page a pre-session."""
    session_cookie = cookies.get(SESSION_COOKIE)
    if session_cookie:
        return ("session", session_cookie)
    pre = presession or cookies.get(PRESESSION_COOKIE)
    if path == SIGNIN_PATH and pre:
        return ("pre", pre)
    return None


def csrf_token_for(request: Request) -> str:
    """The CSRF token for forms on this page ("" where no form needs one)."""
    key: bytes | None = getattr(request.app.state, "csrf_key", None)
    binding = _binding(request.url.path, request.cookies,
                       getattr(request.state, "presession", None))
    if key is None or binding is None:
        return ""
    return _token(key, *binding)


def template_context(request: Request) -> dict[str, Any]:
    """Jinja context processor: ``csrf_token`` and the signed-in ``actor`` (or None)."""
    return {"csrf_token": csrf_token_for(request),
            "actor": getattr(request.state, "actor", None)}


def csv_safe(value: object) -> object:
    """A CSV cell a spreadsheet will not run: text starting = + - @ (or tab, CR) gets a '.

    OWASP, "CSV Injection" (from memory). Numbers pass unchanged: -3 is a number, not a formula.
    """
    if isinstance(value, str) and value[:1] in ("=", "+", "-", "@", "\t", "\r"):
        return "'" + value
    return value


# -- middleware ---------------------------------------------------------------------------------

def _parse_cookies(headers: Headers) -> dict[str, str]:
    from starlette.requests import cookie_parser

    return cookie_parser(headers.get("cookie", ""))


async def _send_message(send: Send, scope: Scope, status: int, title: str, text: str) -> None:
    response: Response
    if is_api_path(scope.get("path", "")):
        response = JSONResponse({"detail": text}, status_code=status)
    else:
        response = HTMLResponse(_message_page(title, text), status_code=status)
    await response(scope, _no_body, send)


async def _no_body() -> Message:
    return {"type": "http.disconnect"}


# Set by app.web.errors.install: renders these answers as the site's own error page.
message_page_renderer: Callable[[str, str], str] | None = None


def _message_page(title: str, text: str) -> str:
    if message_page_renderer is not None:
        return message_page_renderer(title, text)
    return (f"<!doctype html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>"
            f"{escape(title)} - Morrow</title><link rel=\"stylesheet\" href=\"/static/morrow.css\">"
            f"</head><body><main><h1>{escape(title)}</h1><p>{escape(text)}</p>"
            f"<p><a href=\"/\">Back to Morrow</a></p></main></body></html>")


def _megabytes(n: int) -> str:
    return f"{n / 1_000_000:.3g} MB"


class RequestGuardMiddleware:
    """Refuses bodies over the upload limit (413) and unsafe requests without a CSRF token (403)."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] not in UNSAFE_METHODS:
            await self.app(scope, receive, send)
            return
        state = scope["app"].state
        limit: int = state.max_upload_bytes
        headers = Headers(scope=scope)
        too_big = (f"The upload is larger than the limit of {_megabytes(limit)} "
                   "(setting MORROW_MAX_UPLOAD_BYTES); nothing was read or stored. "
                   "Split the file and send the parts.")
        declared = headers.get("content-length")
        if declared is not None and (not declared.isdigit() or int(declared) > limit):
            await _send_message(send, scope, 413, "Upload too large", too_big)
            return
        body: bytes | None = None
        if declared is None:
            body = await _read_body(receive, limit)
            if body is None:
                await _send_message(send, scope, 413, "Upload too large", too_big)
                return
        if not self._needs_csrf(scope, headers):
            await self.app(scope, _replay(body, receive) if body is not None else receive, send)
            return
        binding = _binding(scope["path"], _parse_cookies(headers))
        key: bytes = state.csrf_key
        given = headers.get(CSRF_HEADER)
        if given is None:
            if body is None:
                body = await _read_body(receive, limit)
                if body is None:
                    await _send_message(send, scope, 413, "Upload too large", too_big)
                    return
            given = await _form_token(scope, body)
        expected = _token(key, *binding) if binding is not None else None
        # Compared as bytes: compare_digest raises TypeError on non-ASCII text (a 500).
        if expected is None or given is None or not hmac.compare_digest(
                given.encode("utf-8", "replace"), expected.encode("utf-8")):
            await _send_message(
                send, scope, 403, "Form expired",
                "This form was sent without its security token (CSRF) or with an old one; "
                "nothing was changed. Reload the page and send it again.")
            return
        replayed = _replay(body, receive) if body is not None else receive
        del body  # the replay alone holds it now, and lets go of it once the app has read it
        await self.app(scope, replayed, send)

    @staticmethod
    def _needs_csrf(scope: Scope, headers: Headers) -> bool:
        if headers.get("authorization", "").lower().startswith("bearer "):
            return False
        cookies = _parse_cookies(headers)
        # Without a session cookie the request carries no one's authority: the route's
        # require() answers it (401 or a redirect). The sign-in form is checked regardless.
        return bool(cookies.get(SESSION_COOKIE)) or scope["path"] == SIGNIN_PATH


async def _read_body(receive: Receive, limit: int) -> bytes | None:
    """The whole body, or None once it passes ``limit`` bytes."""
    chunks: list[bytes] = []
    size = 0
    while True:
        message = await receive()
        if message["type"] != "http.request":
            break
        chunk = message.get("body", b"")
        size += len(chunk)
        if size > limit:
            return None
        chunks.append(chunk)
        if not message.get("more_body", False):
            break
    return b"".join(chunks)


def _replay(body: bytes, receive: Receive) -> Receive:
    """``receive``, with ``body`` (already read here) as its first message. The body is not
    kept once handed on: an upload of 50 MB is then in memory once, not for the whole request
    beside the route's own copy."""
    pending = [body]

    async def replay() -> Message:
        if pending:
            return {"type": "http.request", "body": pending.pop(), "more_body": False}
        return await receive()

    return replay


async def _form_token(scope: Scope, body: bytes) -> str | None:
    content_type = Headers(scope=scope).get("content-type", "").lower()
    if content_type.startswith("application/x-www-form-urlencoded"):
        values = parse_qs(body.decode("utf-8", errors="replace")).get(CSRF_FIELD)
        return values[0] if values else None
    if content_type.startswith("multipart/form-data"):
        from starlette.requests import Request as StarletteRequest

        request = StarletteRequest(scope, _replay(body, _no_body))
        try:
            form = await request.form()
        except Exception:  # a malformed body: the route will refuse it too
            return None
        try:
            value = form.get(CSRF_FIELD)
            return value if isinstance(value, str) else None
        finally:
            await form.close()
    return None


class SecurityHeadersMiddleware:
    """Adds the security headers to every response; pages are not cached."""

    def __init__(self, app: ASGIApp, *, hsts: bool = False) -> None:
        self.app = app
        self.hsts = hsts

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        static = scope.get("path", "").startswith("/static/")

        async def send_with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = MutableHeaders(scope=message)
                for name, value in SECURITY_HEADERS.items():
                    headers[name] = value
                if self.hsts:
                    headers["strict-transport-security"] = "max-age=31536000"
                if not static and "cache-control" not in headers:
                    headers["cache-control"] = "no-store"
            await send(message)

        await self.app(scope, receive, send_with_headers)


class ErrorShieldMiddleware:
    """Turns an unhandled error into a plain 500 and logs only its type and route.

    Error messages can hold what a request carried (database errors quote the row's
    values), so neither the message nor the traceback is written to the logs.
    """

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = False

        async def watch(message: Message) -> None:
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
            await send(message)

        try:
            await self.app(scope, receive, watch)
        except Exception as exc:
            route = scope.get("route")
            where = getattr(route, "path", None) or "(no route)"
            logger.error("unhandled %s in %s %s", type(exc).__name__, scope.get("method"), where)
            if not started:
                await _send_message(send, scope, 500, "Something went wrong",
                                    "The request failed and nothing was changed. "
                                    "The error was logged (without the data).")


# -- exception handlers and installation ----------------------------------------------------------

def _safe_next(target: str | None) -> str:
    """A local path to return to after signing in; anything else becomes the home page."""
    if (not target or not target.startswith("/") or target.startswith("//")
            or "\\" in target or len(target) > 2000):
        return "/"
    return target


async def _on_signin_required(request: Request, exc: Exception) -> Response:
    if is_api_path(request.url.path):
        return JSONResponse({"detail": "sign-in required: send Authorization: Bearer <token>"},
                            status_code=401, headers={"WWW-Authenticate": "Bearer"})
    target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
    if request.method not in ("GET", "HEAD"):
        target = "/"
    return RedirectResponse(f"{SIGNIN_PATH}?next={quote(_safe_next(target), safe='')}",
                            status_code=303)


async def _on_permission_denied(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, PermissionDenied)
    text = (f"Signed in as {exc.actor.username} ({exc.actor.role_label}): this needs the "
            f"'{exc.permission}' permission, which your role does not have.")
    if is_api_path(request.url.path):
        return JSONResponse({"detail": text}, status_code=403)
    return HTMLResponse(_message_page("Not allowed", text), status_code=403)


def load_csrf_key(url: str) -> bytes:
    """The database's CSRF key, shared by every worker; made by the first one to ask."""
    for _ in range(3):
        try:
            # SQLite may answer "busy" while another process writes the key: run again.
            return run_transaction(url, lambda session: accounts.signing_key(session, "csrf"))
        except IntegrityError:
            continue  # another process made the key at the same moment: read theirs
    raise RuntimeError("could not read or make the CSRF signing key")


def install(app: FastAPI) -> None:
    """Add the middleware and handlers to ``app`` (after ``app.state.database_url`` is set)."""
    settings = get_settings()
    app.state.csrf_key = load_csrf_key(app.state.database_url)
    app.state.max_upload_bytes = settings.max_upload_bytes
    app.add_exception_handler(SignInRequired, _on_signin_required)
    app.add_exception_handler(PermissionDenied, _on_permission_denied)
    # The last added runs first: headers (on every answer, errors too), then the error
    # shield, then the body-size and CSRF checks.
    app.add_middleware(RequestGuardMiddleware)
    app.add_middleware(ErrorShieldMiddleware)
    app.add_middleware(SecurityHeadersMiddleware, hsts=settings.secure_cookies)


def session_cookie_args() -> dict[str, Any]:
    settings = get_settings()
    return {"httponly": True, "samesite": "strict", "secure": settings.secure_cookies,
            "path": "/"}
