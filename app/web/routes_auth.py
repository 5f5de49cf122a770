"""Signing in and out, the people page (accounts and API tokens) and the token API."""

from __future__ import annotations

import secrets
from datetime import UTC, datetime, timedelta
from typing import Annotated

from fastapi import APIRouter, Form, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from pydantic import BaseModel, Field

from app import bounds
from app.config import get_settings
from app.store import audit
from app.store import users as accounts
from app.store.models import UserAccount
from app.store.users import ROLE_LABELS, ROLES, AccountError
from app.web.deps import RowId, SessionDep
from app.web.security import (
    PRESESSION_COOKIE,
    SESSION_COOKIE,
    SIGNIN_PATH,
    Actor,
    AdminActor,
    ReadActor,
    _safe_next,
    form_origin,
    session_cookie_args,
)
from app.web.templating import templates

router = APIRouter()
# SQLite integers are 64-bit: a larger id is refused (RowId) rather than failing in the driver.
TokenId = RowId

# -- signing in and out ---------------------------------------------------------------------

def _signin_page(request: Request, *, next_path: str, message: str = "", status: int = 200,
                 username: str = "") -> HTMLResponse:
    new_pre = None
    if not request.cookies.get(PRESESSION_COOKIE) and not request.cookies.get(SESSION_COOKIE):
        # The sign-in form's CSRF token is tied to this cookie until a session exists.
        new_pre = secrets.token_urlsafe(32)
        request.state.presession = new_pre
    response = templates.TemplateResponse(
        request, "signin.html",
        {"next": next_path, "message": message, "username": username}, status_code=status)
    if new_pre is not None:
        response.set_cookie(PRESESSION_COOKIE, new_pre, max_age=2 * 3600, httponly=True,
                            samesite="strict", secure=get_settings().secure_cookies,
                            path=SIGNIN_PATH)
    return response


@router.get(SIGNIN_PATH, response_class=HTMLResponse, include_in_schema=False)
def signin_form(request: Request, next: str = "/") -> HTMLResponse:
    """The sign-in form."""
    return _signin_page(request, next_path=_safe_next(next))


@router.post(SIGNIN_PATH, response_class=HTMLResponse, include_in_schema=False)
def signin(request: Request, session: SessionDep,
           username: Annotated[str, Form(max_length=200)] = "",
           password: Annotated[str, Form(max_length=2000)] = "",
           next: Annotated[str, Form(max_length=2000)] = "/") -> Response:
    """Check the name and password; on success start a session and go where the user was going."""
    settings = get_settings()
    now = datetime.now(UTC)
    window = timedelta(minutes=settings.signin_lockout_minutes)
    outcome = accounts.attempt_signin(session, username, password, now=now,
                                      max_failures=settings.max_failed_signins, window=window)
    target = _safe_next(next)
    typed = username.strip().lower()[:64]
    if outcome.user is None:
        known = accounts.get_user(session, typed) if typed else None
        # Sign-in events are not data writes: no form batch (which would mark the data
        # as changed), only the event.
        audit.record_audit(session, known.username if known else "(unknown name)",
                           "signin_failed", "user", known.username if known else "(unknown)",
                           None, {"locked_until": outcome.locked_until})
        if outcome.locked_until is not None and outcome.locked_until > now:
            until = outcome.locked_until.astimezone(settings.tz).strftime("%H:%M")
            return _signin_page(request, next_path=target, status=429, username=typed,
                                message=f"Too many failed sign-ins for this name. Try again "
                                        f"after {until}, or ask a bed manager to reset the "
                                        "password.")
        return _signin_page(request, next_path=target, status=401, username=typed,
                            message="Wrong user name or password.")
    user = outcome.user
    old = request.cookies.get(SESSION_COOKIE)
    if old:
        accounts.end_session(session, old)  # a new secret at each sign-in: no fixation
    lifetime = timedelta(hours=settings.session_hours)
    raw = accounts.create_session(session, user, now=now, lifetime=lifetime)
    audit.record_audit(session, user.username, "signin", "user", user.username, None,
                       {"role": user.role})
    response = RedirectResponse(target, status_code=303)
    response.set_cookie(SESSION_COOKIE, raw, max_age=int(lifetime.total_seconds()),
                        **session_cookie_args())
    response.delete_cookie(PRESESSION_COOKIE, path=SIGNIN_PATH)
    return response


@router.post("/signout", include_in_schema=False)
def signout(request: Request, session: SessionDep) -> Response:
    """End this browser's session."""
    raw = request.cookies.get(SESSION_COOKIE)
    if raw:
        user = accounts.session_user(session, raw, now=datetime.now(UTC),
                                     idle=timedelta(days=365))
        accounts.end_session(session, raw)
        if user is not None:
            audit.record_audit(session, user.username, "signout", "user", user.username, None,
                               None)
    response = RedirectResponse(SIGNIN_PATH, status_code=303)
    response.delete_cookie(SESSION_COOKIE, path="/")
    return response


# -- people page: accounts and tokens (bed manager) -------------------------------------------

def _people_page(request: Request, session: SessionDep, *, message: str = "",
                 error: str = "", new_token: str = "", status: int = 200) -> HTMLResponse:
    tz = get_settings().tz
    tokens = [{"id": t.id, "label": t.label, "user": name, "prefix": t.prefix,
               "created_at": t.created_at.astimezone(tz).strftime("%Y-%m-%d %H:%M"),
               "created_by": t.created_by,
               "last_used_at": (t.last_used_at.astimezone(tz).strftime("%Y-%m-%d %H:%M")
                                if t.last_used_at else ""),
               "revoked": t.revoked_at is not None}
              for t, name in accounts.list_tokens(session)]
    return templates.TemplateResponse(
        request, "people.html",
        {"users": accounts.list_users(session), "tokens": tokens, "roles": ROLES,
         "role_labels": ROLE_LABELS, "message": message, "error": error,
         "new_token": new_token}, status_code=status)


@router.get("/people", response_class=HTMLResponse, include_in_schema=False)
def people(request: Request, session: SessionDep, actor: AdminActor) -> HTMLResponse:
    """Accounts and API tokens."""
    return _people_page(request, session)


@router.post("/people/users", response_class=HTMLResponse, include_in_schema=False)
def add_user(request: Request, session: SessionDep, actor: AdminActor,
             username: Annotated[str, Form(max_length=200)] = "",
             role: Annotated[str, Form(max_length=40)] = "",
             password: Annotated[str, Form(max_length=2000)] = "") -> HTMLResponse:
    """Add an account."""
    try:
        user = accounts.create_user(session, username, role, password, actor=actor.username,
                                    form=form_origin(request))
    except AccountError as exc:
        return _people_page(request, session, error=str(exc), status=400)
    return _people_page(request, session, message=f"Added {user.username}.")


@router.post("/people/users/{username}/role", response_class=HTMLResponse,
             include_in_schema=False)
def change_role(request: Request, session: SessionDep, actor: AdminActor, username: str,
                role: Annotated[str, Form(max_length=40)] = "") -> HTMLResponse:
    """Give an account another role."""
    try:
        user = accounts.set_role(session, username, role, actor=actor.username,
                                 form=form_origin(request))
    except AccountError as exc:
        return _people_page(request, session, error=str(exc), status=400)
    return _people_page(request, session,
                        message=f"{user.username} is now {ROLE_LABELS[user.role]}.")


@router.post("/people/users/{username}/password", response_class=HTMLResponse,
             include_in_schema=False)
def reset_password(request: Request, session: SessionDep, actor: AdminActor, username: str,
                   password: Annotated[str, Form(max_length=2000)] = "") -> HTMLResponse:
    """Set a new password (the account's sessions and API tokens end; a sign-in lock is
    lifted)."""
    try:
        user = accounts.set_password(session, username, password, actor=actor.username,
                                     form=form_origin(request))
    except AccountError as exc:
        return _people_page(request, session, error=str(exc), status=400)
    return _people_page(request, session, message=f"New password set for {user.username}.")


@router.post("/people/users/{username}/active", response_class=HTMLResponse,
             include_in_schema=False)
def change_active(request: Request, session: SessionDep, actor: AdminActor, username: str,
                  active: Annotated[str, Form(max_length=10)] = "") -> HTMLResponse:
    """Disable or re-enable an account."""
    try:
        user = accounts.set_active(session, username, active == "1", actor=actor.username,
                                   form=form_origin(request))
    except AccountError as exc:
        return _people_page(request, session, error=str(exc), status=400)
    state = "enabled" if user.active else "disabled"
    return _people_page(request, session, message=f"{user.username} is {state}.")


@router.post("/people/tokens", response_class=HTMLResponse, include_in_schema=False)
def issue_token_form(request: Request, session: SessionDep, actor: AdminActor,
                     username: Annotated[str, Form(max_length=200)] = "",
                     label: Annotated[str, Form(max_length=200)] = "") -> HTMLResponse:
    """Issue an API token; it is shown once."""
    try:
        _, raw = accounts.issue_token(session, username, label, actor=actor.username,
                                      form=form_origin(request))
    except AccountError as exc:
        return _people_page(request, session, error=str(exc), status=400)
    return _people_page(request, session, new_token=raw,
                        message="Copy the token now: it is not shown again.")


@router.post("/people/tokens/{token_id}/revoke", response_class=HTMLResponse,
             include_in_schema=False)
def revoke_token_form(request: Request, session: SessionDep, actor: AdminActor,
                      token_id: TokenId) -> HTMLResponse:
    """Revoke an API token at once."""
    try:
        token = accounts.revoke_token(session, token_id, actor=actor.username,
                                      form=form_origin(request))
    except AccountError as exc:
        return _people_page(request, session, error=str(exc), status=404)
    return _people_page(request, session, message=f"Token {token.prefix}... is revoked.")


# -- API ----------------------------------------------------------------------------------------

class WhoAmI(BaseModel):
    username: str
    role: str
    via: str
    permissions: list[str]


class TokenCreate(BaseModel):
    username: str = Field(min_length=1, max_length=64, pattern=bounds.NO_CONTROL_CHARACTERS)
    label: str = Field(min_length=1, max_length=100, pattern=bounds.NO_CONTROL_CHARACTERS)


class TokenRead(BaseModel):
    id: int
    label: str
    username: str
    prefix: str
    created_by: str
    created_at: datetime
    last_used_at: datetime | None
    revoked_at: datetime | None


class TokenIssued(TokenRead):
    token: str = Field(description="the bearer token; shown only in this answer")


class Problem(BaseModel):
    detail: str


@router.get("/api/whoami", response_model=WhoAmI, tags=["people"])
def whoami(actor: ReadActor) -> WhoAmI:
    """Who the request is signed in as, and what that role may do."""
    return WhoAmI(username=actor.username, role=actor.role, via=actor.via,
                  permissions=sorted(actor.permissions))


def _token_read(token: object, username: str) -> dict[str, object]:
    fields = ("id", "label", "prefix", "created_by", "created_at", "last_used_at", "revoked_at")
    return {"username": username, **{f: getattr(token, f) for f in fields}}


@router.get("/api/tokens", response_model=list[TokenRead], tags=["people"])
def api_list_tokens(session: SessionDep, actor: AdminActor) -> list[TokenRead]:
    """Every API token, revoked ones included (never the token itself)."""
    return [TokenRead.model_validate(_token_read(t, name))
            for t, name in accounts.list_tokens(session)]


@router.post("/api/tokens", response_model=TokenIssued, status_code=201, tags=["people"],
             responses={400: {"model": Problem}})
def api_issue_token(request: Request, body: TokenCreate, session: SessionDep,
                    actor: AdminActor) -> TokenIssued | JSONResponse:
    """Issue a token acting as ``username``; the token is in this answer only."""
    try:
        token, raw = accounts.issue_token(session, body.username, body.label,
                                          actor=actor.username, form=form_origin(request))
    except AccountError as exc:
        return JSONResponse({"detail": str(exc)}, status_code=400)
    return TokenIssued.model_validate({**_token_read(token, body.username.strip().lower()),
                                       "token": raw})


@router.delete("/api/tokens/{token_id}", response_model=TokenRead, tags=["people"],
               responses={404: {"model": Problem}})
def api_revoke_token(request: Request, token_id: TokenId, session: SessionDep,
                     actor: AdminActor) -> TokenRead | JSONResponse:
    """Revoke a token; it stops working at once."""
    try:
        token = accounts.revoke_token(session, token_id, actor=actor.username,
                                      form=form_origin(request))
    except AccountError as exc:
        return JSONResponse({"detail": str(exc)}, status_code=404)
    owner = session.get(UserAccount, token.user_id)
    return TokenRead.model_validate(_token_read(token, owner.username if owner else ""))


__all__ = ["router", "Actor"]
