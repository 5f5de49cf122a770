"""People: accounts and roles, password hashing, web sessions, API tokens, sign-in limits.

Passwords are hashed with scrypt (``hashlib.scrypt``), a memory-hard function; the cost
parameters are stored in each hash, so a stronger default later still verifies old hashes.
Session cookies and API tokens are long random strings; only their SHA-256 is stored (they
carry 256 bits of entropy, so a slow hash adds nothing). Nothing here commits: the caller's
session scope does. Every change to an account or token is written to the audit trail.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import re
import secrets
from dataclasses import dataclass
from datetime import datetime, timedelta
from functools import lru_cache

from sqlalchemy import and_, case, delete, literal, null, or_, select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from app.store.audit import record_audit
from app.store.models import ApiToken, SigninFailure, SigningKey, UserAccount, WebSession, utcnow

PERMISSIONS = ("read", "scores", "bookings", "data", "admin")
ROLE_PERMISSIONS: dict[str, frozenset[str]] = {
    "bed_manager": frozenset(PERMISSIONS),
    "scheduler": frozenset({"read", "bookings"}),
    "nurse_in_charge": frozenset({"read", "scores"}),
    "viewer": frozenset({"read"}),
}
ROLES = tuple(ROLE_PERMISSIONS)
ROLE_LABELS = {"bed_manager": "bed manager", "scheduler": "scheduler",
               "nurse_in_charge": "nurse in charge", "viewer": "viewer"}

# OWASP Password Storage Cheat Sheet: scrypt with N = 2**17, r = 8, p = 1 at least
# (from memory). That takes about 0.7 s and 128 MiB on this project's 2-core machine.
SCRYPT_LOG2_N = 17
SCRYPT_R = 8
SCRYPT_P = 1
# NIST SP 800-63B asks for at least 8 characters (from memory); we ask a little more.
MIN_PASSWORD_LENGTH = 10
MAX_PASSWORD_LENGTH = 1024
USERNAME_RE = re.compile(r"^[a-z0-9][a-z0-9._-]{0,63}$")
TOKEN_PREFIX = "mrw_"
# Sessions and tokens record their last use at most this often, so reads stay reads.
TOUCH_EVERY = timedelta(seconds=60)


class AccountError(ValueError):
    """A refused change to an account or token; the message says why."""


# -- passwords ---------------------------------------------------------------------------------

def _b64(data: bytes) -> str:
    return base64.b64encode(data).decode("ascii")


def hash_password(password: str, *, log2_n: int = SCRYPT_LOG2_N, r: int = SCRYPT_R,
                  p: int = SCRYPT_P) -> str:
    """scrypt hash of ``password`` with a fresh 16-byte salt, parameters stored alongside."""
    salt = secrets.token_bytes(16)
    key = _scrypt(password, salt, log2_n, r, p)
    return f"scrypt${log2_n}${r}${p}${_b64(salt)}${_b64(key)}"


def _scrypt(password: str, salt: bytes, log2_n: int, r: int, p: int) -> bytes:
    n = 1 << log2_n
    # scrypt needs 128 * n * r bytes; hashlib refuses more than maxmem (default 32 MiB).
    maxmem = 128 * n * r * p + 16 * 1024 * 1024
    return hashlib.scrypt(password.encode("utf-8"), salt=salt, n=n, r=r, p=p, maxmem=maxmem,
                          dklen=32)


def verify_password(password: str, stored: str) -> bool:
    """Whether ``password`` matches ``stored``, compared in constant time."""
    try:
        scheme, log2_n, r, p, salt, key = stored.split("$")
        if scheme != "scrypt":
            return False
        expected = base64.b64decode(key)
        got = _scrypt(password, base64.b64decode(salt), int(log2_n), int(r), int(p))
    except (ValueError, TypeError):
        return False
    return hmac.compare_digest(got, expected)


@lru_cache(maxsize=1)
def _dummy_hash() -> str:
    # Checked against when the name is unknown, so a wrong name costs as long as a wrong
    # password and the timing does not tell which names exist.
    return hash_password(secrets.token_urlsafe(16))


def check_password_rules(password: str) -> None:
    if len(password) < MIN_PASSWORD_LENGTH:
        raise AccountError(f"a password needs at least {MIN_PASSWORD_LENGTH} characters")
    if len(password) > MAX_PASSWORD_LENGTH:
        raise AccountError(f"a password has at most {MAX_PASSWORD_LENGTH} characters")
    if not password.strip():
        raise AccountError("a password cannot be only spaces")


def normalise_username(username: str) -> str:
    name = username.strip().lower()
    if not USERNAME_RE.match(name):
        raise AccountError("a user name is 1 to 64 characters: lower-case letters, digits, "
                           "'.', '_' or '-', starting with a letter or digit")
    return name


def check_role(role: str) -> str:
    if role not in ROLE_PERMISSIONS:
        raise AccountError(f"role must be one of {', '.join(ROLES)}; got {role!r}")
    return role


# -- accounts ----------------------------------------------------------------------------------

def get_user(session: Session, username: str) -> UserAccount | None:
    return session.scalar(select(UserAccount).where(UserAccount.username == username))


def list_users(session: Session) -> list[UserAccount]:
    return list(session.scalars(select(UserAccount).order_by(UserAccount.username)))


def _require_user(session: Session, username: str) -> UserAccount:
    user = get_user(session, username.strip().lower())
    if user is None:
        raise AccountError(f"no user named {username!r}")
    return user


def _user_view(user: UserAccount) -> dict[str, object]:
    # What the audit trail keeps of an account: never the hash.
    return {"username": user.username, "role": user.role, "active": user.active}


def create_user(session: Session, username: str, role: str, password: str, *, actor: str,
                form: str | None = None, password_hash: str | None = None) -> UserAccount:
    """Add an account; ``password_hash`` (already hashed) skips hashing, for test fixtures."""
    name = normalise_username(username)
    check_role(role)
    if password_hash is None:
        check_password_rules(password)
        password_hash = hash_password(password)
    if get_user(session, name) is not None:
        raise AccountError(f"a user named {name!r} already exists")
    user = UserAccount(username=name, role=role, password_hash=password_hash, active=True)
    session.add(user)
    session.flush()
    record_audit(session, actor, "insert", "user", name, None, _user_view(user), form=form)
    return user


def set_password(session: Session, username: str, password: str, *, actor: str,
                 form: str | None = None) -> UserAccount:
    """New password; the user's sessions end, their API tokens are revoked and any sign-in
    lock on the name is lifted."""
    user = _require_user(session, username)
    check_password_rules(password)
    user.password_hash = hash_password(password)
    user.password_changed_at = utcnow()
    session.execute(delete(WebSession).where(WebSession.user_id == user.id))
    _revoke_all_tokens(session, user, actor=actor, form=form)
    session.execute(delete(SigninFailure).where(SigninFailure.username == user.username))
    record_audit(session, actor, "update", "user", user.username, {"password": "(old)"},
                 {"password": "(changed)"}, form=form)
    return user


def set_role(session: Session, username: str, role: str, *, actor: str,
             form: str | None = None) -> UserAccount:
    user = _require_user(session, username)
    check_role(role)
    if user.role == role:
        return user
    if user.role == "bed_manager" and _is_last_active_manager(session, user):
        raise AccountError("this is the last active bed manager; make another one first")
    before = _user_view(user)
    user.role = role
    record_audit(session, actor, "update", "user", user.username, before, _user_view(user),
                 form=form)
    return user


def set_active(session: Session, username: str, active: bool, *, actor: str,
               form: str | None = None) -> UserAccount:
    """Disable or re-enable an account; disabling ends its sessions and revokes its tokens, so
    re-enabling it brings none of them back (the bed manager issues new ones)."""
    user = _require_user(session, username)
    if user.active == active:
        return user
    if not active and user.role == "bed_manager" and _is_last_active_manager(session, user):
        raise AccountError("this is the last active bed manager; make another one first")
    before = _user_view(user)
    user.active = active
    if not active:
        session.execute(delete(WebSession).where(WebSession.user_id == user.id))
        _revoke_all_tokens(session, user, actor=actor, form=form)
    record_audit(session, actor, "update", "user", user.username, before, _user_view(user),
                 form=form)
    return user


def _is_last_active_manager(session: Session, user: UserAccount) -> bool:
    others = session.scalar(select(UserAccount.id).where(
        UserAccount.role == "bed_manager", UserAccount.active.is_(True),
        UserAccount.id != user.id).limit(1))
    return others is None


# -- signing in --------------------------------------------------------------------------------

@dataclass(frozen=True)
class SigninOutcome:
    """``user`` on success; otherwise ``locked_until`` is set when the limit refused it."""

    user: UserAccount | None
    locked_until: datetime | None = None


def attempt_signin(session: Session, username: str, password: str, *, now: datetime,
                   max_failures: int, window: timedelta) -> SigninOutcome:
    """Check a sign-in against the password and the failed-sign-in limit for the typed name.

    ``max_failures`` failures within ``window`` lock the name until ``window`` after the
    last of them; while locked even the right password is refused. The count is kept for
    unknown names too, so the answers do not reveal which names exist.
    """
    name = username.strip().lower()[:64]
    failure = session.get(SigninFailure, name)
    if failure is not None and failure.locked_until is not None and failure.locked_until > now:
        return SigninOutcome(None, failure.locked_until)
    user = get_user(session, name) if USERNAME_RE.match(name) else None
    usable = user is not None and user.active
    stored = user.password_hash if user is not None and usable else _dummy_hash()
    ok = verify_password(password[:MAX_PASSWORD_LENGTH], stored)
    if ok and usable:
        session.execute(delete(SigninFailure).where(SigninFailure.username == name))
        return SigninOutcome(user)
    return SigninOutcome(None, _count_failure(session, name, seen=failure is not None, now=now,
                                              max_failures=max_failures, window=window))


def _count_failure(session: Session, name: str, *, seen: bool, now: datetime,
                   max_failures: int, window: timedelta) -> datetime | None:
    """Count one failed sign-in for ``name`` in the database itself, so wrong guesses sent at
    the same moment are all counted (a read-then-write in Python would lose some, and two
    first failures for a new name would collide on its key). Returns the lock's end, if any.
    ``seen``: the name's row was read just before (then it is not created again)."""
    if not seen:
        try:
            with session.begin_nested():
                session.add(SigninFailure(username=name, failures=0, first_failed_at=now))
        except IntegrityError:
            pass  # another request counted this name first: count on its row
    when = SigninFailure.locked_until.type  # the UTC column type, for the bound instants
    stale = or_(and_(SigninFailure.locked_until.is_not(None),
                     SigninFailure.locked_until <= literal(now, when)),
                SigninFailure.first_failed_at <= literal(now - window, when))
    count = case((stale, 1), else_=SigninFailure.failures + 1)
    session.execute(
        update(SigninFailure).where(SigninFailure.username == name).values(
            failures=count,
            first_failed_at=case((stale, literal(now, when)),
                                 else_=SigninFailure.first_failed_at),
            locked_until=case((count >= max_failures, literal(now + window, when)),
                              (stale, null()), else_=SigninFailure.locked_until))
        .execution_options(synchronize_session=False))
    return session.scalar(select(SigninFailure.locked_until)
                          .where(SigninFailure.username == name)
                          .execution_options(populate_existing=True))


def _sha256(raw: str) -> str:
    return hashlib.sha256(raw.encode("utf-8")).hexdigest()


def create_session(session: Session, user: UserAccount, *, now: datetime,
                   lifetime: timedelta) -> str:
    """A new web session for ``user``; returns the cookie's secret (stored only hashed)."""
    session.execute(delete(WebSession).where(WebSession.expires_at <= now))
    raw = secrets.token_urlsafe(32)
    session.add(WebSession(token_hash=_sha256(raw), user_id=user.id, created_at=now,
                           expires_at=now + lifetime, last_seen_at=now))
    session.flush()
    return raw


def session_user(session: Session, raw: str, *, now: datetime,
                 idle: timedelta) -> UserAccount | None:
    """The active user of a live session cookie, or None (unknown, expired or idle too long)."""
    row = session.execute(
        select(WebSession, UserAccount).join(UserAccount, WebSession.user_id == UserAccount.id)
        .where(WebSession.token_hash == _sha256(raw))).first()
    if row is None:
        return None
    web_session, user = row
    if web_session.expires_at <= now or web_session.last_seen_at + idle <= now or not user.active:
        return None
    if now - web_session.last_seen_at >= TOUCH_EVERY:
        web_session.last_seen_at = now
    return user


def end_session(session: Session, raw: str) -> None:
    session.execute(delete(WebSession).where(WebSession.token_hash == _sha256(raw)))


# -- API tokens ----------------------------------------------------------------------------------

def issue_token(session: Session, username: str, label: str, *, actor: str,
                form: str | None = None) -> tuple[ApiToken, str]:
    """A new bearer token acting as ``username``; returns the row and the token (shown once)."""
    user = _require_user(session, username)
    label = label.strip()
    if not label or len(label) > 100:
        raise AccountError("a token needs a label of 1 to 100 characters (what it is for)")
    raw = TOKEN_PREFIX + secrets.token_urlsafe(32)
    token = ApiToken(token_hash=_sha256(raw), prefix=raw[:12], label=label, user_id=user.id,
                     created_by=actor)
    session.add(token)
    session.flush()
    record_audit(session, actor, "insert", "api_token", str(token.id), None,
                 {"label": label, "user": user.username, "prefix": token.prefix}, form=form)
    return token, raw


def revoke_token(session: Session, token_id: int, *, actor: str,
                 form: str | None = None) -> ApiToken:
    token = session.get(ApiToken, token_id)
    if token is None:
        raise AccountError(f"no API token with id {token_id}")
    if token.revoked_at is None:
        token.revoked_at = utcnow()
        record_audit(session, actor, "update", "api_token", str(token.id), {"revoked_at": None},
                     {"revoked_at": token.revoked_at.isoformat()}, form=form)
    return token


def _revoke_all_tokens(session: Session, user: UserAccount, *, actor: str,
                       form: str | None) -> None:
    """Revoke every live token of ``user``: a token is a standing credential, and one issued
    under a password that has since been reset (perhaps because it leaked) or to an account
    that was disabled must not outlive that decision."""
    live = session.scalars(select(ApiToken.id).where(ApiToken.user_id == user.id,
                                                     ApiToken.revoked_at.is_(None))).all()
    for token_id in live:
        revoke_token(session, token_id, actor=actor, form=form)


def list_tokens(session: Session) -> list[tuple[ApiToken, str]]:
    rows = session.execute(select(ApiToken, UserAccount.username)
                           .join(UserAccount, ApiToken.user_id == UserAccount.id)
                           .order_by(ApiToken.id))
    return [(token, username) for token, username in rows]


def token_user(session: Session, raw: str, *, now: datetime) -> UserAccount | None:
    """The active user a live token acts for, or None.

    Live: not revoked, and issued after the account's last password change. The second rule
    also ends tokens that a database from before revocation on password change still holds
    unrevoked (an older backup restored).
    """
    if not raw.startswith(TOKEN_PREFIX):
        return None
    row = session.execute(
        select(ApiToken, UserAccount).join(UserAccount, ApiToken.user_id == UserAccount.id)
        .where(ApiToken.token_hash == _sha256(raw))).first()
    if row is None:
        return None
    token, user = row
    if token.revoked_at is not None or not user.active:
        return None
    if token.created_at < user.password_changed_at:
        return None
    if token.last_used_at is None or now - token.last_used_at >= TOUCH_EVERY:
        token.last_used_at = now
    return user


# -- credentials across a restore --------------------------------------------------------------

@dataclass(frozen=True)
class LiveCredentials:
    """SHA-256 of every token and session cookie that a database honours."""

    tokens: frozenset[str]
    sessions: frozenset[str]


def live_credentials(session: Session) -> LiveCredentials:
    """The tokens and sessions this database would accept now (see ``token_user``)."""
    tokens = session.scalars(
        select(ApiToken.token_hash).join(UserAccount, ApiToken.user_id == UserAccount.id)
        .where(ApiToken.revoked_at.is_(None), UserAccount.active.is_(True),
               ApiToken.created_at >= UserAccount.password_changed_at))
    sessions = session.scalars(select(WebSession.token_hash))
    return LiveCredentials(frozenset(tokens), frozenset(sessions))


def end_credentials_not_in(session: Session, live: LiveCredentials, *,
                           actor: str) -> tuple[int, int]:
    """After a restore: revoke every token, and end every session, that the replaced database
    no longer honoured; returns (tokens revoked, sessions ended).

    A backup holds the tokens and sessions of its day. Restoring it would otherwise bring
    back a token revoked since (by hand, by a password reset or by disabling the account)
    or a browser signed out since. So a credential works after a restore only if it worked
    both in the backup and in the database it replaced; when that database could not be
    read, ``live`` is empty and every token and session ends.
    """
    stale = session.scalars(select(ApiToken.id).where(
        ApiToken.revoked_at.is_(None), ApiToken.token_hash.not_in(live.tokens))).all()
    for token_id in stale:
        revoke_token(session, token_id, actor=actor)
    ended = session.execute(delete(WebSession).where(
        WebSession.token_hash.not_in(live.sessions)).execution_options(
            synchronize_session=False))
    return len(stale), int(getattr(ended, "rowcount", 0) or 0)


# -- server secrets ------------------------------------------------------------------------------

def signing_key(session: Session, purpose: str) -> bytes:
    """The database's secret for ``purpose``, made on first use (every worker then shares it).

    Two processes starting at once may both try to make it: the loser's flush raises
    ``IntegrityError``; its caller rolls back and asks again.
    """
    row = session.get(SigningKey, purpose)
    if row is None:
        row = SigningKey(purpose=purpose, secret=secrets.token_hex(32))
        session.add(row)
        session.flush()
    return bytes.fromhex(row.secret)
