"""``morrow``: the command line. Exit status 0 on success, 2 on bad input, 1 on other errors."""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

from app.config import get_settings
from app.ingest import KINDS, ImportRefused, import_file
from app.store import db

EXIT_OK, EXIT_ERROR, EXIT_BAD_INPUT = 0, 1, 2


class BadInput(Exception):
    """A problem with what the user gave: exit status 2."""


def _database_url(arg: str | None) -> str:
    return arg or os.environ.get("MORROW_DATABASE_URL") or get_settings().database_url


def cmd_db_upgrade(args: argparse.Namespace) -> int:
    print(f"database at revision {db.current_revision(args.db)}")
    return EXIT_OK


def cmd_import(args: argparse.Namespace) -> int:
    path = Path(args.file)
    if not path.is_file():
        raise BadInput(f"{path}: no such file")
    data = path.read_bytes()
    try:
        with db.session_scope(args.db) as session:
            result = import_file(session, args.kind, data, path.name, tz=get_settings().tz,
                                 actor=os.environ.get("USER", "cli"))
    except ImportRefused as refused:
        print(refused.summary(), file=sys.stderr)
        return EXIT_BAD_INPUT
    for warning in result.warnings:
        print(f"warning: {warning}", file=sys.stderr)
    print(result.summary())
    return EXIT_OK


def cmd_demo_load(args: argparse.Namespace) -> int:
    from app.demo.load import is_loaded, load_demo

    with db.session_scope(args.db) as session:
        if is_loaded(session, Path(args.dir)):
            print("the demo hospital is already loaded in this database")
            return EXIT_OK
        results, shift = load_demo(session, Path(args.dir), tz=get_settings().tz,
                                   shift=not args.no_shift)
    for result in results:
        print(result.summary())
    if shift.days:
        print(f"demo dates moved forward {shift.days} days (whole weeks) to end this week")
    return EXIT_OK


def cmd_serve(args: argparse.Namespace) -> int:
    import uvicorn

    from app.web.app import create_app

    if args.host not in ("127.0.0.1", "localhost", "::1"):
        print(f"warning: listening on {args.host}; put a TLS proxy in front before others use it",
              file=sys.stderr)
    print(f"Morrow serving on http://{args.host}:{args.port}/", flush=True)
    uvicorn.run(create_app(args.db), host=args.host, port=args.port, log_level="warning")
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="morrow", description="Bed occupancy forecasts for a hospital unit.")
    parser.add_argument("--db", default=None,
                        help="SQLAlchemy database URL (default: $MORROW_DATABASE_URL, "
                             "then sqlite:///morrow.db)")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("db", help="database maintenance")
    dbsub = p.add_subparsers(dest="db_command", required=True, metavar="ACTION")
    dbsub.add_parser("upgrade", help="apply pending migrations").set_defaults(func=cmd_db_upgrade)

    p = sub.add_parser("import", help="import one CSV file (all rows or none)")
    p.add_argument("kind", choices=KINDS)
    p.add_argument("file")
    p.set_defaults(func=cmd_import)

    p = sub.add_parser("demo", help="the invented demo hospital")
    demosub = p.add_subparsers(dest="demo_command", required=True, metavar="ACTION")
    d = demosub.add_parser("load", help="import the demo CSVs")
    d.add_argument("--dir", default=str(Path(__file__).resolve().parents[2] / "demo_data"))
    d.add_argument("--no-shift", action="store_true",
                   help="keep the generated dates instead of moving them to this week")
    d.set_defaults(func=cmd_demo_load)

    p = sub.add_parser("serve", help="serve the web page and API")
    p.add_argument("--host", default="127.0.0.1")
    p.add_argument("--port", type=int, default=8000)
    p.set_defaults(func=cmd_serve)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    args.db = _database_url(args.db)
    func: Callable[[argparse.Namespace], int] = args.func
    try:
        db.upgrade(args.db)
        return func(args)
    except BadInput as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        return EXIT_ERROR
    except Exception as exc:  # the last line of defence: a message, not a trace
        print(f"error: {type(exc).__name__}: {exc}", file=sys.stderr)
        return EXIT_ERROR


if __name__ == "__main__":
    sys.exit(main())
