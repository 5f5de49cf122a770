"""``morrow unit levels --unit U [--warning W --alarm A]``: show or set a unit's alert levels.

The levels are chances (0.1 = 10%) of more patients than staffed beds; the bounds are the
page's and the API's (``app.bounds.check_alert_levels``) and the change is audited with the
values before and after (``app.store.unit_levels``).
"""

from __future__ import annotations

import argparse
import sys

from app import bounds
from app.alert_levels import RISK_TERM, percent
from app.cli.args import unit_code as unit_code_arg
from app.cli.users import _cli_actor
from app.store import db
from app.store.unit_levels import UnknownUnit, set_unit_levels, unit_levels

EXIT_OK, EXIT_BAD_INPUT = 0, 2


def _chance(text: str) -> float:
    from app.ingest.parse import number

    try:
        return number(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"{text!r}: {exc}") from None


def cmd_unit_levels(args: argparse.Namespace) -> int:
    if (args.warning is None) != (args.alarm is None):
        print("error: give both --warning and --alarm, or neither to show the levels",
              file=sys.stderr)
        return EXIT_BAD_INPUT
    try:
        with db.session_scope(args.db) as session:
            if args.warning is None:
                levels = unit_levels(session, args.unit)
            else:
                levels = set_unit_levels(session, args.unit, args.warning, args.alarm,
                                         actor=_cli_actor(), form="cli unit levels")
    except (UnknownUnit, bounds.OutOfBounds) as exc:
        print(f"error: {exc.args[0]}", file=sys.stderr)
        return EXIT_BAD_INPUT
    print(f"{args.unit}: warning at {percent(levels.warning)}, alarm at {percent(levels.alarm)} "
          f"{RISK_TERM}")
    return EXIT_OK


def register(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser("unit", help="a unit's settings")
    unitsub = p.add_subparsers(dest="unit_command", required=True, metavar="ACTION")
    q = unitsub.add_parser("levels", help=f"show or set the unit's alert levels ({RISK_TERM})")
    q.add_argument("--unit", required=True, type=unit_code_arg)
    q.add_argument("--warning", type=_chance, default=None,
                   help=f"chance counted as a warning, {bounds.MIN_ALERT_LEVEL:g} to "
                        f"{bounds.MAX_ALERT_LEVEL:g} (0.1 = 10%%)")
    q.add_argument("--alarm", type=_chance, default=None,
                   help="chance counted as an alarm, above the warning (0.25 = 25%%)")
    q.set_defaults(func=cmd_unit_levels)
