"""Fixtures for the reliability suite: the same signed-in app as the security tests."""

from __future__ import annotations

from tests.security.conftest import PASSWORD, ROLE_USERS, SecuredApp, secured, utc_site

__all__ = ["PASSWORD", "ROLE_USERS", "SecuredApp", "secured", "utc_site"]
