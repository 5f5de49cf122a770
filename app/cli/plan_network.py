"""``morrow plan --units A,B``: units simulated together, with routing and exit block.

    morrow plan --units KV-CRIT,KV-SURG --beds KV-SURG=+2

answers "two more ward beds take how many critical-care bed-days a week off the step-down
queue": bed-days held by patients waiting to move on, per week, before and after (paired
replications, with an interval), and the same for none to four extra beds of the varied unit.
``--beds`` takes UNIT=+N (N more staffed beds), UNIT=-N or UNIT=N (N beds), comma-separated.
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from app import bounds
from app.config import current_time, get_settings
from app.store import db, repo
from app.time_limits import command_limit

EXIT_OK, EXIT_BAD_INPUT = 0, 2
DAYS_PER_YEAR = 365


def parse_units(text: str) -> list[str]:
    """'KV-CRIT,KV-SURG' -> the unit codes (each once, at most ``MAX_NETWORK_UNITS``)."""
    units = [u.strip() for u in text.split(",") if u.strip()]
    if not units:
        raise ValueError(f"--units {text!r}: give unit codes separated by commas")
    if len(set(units)) != len(units):
        raise ValueError(f"--units {text!r}: each unit once")
    bounds.check_whole(len(units), "--units (how many)", 1, bounds.MAX_NETWORK_UNITS)
    return units


def parse_bed_changes(text: str | None, staffed: dict[str, int]) -> tuple[tuple[str, int], ...]:
    """'KV-SURG=+2,KV-CRIT=10' -> ((KV-SURG, 2), (KV-CRIT, 10 - staffed)): changes in beds."""
    if not text:
        return ()
    out = []
    for part in text.split(","):
        unit, sep, value = part.strip().partition("=")
        unit, value = unit.strip(), value.strip()
        if not sep or not unit or not value:
            raise ValueError(f"--beds {text!r}: write it like --beds KV-SURG=+2")
        if unit not in staffed:
            raise ValueError(f"--beds: {unit!r} is not one of --units ({', '.join(staffed)})")
        try:
            number = int(value)
        except ValueError:
            raise ValueError(f"--beds {part.strip()!r}: {value!r} is not a whole number") \
                from None
        change = number if value[0] in "+-" else number - staffed[unit]
        bounds.check_bed_change(change, f"--beds {unit}")
        out.append((unit, change))
    return tuple(out)


def _interval(e: dict[str, float], digits: int = 1) -> str:
    return f"{e['mean']:.{digits}f} ({e['ci_low']:.{digits}f} to {e['ci_high']:.{digits}f})"


def _hours(value: float | None) -> str:
    return "-" if value is None else f"{value:.0f} h"


def render_network_plan(report: dict[str, Any]) -> str:
    """The report as tables for the terminal."""
    s = report["settings"]
    level = f"{s['level']:.0%}"
    names = [u["unit"] for u in report["units"]]
    lines = [f"{' + '.join(names)} together: beds, routing and waits to move on",
             f"{s['years']:g} years simulated x {s['replications']} replications (warm-up "
             f"{s['warmup_days']} days, seed {s['seed']}); intervals {level}, differences "
             "from paired replications", ""]
    for u in report["units"]:
        moved = u["beds_after"] != u["staffed_beds"]
        lines.append(f"  {u['unit']:<10} model {u['model']['id'][:8]} trained until "
                     f"{u['model']['trained_until']}; {u['staffed_beds']} staffed beds"
                     f"{' -> ' + str(u['beds_after']) if moved else ''}"
                     f"; {u['external_per_day']:.2f} admissions a day from outside"
                     + (f" ({u['transfers_removed']:.0%} of emergency admissions were "
                        "transfers, now routed)" if u["transfers_removed"] else ""))
    lines += ["", "routing (share of patients leaving who go on):"]
    if not report["routes"]:
        lines.append("  none: no patient of these units went on to another of them")
    for r in report["routes"]:
        lines.append(f"  {r['source']} -> {r['target']}: {r['share']:.1%} "
                     f"(from the {r['source_of_shares']}, as of {r['trained_until'][:10]})")
    header = (f"  {'unit':<10} {'beds':>5} {'bed-days waiting/week':>26} "
              f"{'waits/week':>11} {'median wait':>12} {'90% wait':>9} {'turned away/week':>17} "
              f"{'mean occupied':>14} {'time full':>10}")
    for label, key in (("before", "before"), ("after", "after")):
        lines += ["", f"{label}:", header]
        for u in names:
            row = report[key][u]
            lines.append(f"  {u:<10} {row['beds']!s:>5} "
                         f"{_interval(row['waiting_bed_days_per_week']):>26} "
                         f"{row['waits_per_week']['mean']:>11.1f} "
                         f"{_hours(row['wait_median_hours']):>12} "
                         f"{_hours(row['wait_p90_hours']):>9} "
                         f"{row['turned_away_per_week']['mean']:>17.2f} "
                         f"{row['mean_occupancy']['mean']:>14.1f} "
                         f"{row['share_time_full']['mean']:>10.1%}")
    if s["changes"]:
        lines += ["", "change (after minus before, paired):"]
        for u in names:
            c = report["change"][u]
            lines.append(f"  {u:<10} bed-days waiting a week "
                         f"{_interval(c['waiting_bed_days_per_week'], 2)}; turned away a week "
                         f"{_interval(c['turned_away_per_week'], 2)}")
    lines += ["", f"bed-days a week spent waiting to move on, against extra beds in "
                  f"{s['vary']}:"]
    for row in report["curve"]:
        waits = "; ".join(f"{u} {_interval(row['units'][u]['waiting_bed_days_per_week'])}"
                          for u in names)
        lines.append(f"  +{row['extra']} ({row['beds']} beds): {waits}")
    lines.append(f"\nsimulated in {report['seconds']:.1f} s")
    return "\n".join(lines)


def cmd_plan_network(args: argparse.Namespace) -> int:
    from app.forecast.network_plan import (
        NetworkPlanError,
        NetworkSettings,
        network_demand,
        run_network_plan,
    )
    from app.forecast.service import NoModel

    try:
        units = parse_units(args.units)
        days = max(1, round(float(args.years) * DAYS_PER_YEAR))
        bounds.check_plan_days(days)
    except ValueError as exc:
        return _error(str(exc))
    with db.session_scope(args.db) as session:
        known = {u.code for u in repo.list_units(session)}
        unknown = [u for u in units if u not in known]
        if unknown:
            return _error(f"unit {unknown[0]!r} is not known (known units: "
                          f"{', '.join(sorted(known)) or 'none yet'})")
        try:
            demand = network_demand(session, units, current_time(), get_settings().tz,
                                    days=days, replications=args.replications, seed=args.seed)
        except (NoModel, NetworkPlanError, bounds.OutOfBounds) as exc:
            return _error(str(exc))
    staffed = {u.name: int(u.beds) for u in demand.network.units if u.beds is not None}
    try:
        changes = parse_bed_changes(args.beds, staffed)
        if args.vary is not None and args.vary not in staffed:
            raise ValueError(f"--vary: {args.vary!r} is not one of --units")
        settings = NetworkSettings(days=days, replications=args.replications, seed=args.seed,
                                   changes=changes, vary=args.vary)
    except ValueError as exc:
        return _error(str(exc))
    show = None
    if not args.json and sys.stderr.isatty():
        from app.cli.plan import progress_bar

        show = progress_bar(sys.stderr)
    try:
        with command_limit("The planning simulation of units together",
                           "Try fewer --years or --replications, or a larger "
                           "MORROW_COMMAND_SECONDS."):
            report = run_network_plan(demand, settings, progress=show)
    except ValueError as exc:
        return _error(str(exc))
    if args.json:
        print(json.dumps(report, allow_nan=False))
    else:
        print(render_network_plan(report))
    return EXIT_OK


def _error(message: str) -> int:
    print(f"error: {message}", file=sys.stderr)
    return EXIT_BAD_INPUT
