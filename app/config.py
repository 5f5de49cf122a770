"""One place for settings: environment variables prefixed ``MORROW_``."""

from __future__ import annotations

from datetime import UTC, datetime
from functools import lru_cache
from pathlib import Path
from zoneinfo import ZoneInfo

from pydantic import field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

PROJECT_ROOT = Path(__file__).resolve().parent.parent


def _machine_zone_name() -> str:
    """The machine's IANA zone name, falling back to UTC when it cannot be read."""
    tz_env = Path("/etc/timezone")
    if tz_env.exists():
        name = tz_env.read_text().strip()
        if name:
            return name
    localtime = Path("/etc/localtime")
    if localtime.is_symlink():
        target = str(localtime.resolve())
        if "zoneinfo/" in target:
            return target.split("zoneinfo/", 1)[1]
    return "UTC"


class Settings(BaseSettings):
    """Run-time settings; every field can be set as ``MORROW_<FIELD>``."""

    model_config = SettingsConfigDict(env_prefix="MORROW_", extra="ignore")

    database_url: str = "sqlite:///morrow.db"
    timezone: str = ""
    max_upload_bytes: int = 50 * 1024 * 1024
    # Sign-in and sessions (app/web/security.py). An idle session ends after
    # session_idle_minutes, any session after session_hours.
    session_hours: float = 12.0
    session_idle_minutes: int = 120
    # Failed sign-ins for one name within signin_lockout_minutes lock that name for the rest
    # of the window (common practice, no source).
    max_failed_signins: int = 5
    signin_lockout_minutes: int = 15
    # Set when a TLS proxy is in front: cookies then carry the Secure attribute.
    secure_cookies: bool = False
    # Time limits (app/time_limits.py): a web request, and a long command (`morrow plan`,
    # `morrow forecast`), still computing after this many seconds is stopped with a message.
    request_seconds: float = 60.0
    command_seconds: float = 1800.0
    # A fixed "now" for the page and API (ISO 8601), for replaying a past morning in
    # training sessions and tests; empty: the real time.
    now: str = ""

    @field_validator("timezone")
    @classmethod
    def _known_zone(cls, value: str) -> str:
        name = value or _machine_zone_name()
        try:
            ZoneInfo(name)
        except Exception as exc:  # zoneinfo raises several kinds
            raise ValueError(f"MORROW_TIMEZONE={name!r} is not an IANA time zone name") from exc
        return name

    @field_validator("request_seconds", "command_seconds")
    @classmethod
    def _positive_seconds(cls, value: float) -> float:
        if not (0 < value < float("inf")):
            raise ValueError(f"a time limit must be a positive number of seconds, got {value!r}")
        return value

    @property
    def tz(self) -> ZoneInfo:
        return ZoneInfo(self.timezone or _machine_zone_name())


@lru_cache
def get_settings() -> Settings:
    return Settings()


def current_time() -> datetime:
    """Now, or the fixed instant of ``MORROW_NOW`` (naive values are site-local)."""
    settings = get_settings()
    if not settings.now:
        return datetime.now(UTC)
    from app.timeutil import parse_timestamp

    return parse_timestamp(settings.now, settings.tz)
