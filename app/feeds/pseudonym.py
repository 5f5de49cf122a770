"""Keyed hashes of a feed's identifiers, so no hospital number reaches the database.

A patient identifier (HL7 PID-3, FHIR Patient.identifier) and a visit number (PV1-19,
Encounter.identifier) are replaced, as soon as a message is read, by HMAC-SHA256 under a
site secret. The secret lives in a file outside the database (``MORROW_FEED_SECRET_FILE``,
by default ``~/.config/morrow/feed_secret``), made with mode 0600 on first use: a copy of the
database alone cannot be linked back to people by hashing candidate numbers, and the same
person gets the same key in every message and every feed of the site. Keep the file with the
site's other secrets and back it up: a new secret gives new keys, so later messages would no
longer find the stays made under the old one.

Names, addresses and dates of birth are never stored anywhere (the age at admission is
computed while reading and the date dropped).
"""

from __future__ import annotations

import hashlib
import hmac
import os
import secrets
import stat
from dataclasses import dataclass
from pathlib import Path

SECRET_ENV = "MORROW_FEED_SECRET_FILE"
PATIENT_KEY_LENGTH = 32  # hex characters kept (128 bits)
VISIT_KEY_LENGTH = 24  # hex characters kept (96 bits); see app.feeds.events.stay_id_for


class SecretError(RuntimeError):
    """The site secret cannot be read or made, or is readable by others."""


def default_secret_path() -> Path:
    configured = os.environ.get(SECRET_ENV)
    if configured:
        return Path(configured)
    base = os.environ.get("XDG_CONFIG_HOME") or str(Path.home() / ".config")
    return Path(base) / "morrow" / "feed_secret"


def load_secret(path: Path | None = None) -> bytes:
    """The site secret in ``path``, made (32 random bytes, hex, mode 0600) if missing."""
    file = path or default_secret_path()
    if not file.exists():
        file.parent.mkdir(parents=True, exist_ok=True)
        try:
            fd = os.open(file, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        except FileExistsError:
            pass  # made by another process in the meantime: read theirs
        else:
            with os.fdopen(fd, "w") as out:
                out.write(secrets.token_hex(32) + "\n")
    mode = file.stat().st_mode
    if mode & (stat.S_IRWXG | stat.S_IRWXO):
        raise SecretError(f"{file}: the feed secret is readable by others; "
                          f"run: chmod 600 {file}")
    try:
        text = file.read_text(encoding="ascii").strip()
    except UnicodeDecodeError:
        raise SecretError(f"{file}: the feed secret must be text (letters and digits, as "
                          "Morrow writes it: 64 hexadecimal characters)") from None
    if len(text) < 32:
        raise SecretError(f"{file}: the feed secret is shorter than 32 characters")
    return text.encode("ascii")


@dataclass(frozen=True)
class Pseudonymiser:
    """Turns identifiers into keys. ``repr`` never shows the secret."""

    secret: bytes

    def __repr__(self) -> str:
        return "Pseudonymiser(<secret>)"

    def __post_init__(self) -> None:
        # Keyed once; each identifier hashes a copy (the same digest as hmac.new each time).
        object.__setattr__(self, "_keyed", hmac.new(self.secret, digestmod=hashlib.sha256))

    def _key(self, domain: str, value: str, length: int) -> str:
        mac = self._keyed.copy()  # type: ignore[attr-defined]
        mac.update(f"{domain}\x1f{value.strip()}".encode())
        return mac.hexdigest()[:length]

    def patient(self, identifier: str, authority: str = "") -> str:
        """Key of a person identifier (with its assigning authority, when given)."""
        return self._key("patient", f"{identifier.strip()}\x1f{authority.strip()}",
                         PATIENT_KEY_LENGTH)

    def visit(self, number: str, authority: str = "") -> str:
        """Key of a visit number (with its assigning authority, when given)."""
        return self._key("visit", f"{number.strip()}\x1f{authority.strip()}",
                         VISIT_KEY_LENGTH)


def site_pseudonymiser(path: Path | None = None) -> Pseudonymiser:
    return Pseudonymiser(load_secret(path))
