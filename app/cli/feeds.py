"""Commands for the HL7 v2 feed: ``morrow import hl7 FILE``, ``morrow feeds check [--last N]``,
``morrow feeds replay [--id N]`` and ``morrow listen [--port N]``.

Every message goes through ``app.feeds.receive.receive_hl7`` (committed before it counts
as taken), the same path the MLLP listener uses. Output names messages by their control id
(MSH-10) only, never by anything from PID.
"""

from __future__ import annotations

import argparse
import os
import sys
from collections import Counter
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from sqlalchemy import func, select

EXIT_OK, EXIT_ERROR, EXIT_BAD_INPUT = 0, 1, 2
MAX_LISTED = 20


def _mapping(path: str | None) -> Any:
    from app.feeds.mapping import MappingError, load_mapping

    try:
        return load_mapping(path)
    except MappingError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return None


def _actor(default: str) -> str:
    return os.environ.get("USER", default)


def read_messages(path: Path) -> list[str]:
    """The messages of an HL7 v2 file (UTF-8, else Latin-1 as many interface engines write)."""
    from app.feeds.hl7_v2 import split_messages

    data = path.read_bytes()
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        text = data.decode("latin-1")
    return split_messages(text)


def cmd_import_hl7(args: argparse.Namespace) -> int:
    from app.config import get_settings
    from app.feeds.census import CensusClock
    from app.feeds.pseudonym import SecretError, site_pseudonymiser
    from app.feeds.receive import receive_hl7

    path = Path(args.file)
    if not path.is_file():
        print(f"error: {path}: no such file", file=sys.stderr)
        return EXIT_BAD_INPUT
    mapping = _mapping(getattr(args, "mapping", None))
    if mapping is None:
        return EXIT_BAD_INPUT
    try:
        pseudonymiser = site_pseudonymiser()
    except SecretError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_ERROR
    messages = read_messages(path)
    tz = get_settings().tz
    counts: Counter[str] = Counter()
    listed = 0
    actor = _actor("hl7 import")
    census = CensusClock(tz, actor=actor)
    for number, text in enumerate(messages, start=1):
        receipt = receive_hl7(args.db, text, mapping=mapping, pseudonymiser=pseudonymiser,
                              tz=tz, received_at=datetime.now(UTC), actor=actor,
                              census=census)
        counts[receipt.status] += 1
        if receipt.status in ("refused", "dead_letter", "failed") and listed < MAX_LISTED:
            listed += 1
            print(f"{path.name}: message {number} ({receipt.control_id or 'no MSH-10'}): "
                  f"{receipt.status.replace('_', ' ')} ({receipt.ack_code}): {receipt.reason}",
                  file=sys.stderr)
    shown = ", ".join(f"{counts[k]} {k.replace('_', ' ')}" for k in
                      ("applied", "duplicate", "ignored", "dead_letter", "refused", "failed")
                      if counts[k])
    print(f"{path.name}: {len(messages)} messages; {shown or 'nothing'}")
    if counts["failed"]:
        return EXIT_ERROR
    return EXIT_BAD_INPUT if counts["refused"] else EXIT_OK


def cmd_check(args: argparse.Namespace) -> int:
    """Unmapped points of care and codes in the last N messages, and what became of them."""
    from app.store import db
    from app.store.models import FeedDeadLetter, FeedMessage

    with db.session_scope(args.db) as session:
        rows = session.execute(
            select(FeedMessage.source, FeedMessage.outcome, FeedMessage.unmapped)
            .order_by(FeedMessage.id.desc()).limit(args.last)).all()
        pending = session.scalar(select(func.count()).select_from(FeedDeadLetter)
                                 .where(FeedDeadLetter.resolved_at.is_(None))) or 0
    outcomes = Counter(r.outcome for r in rows)
    unmapped: dict[str, Counter[str]] = {}
    for row in rows:
        for kind, codes in (row.unmapped or {}).items():
            unmapped.setdefault(kind, Counter()).update(codes)
    print(f"last {len(rows)} messages: " + (", ".join(
        f"{n} {k.replace('_', ' ')}" for k, n in sorted(outcomes.items())) or "none"))
    titles = {"locations": "points of care not mapped to a unit",
              "codes": "observation codes not mapped to a score",
              "admission_types": "admission types not mapped"}
    for kind, counter in sorted(unmapped.items()):
        print(f"{titles.get(kind, kind)}:")
        for code, count in counter.most_common():
            print(f"  {code}  ({count} message{'s' if count != 1 else ''})")
    if not unmapped:
        print("every point of care and code seen is mapped")
    print(f"dead letters waiting for replay: {pending}"
          + (" (after fixing the mapping: morrow feeds replay)" if pending else ""))
    return EXIT_OK


def cmd_replay(args: argparse.Namespace) -> int:
    from app.feeds.apply import replay_dead_letters
    from app.store import db

    mapping = _mapping(args.mapping)
    if mapping is None:
        return EXIT_BAD_INPUT
    with db.session_scope(args.db) as session:
        results = replay_dead_letters(session, mapping, now=datetime.now(UTC),
                                      actor=_actor("feed replay"), ids=args.id or None)
    applied = [r for r in results if r.status != "dead_letter"]
    for result in results[:MAX_LISTED]:
        print(f"dead letter {result.dead_letter_id}: {result.status.replace('_', ' ')}"
              + ("" if result.status != "dead_letter" else f" ({result.reason})"))
    print(f"{len(applied)} of {len(results)} dead letters applied")
    return EXIT_OK


def cmd_listen(args: argparse.Namespace) -> int:
    from app.feeds.listener import serve_forever

    mapping = _mapping(args.mapping)
    if mapping is None:
        return EXIT_BAD_INPUT
    host = args.host or mapping.host
    port = args.port if args.port is not None else mapping.port
    return serve_forever(args.db, mapping, host=host, port=port)


FEED_KINDS = ("hl7", "fhir")


def register(sub: Any, feeds: Any) -> None:
    """``morrow feeds check|replay`` (under ``feeds``) and ``morrow listen`` (under ``sub``)."""
    p = feeds.add_parser("check", help="unmapped points of care and codes in recent messages")
    p.add_argument("--last", type=_count, default=1000,
                   help="how many of the latest messages to look at (default 1000)")
    p.set_defaults(func=cmd_check)
    p = feeds.add_parser("replay", help="apply the dead letters again (after a mapping fix)")
    p.add_argument("--mapping", default=None, help="feed mapping file (TOML)")
    p.add_argument("--id", type=int, action="append", default=[],
                   help="only this dead letter (repeatable)")
    p.set_defaults(func=cmd_replay)
    p = sub.add_parser("listen", help="take HL7 v2 messages over MLLP (TCP)")
    p.add_argument("--host", default=None, help="address to listen on (default: the mapping "
                   "file's [listen] host, else 127.0.0.1)")
    p.add_argument("--port", type=_port, default=None,
                   help="TCP port (default: the mapping file's [listen] port, else 2575)")
    p.add_argument("--mapping", default=None, help="feed mapping file (TOML)")
    p.set_defaults(func=cmd_listen)


def _count(text: str) -> int:
    from app.bounds import MAX_FEED_CHECK_MESSAGES
    from app.ingest.parse import integer

    try:
        return integer(1, MAX_FEED_CHECK_MESSAGES)(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"{text!r}: {exc}") from None


def _port(text: str) -> int:
    from app.ingest.parse import integer

    try:
        return integer(1, 65535)(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"{text!r}: {exc}") from None
