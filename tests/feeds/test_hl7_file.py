"""``morrow import hl7 FILE``: messages one after another (segments ended by CR, messages by
line ends), an FHS/BHS batch envelope (HL7 v2.5.1 2.10.3) or MLLP framing (VT ... FS CR,
v2.5.1 appendix C) in the file; then ``morrow feeds check`` and ``morrow feeds replay``."""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path

import pytest
from sqlalchemy import select

from app.cli.main import main
from app.feeds.hl7_v2 import split_messages
from app.store import db
from app.store.models import Stay
from tests.feeds.hl7_messages import adt, oru
from tests.feeds.hl7_setup import add_units

MESSAGES = [
    adt("A01", "F1", occurred="202603010900", sent="202603010901"),
    oru("F2", [("news2", "3", "202603011000")], sent="202603011001"),
    adt("A02", "F3", occurred="202603021000", location="3000", prior="2000"),
    adt("A03", "F4", occurred="202603041200", location="3000"),
]


def _plain(messages: list[str]) -> str:
    return "\n".join(m + "\r" for m in messages)


def _batch(messages: list[str]) -> str:
    header = ["FHS|^~\\&|ADT1|GOOD HEALTH HOSPITAL", "BHS|^~\\&|ADT1|GOOD HEALTH HOSPITAL"]
    trailer = [f"BTS|{len(messages)}", "FTS|1"]
    return "\r".join([*header, *messages, *trailer]) + "\r"


def _mllp(messages: list[str]) -> str:
    return "".join(f"\x0b{m}\r\x1c\r" for m in messages)


def _lines(messages: list[str]) -> str:  # segments ended by LF, as many editors save them
    return "\n".join(m.replace("\r", "\n") for m in messages) + "\n"


@pytest.mark.parametrize("layout", [_plain, _batch, _mllp, _lines])
def test_every_file_layout_gives_the_same_messages(layout) -> None:  # type: ignore[no-untyped-def]
    assert split_messages(layout(MESSAGES)) == MESSAGES


def test_import_check_and_replay_from_the_command_line(
        db_url: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
        capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setenv("MORROW_FEED_SECRET_FILE", str(tmp_path / "secret"))
    monkeypatch.setenv("MORROW_TIMEZONE", "UTC")
    monkeypatch.delenv("MORROW_FEED_MAPPING", raising=False)
    add_units(db_url, "KV-CRIT", "KV-SURG")
    mapping = tmp_path / "feeds.toml"
    mapping.write_text('[units]\n"2000" = "KV-CRIT"\n')
    feed = tmp_path / "adt.hl7"
    feed.write_text(_batch(MESSAGES), newline="")
    status = main(["--db", db_url, "import", "hl7", str(feed), "--mapping", str(mapping)])
    out = capsys.readouterr()
    # Point of care 3000 is neither mapped nor a unit code: F3 and F4 wait as dead letters.
    assert status == 0, out.err
    assert "4 messages; 2 applied, 2 dead letter" in out.out
    assert "F3" in out.err and "'3000' is not mapped" in out.err
    assert main(["--db", db_url, "feeds", "check", "--last", "10"]) == 0
    out = capsys.readouterr().out
    assert "points of care not mapped to a unit:\n  3000  (2 messages)" in out
    assert "dead letters waiting for replay: 2" in out
    mapping.write_text('[units]\n"2000" = "KV-CRIT"\n"3000" = "KV-SURG"\n')
    assert main(["--db", db_url, "feeds", "replay", "--mapping", str(mapping)]) == 0
    assert "2 of 2 dead letters applied" in capsys.readouterr().out
    with db.session_scope(db_url) as session:
        stays = [(s.unit, s.discharged_at) for s in
                 session.scalars(select(Stay).order_by(Stay.admitted_at))]
    assert stays == [("KV-CRIT", datetime(2026, 3, 2, 10, 0, tzinfo=UTC)),
                     ("KV-SURG", datetime(2026, 3, 4, 12, 0, tzinfo=UTC))]
    # The same file again: every message a duplicate, nothing changes.
    assert main(["--db", db_url, "import", "hl7", str(feed), "--mapping", str(mapping)]) == 0
    assert "4 messages; 4 duplicate" in capsys.readouterr().out


def test_a_refused_message_makes_the_import_exit_2(
        db_url: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
        capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setenv("MORROW_FEED_SECRET_FILE", str(tmp_path / "secret"))
    add_units(db_url)
    feed = tmp_path / "bad.hl7"
    feed.write_text(_plain([adt("A01", "X1", occurred="2026-03-01T09:00")]), newline="")
    assert main(["--db", db_url, "import", "hl7", str(feed)]) == 2
    err = capsys.readouterr().err
    assert "X1" in err and "EVN-6 is not a timestamp" in err
