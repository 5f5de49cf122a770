"""``morrow plan``: beds needed for a target risk, the capacity curve and what-if scenarios.

Every scenario option may be repeated; each occurrence is one scenario, compared with the
current state at the staffed beds (or ``--compare-at``):

    --scale-arrivals emergency=1.1     10% more emergency admissions (also +10%, or -5%)
    --scale-stay G2=0.8                stays in group G2 20% shorter (also -20%; 'longest')
    --move-share G1:G2=0.2             a fifth of group G1's patients come as G2 (also 20%)
    --move-electives Mon:Fri=0.5       half of Monday's booked operations moved to Friday

Exit status 0 on success, 2 on bad input (unknown unit or group, no trained model), 1 otherwise.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from collections.abc import Callable
from typing import Any, TextIO

from app import bounds
from app.cli.args import unit_code as unit_code_arg
from app.config import current_time, get_settings
from app.store import db, repo
from app.time_limits import command_limit

EXIT_OK, EXIT_ERROR, EXIT_BAD_INPUT = 0, 1, 2
DAYS_PER_YEAR = 365


class PlanInputError(ValueError):
    """A problem with what the user asked for: exit status 2."""


# -- parsing -------------------------------------------------------------------------------------

def _number(text: str, what: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise PlanInputError(f"{what}: {text!r} is not a number") from None
    if not math.isfinite(value):  # inf would pass on to round() and fail there
        raise PlanInputError(f"{what}: {text!r} is not a finite number")
    return value


def parse_factor(text: str, what: str) -> float:
    """'1.1', '+10%' or '10%' -> 1.1; '-20%' -> 0.8."""
    value = text.strip()
    if value.endswith("%"):
        return 1.0 + _number(value[:-1], what) / 100.0
    return _number(value, what)


def parse_share(text: str, what: str) -> float:
    """'0.2' or '20%' -> 0.2."""
    value = text.strip()
    if value.endswith("%"):
        return _number(value[:-1], what) / 100.0
    return _number(value, what)


def _split(spec: str, option: str, pair: bool) -> tuple[list[str], str]:
    """'A=V' -> (['A'], 'V'); with ``pair``, 'A:B=V' -> (['A', 'B'], 'V')."""
    example = {"--scale-arrivals": "emergency=1.1", "--scale-stay": "G2=0.8",
               "--move-share": "G1:G2=0.2", "--move-electives": "Mon:Fri=0.5"}[option]
    left, sep, value = spec.rpartition("=")
    names = left.split(":") if pair else [left]
    if not sep or not value.strip() or len(names) != (2 if pair else 1) or not all(
            n.strip() for n in names):
        raise PlanInputError(f"{option} {spec!r}: write it like {option} {example}")
    return [n.strip() for n in names], value


def parse_beds(text: str) -> tuple[int, ...]:
    """'16', '12-24' or '12,14,16' -> bed counts."""
    counts: list[int] = []
    try:
        for part in text.split(","):
            low, sep, high = part.strip().partition("-")
            ends = [int(low), int(high)] if sep else [int(low)]
            # Checked before a range is spelt out: 1-1000000000 would fill the memory.
            if not all(1 <= n <= bounds.MAX_BEDS for n in ends):
                raise PlanInputError(f"--beds {text!r}: bed counts must be from 1 to "
                                     f"{bounds.MAX_BEDS}")
            counts.extend(range(ends[0], ends[-1] + 1))
    except ValueError as exc:
        if isinstance(exc, PlanInputError):
            raise
        raise PlanInputError(f"--beds {text!r}: give a count (16), a range (12-24) or a list "
                             "(12,14,16)") from None
    if not counts:
        raise PlanInputError(f"--beds {text!r}: a range must run from low to high (12-24)")
    return tuple(sorted(set(counts)))


def build_scenarios(args: argparse.Namespace, demand: Any) -> list[Any]:
    """The scenarios asked for, in the order of the options' kinds."""
    from app.forecast.planning_report import (
        arrivals_scenario,
        electives_scenario,
        parse_weekday,
        share_scenario,
        stay_scenario,
    )

    out = []
    try:
        for spec in args.scale_arrivals:
            (what,), value = _split(spec, "--scale-arrivals", False)
            out.append(arrivals_scenario(demand, what, parse_factor(value, "--scale-arrivals")))
        for spec in args.scale_stay:
            (group,), value = _split(spec, "--scale-stay", False)
            out.append(stay_scenario(demand, group, parse_factor(value, "--scale-stay")))
        for spec in args.move_share:
            (source, target), value = _split(spec, "--move-share", True)
            out.append(share_scenario(demand, source, target,
                                      parse_share(value, "--move-share")))
        for spec in args.move_electives:
            (source, target), value = _split(spec, "--move-electives", True)
            out.append(electives_scenario(demand, parse_weekday(source), parse_weekday(target),
                                          parse_share(value, "--move-electives")))
    except PlanInputError:
        raise
    except ValueError as exc:
        raise PlanInputError(str(exc)) from None
    names = [s.name for s in out]
    if len(set(names)) != len(names):
        raise PlanInputError(f"the same scenario is asked for twice: {names!r}")
    return out


# -- running ------------------------------------------------------------------------------------

def progress_bar(stream: TextIO) -> Callable[[str, int, int], None]:
    """A one-line bar per stage, redrawn in place."""
    def show(stage: str, done: int, total: int) -> None:
        width = 30
        filled = int(width * done / max(total, 1))
        stream.write(f"\r[{'#' * filled}{'.' * (width - filled)}] {done}/{total} {stage:<32}")
        if done >= total:
            stream.write("\n")
        stream.flush()
    return show


def cmd_plan(args: argparse.Namespace) -> int:
    from app.forecast.planning_inputs import unit_planning_input
    from app.forecast.planning_report import PlanSettings, run_plan
    from app.forecast.service import NoModel

    if (args.unit is None) == (args.units is None):
        return _error("give either --unit (one unit) or --units (several together)")
    if args.units is not None:
        from app.cli.plan_network import cmd_plan_network

        return cmd_plan_network(args)
    try:
        settings = PlanSettings(
            target=parse_share(args.target, "--target"),
            days=max(1, round(_number(args.years, "--years") * DAYS_PER_YEAR)),
            replications=args.replications, seed=args.seed,
            beds=None if args.beds is None else parse_beds(args.beds),
            compare_at=args.compare_at)
    except ValueError as exc:
        return _error(str(exc))
    with db.session_scope(args.db) as session:
        if repo.get_unit(session, args.unit) is None:
            known = ", ".join(u.code for u in repo.list_units(session)) or "none yet"
            return _error(f"unit {args.unit!r} is not known (known units: {known})")
        try:
            demand = unit_planning_input(session, args.unit, current_time(), get_settings().tz)
        except NoModel as exc:
            return _error(str(exc))
    try:
        scenarios = build_scenarios(args, demand)
    except PlanInputError as exc:
        return _error(str(exc))
    show = None if args.json or not sys.stderr.isatty() else progress_bar(sys.stderr)
    try:
        with command_limit("The planning simulation",
                           "Try fewer --years or --replications, or a larger "
                           "MORROW_COMMAND_SECONDS."):
            report = run_plan(demand, settings, scenarios, progress=show)
    except ValueError as exc:  # for example a scenario with no admissions left at all
        return _error(str(exc))
    if args.json:
        print(json.dumps(report, allow_nan=False))
    else:
        print(render_plan(report))
    return EXIT_OK


def _error(message: str) -> int:
    print(f"error: {message}", file=sys.stderr)
    return EXIT_BAD_INPUT


# -- the table ----------------------------------------------------------------------------------

def _pct(value: float, digits: int = 1) -> str:
    return f"{value * 100:.{digits}f}%"


def _ci(estimate: dict[str, float]) -> str:
    low, high = max(estimate["ci_low"], 0.0), max(estimate["ci_high"], 0.0)
    return f"{_pct(estimate['mean'])} ({low * 100:.1f}-{high * 100:.1f})"


def _points(m: dict[str, float]) -> str:
    return (f"{m['difference'] * 100:+.1f} ({m['difference_low'] * 100:+.1f} to "
            f"{m['difference_high'] * 100:+.1f})")


def render_plan(report: dict[str, Any]) -> str:
    """The report as tables for the terminal."""
    s = report["settings"]
    d = report["demand"]
    needed = report["beds_needed"]
    staffed = report["staffed_beds"]
    lines = [f"{report['unit']}: beds against the chance an arrival finds no bed",
             f"model {report['model']['id'][:8]} trained until {report['model']['trained_until']}"
             f"; {s['years']:g} years simulated x {s['replications']} replications (warm-up "
             f"{s['warmup_days']} days, seed {s['seed']}); intervals {s['level']:.0%}",
             "demand: " + ", ".join(f"{x['name']} {x['admissions_per_day']:.2f}/day"
                                    for x in d["streams"])
             + f"; offered load {d['offered_load']:.2f} beds (Erlangs)", "",
             "patient groups (from the length-of-stay model):"]
    for g in d["groups"]:
        lines.append(f"  {g['name']:<4} mean stay {g['mean_stay']:5.1f} days, "
                     f"{g['arrivals_per_day']:4.2f}/day  {g['rule']}")
    lines += ["", f"{'beds':>4}  {'finding no bed (95% CI)':<24} {'mean occupied':>13} "
              f"{'occupancy':>9}  {'days someone finds no bed':>25} {'Erlang B':>9}"]
    for row in report["curve"]:
        marks = []
        if row["beds"] == staffed:
            marks.append("staffed now")
        if row["beds"] == needed["simulation"]:
            marks.append("needed")
        lines.append(f"{row['beds']:>4}  {_ci(row['share_turned_away']):<24} "
                     f"{row['mean_occupancy']['mean']:>13.1f} "
                     f"{_pct(row['occupancy_rate']['mean']):>9}  "
                     f"{_pct(row['share_days_turning_away']['mean']):>25} "
                     f"{_pct(row['erlang_b']):>9}" + (f"  <- {', '.join(marks)}" if marks else ""))
    target = _pct(s["target"], 1 if s["target"] * 100 % 1 else 0)
    lines += ["", f"beds needed so that at most {target} of arrivals find no bed:",
              f"  by simulation:                  {needed['simulation']} "
              f"({needed['simulation_confident']} to keep the 95% upper bound under {target})",
              f"  by the Erlang loss formula:     {needed['erlang']} (flat Poisson arrivals, "
              f"same offered load)"]
    lines.append(f"  staffed beds now:               {staffed if staffed is not None else '-'}")
    width = max(len(sc["name"]) for sc in report["scenarios"])
    lines += ["", f"scenarios at {report['compare_at']} beds (change: percentage points, "
              f"paired replications, 95% CI)",
              f"  {'scenario':<{width}} {'finding no bed':>18} {'change':>24} {'occupancy':>9} "
              f"{'days someone finds no bed':>25} {'beds needed sim/Erlang':>22}"]
    for sc in report["scenarios"]:
        m = sc["metrics"]
        change = "-" if sc["name"] == "current state" else _points(m["share_turned_away"])
        lines.append(f"  {sc['name']:<{width}} {_ci(m['share_turned_away']):>18} {change:>24} "
                     f"{_pct(m['occupancy_rate']['mean']):>9} "
                     f"{_pct(m['share_days_turning_away']['mean']):>25} "
                     f"{sc['beds_needed']['simulation']:>15} / {sc['beds_needed']['erlang']}")
    lines.append(f"\nsimulated in {report['seconds']:.1f} s")
    return "\n".join(lines)


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add ``plan`` to the top-level subcommands."""
    p = sub.add_parser(
        "plan", help="beds needed for a target risk, and what-if scenarios",
        description="Simulate the unit's demand (from its trained model) on a range of bed "
                    "counts and report the chance an arrival finds no bed, beside the Erlang "
                    "loss formula; compare scenarios with the current state.",
        epilog="Scenario options can be repeated; each is one scenario. Examples: "
               "--scale-arrivals emergency=+10%%  --scale-stay longest=0.8  "
               "--move-share G1:G2=20%%  --move-electives Mon:Fri=0.5")
    p.add_argument("--unit", default=None, type=unit_code_arg)
    p.add_argument("--units", default=None,
                   help="plan several units together (KV-CRIT,KV-SURG): routing between them "
                        "and waits to move on; then --beds takes UNIT=+N (see plan_network)")
    p.add_argument("--vary", default=None,
                   help="with --units: the unit whose extra beds 0..4 make the curve "
                        "(default: the first unit in --beds)")
    p.add_argument("--target", default="0.05",
                   help="largest acceptable share of arrivals finding no bed (0.05 or 5%%)")
    p.add_argument("--years", default="2", help="years simulated per replication (default 2)")
    p.add_argument("--replications", type=int, default=20,
                   help="independent replications for the intervals (default 20)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--beds", default=None,
                   help="bed counts of the table: 16, 12-24 or 12,14,16 (default: a range "
                        "around the demand); with --units: KV-SURG=+2 (more staffed beds)")
    p.add_argument("--compare-at", type=int, default=None, dest="compare_at",
                   help="beds at which scenarios are compared (default: staffed beds now)")
    p.add_argument("--scale-arrivals", action="append", default=[], metavar="TYPE=FACTOR",
                   help="more or fewer arrivals: emergency, elective, all or a stream name")
    p.add_argument("--scale-stay", action="append", default=[], metavar="GROUP=FACTOR",
                   help="longer or shorter stays for a patient group (G1.. or longest)")
    p.add_argument("--move-share", action="append", default=[], metavar="FROM:TO=SHARE",
                   help="move a share of one group's patients to another group")
    p.add_argument("--move-electives", action="append", default=[], metavar="DAY:DAY=SHARE",
                   help="move a share of one weekday's booked operations to another weekday")
    p.add_argument("--json", action="store_true", help="the whole report as JSON")
    p.set_defaults(func=cmd_plan)
