"""Commands for FHIR import, feed replays and the feed's census.

``morrow import fhir FILE`` (a Bundle, or a directory of ``*.json`` Bundles imported in
name order, each all-or-nothing); ``morrow feeds export-hl7 --out FILE`` and ``morrow feeds
export-fhir --out DIR`` (a database's stays and scores as a message stream, see
``app.feeds.replay``); ``morrow feeds census [--until T]`` (census snapshots due from the
feeds' state, for cron: ``app.feeds.census``).
"""

from __future__ import annotations

import argparse
import os
import sys
from datetime import UTC
from pathlib import Path
from typing import Any

from app.cli.feeds import EXIT_BAD_INPUT, EXIT_ERROR, EXIT_OK, _mapping


def cmd_import_fhir(args: argparse.Namespace) -> int:
    from app.config import get_settings
    from app.feeds.fhir import BundleRefused
    from app.feeds.fhir_import import import_bundle_once
    from app.feeds.pseudonym import site_pseudonymiser
    from app.ingest.retried import ImportTimedOut

    path = Path(args.file)
    files = sorted(path.glob("*.json")) if path.is_dir() else [path]
    if not path.exists() or not files:
        print(f"error: {path}: no such file (or no *.json Bundle in the directory)",
              file=sys.stderr)
        return EXIT_BAD_INPUT
    mapping = _mapping(getattr(args, "mapping", None))
    if mapping is None:
        return EXIT_BAD_INPUT
    pseudonymiser = site_pseudonymiser()
    actor = os.environ.get("USER", "cli")
    for file in files:
        try:
            result = import_bundle_once(args.db, file.read_bytes(), file.name, mapping=mapping,
                                        pseudonymiser=pseudonymiser, tz=get_settings().tz,
                                        actor=actor)
        except BundleRefused as refused:
            print(f"{file.name}: {refused.summary()}", file=sys.stderr)
            return EXIT_BAD_INPUT
        except ImportTimedOut as late:
            print(f"error: {file.name}: {late}", file=sys.stderr)
            return EXIT_ERROR
        for note in result.notes[:20]:
            print(f"note: {note}", file=sys.stderr)
        for dead in result.dead_letters[:20]:
            print(f"dead letter: {dead}", file=sys.stderr)
        print(result.summary())
    return EXIT_OK


def _items(args: argparse.Namespace) -> list[Any]:
    from app.config import get_settings
    from app.feeds.replay import history
    from app.store import db
    from app.timeutil import parse_timestamp

    tz = get_settings().tz
    since = parse_timestamp(args.since, tz) if args.since else None
    until = parse_timestamp(args.until, tz) if args.until else None
    with db.session_scope(args.db) as session:
        items = history(session, units=args.unit or None, since=since, until=until)
        session.expunge_all()
    return items


def cmd_export_hl7(args: argparse.Namespace) -> int:
    from app.config import get_settings
    from app.feeds.replay import write_hl7

    out = Path(args.out)
    count = write_hl7(_items(args), out, get_settings().tz)
    print(f"{out}: {count} HL7 v2 messages in the order they became known "
          f"(mapping for them: {out.parent / 'feeds.toml'})")
    return EXIT_OK


def cmd_export_fhir(args: argparse.Namespace) -> int:
    from app.config import get_settings
    from app.feeds.replay import write_fhir

    out = Path(args.out)
    count = write_fhir(_items(args), out, get_settings().tz)
    print(f"{out}: {count} FHIR R4 Bundles, one per day (mapping for them: "
          f"{out / 'feeds.toml'})")
    return EXIT_OK


def cmd_census(args: argparse.Namespace) -> int:
    from app.config import current_time, get_settings
    from app.feeds.census import record_due
    from app.store import db
    from app.timeutil import parse_timestamp

    tz = get_settings().tz
    now = current_time()
    until = parse_timestamp(args.until, tz) if args.until else now
    if until > now.astimezone(UTC):
        print("error: --until is in the future: a census records what is known, not what "
              "will be", file=sys.stderr)
        return EXIT_BAD_INPUT
    with db.session_scope(args.db) as session:
        taken = record_due(session, until, tz)
    for snap in taken[-10:]:
        print(f"{snap.unit} {snap.taken_at.astimezone(tz).isoformat()}: {snap.occupancy} stays")
    print(f"{len(taken)} census snapshot(s) taken from the feeds' state")
    return EXIT_OK


def register(feeds: Any) -> None:
    """Add the export and census commands to the ``feeds`` command's sub-commands."""
    for name, func, what in (("export-hl7", cmd_export_hl7, "HL7 v2 ADT/ORU messages (file)"),
                             ("export-fhir", cmd_export_fhir, "FHIR R4 Bundles (directory)")):
        p = feeds.add_parser(name, help=f"replay stored stays and scores as {what}")
        p.add_argument("--out", required=True)
        p.add_argument("--unit", action="append", default=[], help="only this unit (repeatable)")
        p.add_argument("--since", default=None, help="stays admitted from this instant on")
        p.add_argument("--until", default=None, help="what was known by this instant")
        p.set_defaults(func=func)
    p = feeds.add_parser("census", help="take the census snapshots due from the feeds' state")
    p.add_argument("--until", default=None, help="up to this instant (default: now)")
    p.set_defaults(func=cmd_census)


def feeds_subparsers(sub: Any) -> Any:
    """The ``feeds`` command's sub-command action, made if no other module made it."""
    existing = sub.choices.get("feeds")
    if existing is None:
        existing = sub.add_parser("feeds", help="HL7 v2 and FHIR feeds")
        return existing.add_subparsers(dest="feeds_command", required=True, metavar="ACTION")
    for action in existing._actions:
        if isinstance(action, argparse._SubParsersAction):
            return action
    return existing.add_subparsers(dest="feeds_command", required=True, metavar="ACTION")
