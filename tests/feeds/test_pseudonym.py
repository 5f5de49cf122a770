"""The site secret and the keyed hashes of identifiers (HMAC-SHA256, RFC 2104)."""

from __future__ import annotations

import hashlib
import hmac
import os
import stat
from pathlib import Path

import pytest

from app.feeds.pseudonym import (
    PATIENT_KEY_LENGTH,
    VISIT_KEY_LENGTH,
    Pseudonymiser,
    SecretError,
    load_secret,
)


def test_the_secret_file_is_made_once_readable_by_its_owner_only(tmp_path: Path) -> None:
    path = tmp_path / "conf" / "feed_secret"
    first = load_secret(path)
    assert stat.S_IMODE(path.stat().st_mode) == 0o600
    assert len(first) == 64  # 32 random bytes, hex
    assert load_secret(path) == first  # kept, not made again


def test_a_secret_others_can_read_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "feed_secret"
    load_secret(path)
    os.chmod(path, 0o644)
    with pytest.raises(SecretError, match="chmod 600"):
        load_secret(path)


def test_a_secret_that_is_not_text_is_refused_in_words(tmp_path: Path) -> None:
    path = tmp_path / "feed_secret"
    path.write_bytes(os.urandom(32) + b"\xef")  # raw bytes, as a hand-made file might hold
    os.chmod(path, 0o600)
    with pytest.raises(SecretError, match="must be text"):
        load_secret(path)


def test_keys_are_hmac_sha256_of_the_identifier_under_the_secret() -> None:
    secret = b"k" * 40
    keys = Pseudonymiser(secret)
    # Computed here with the standard library's HMAC (RFC 2104) over the documented input:
    # domain, unit separator, identifier, unit separator, assigning authority.
    expected = hmac.new(secret, b"patient\x1fPATID1234\x1fGOOD HEALTH HOSPITAL",
                        hashlib.sha256).hexdigest()[:PATIENT_KEY_LENGTH]
    assert keys.patient("PATID1234", "GOOD HEALTH HOSPITAL") == expected
    assert len(keys.visit("V0001")) == VISIT_KEY_LENGTH
    # The same number as a patient id and as a visit number gives unrelated keys, and a
    # different site secret gives different keys.
    assert keys.visit("PATID1234")[:20] != keys.patient("PATID1234")[:20]
    assert Pseudonymiser(b"j" * 40).patient("PATID1234") != keys.patient("PATID1234")
    assert "k" * 10 not in repr(keys)
