"""``morrow``: the command line. Exit status 0 on success, 2 on bad input, 1 on other errors."""

from __future__ import annotations

import argparse
import json
import os
import sys
from collections.abc import Callable, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from sqlalchemy.orm import Session

from app import bounds
from app.cli import feeds, fhir_replay, plan, units, users
from app.cli.args import unit_code as unit_code_arg
from app.config import current_time, get_settings
from app.ingest import KINDS, ImportRefused
from app.ingest.retried import ImportTimedOut, import_once
from app.store import db, repo
from app.time_limits import WorkCancelled, command_limit
from app.timeutil import parse_timestamp

EXIT_OK, EXIT_ERROR, EXIT_BAD_INPUT = 0, 1, 2


class BadInput(Exception):
    """A problem with what the user gave: exit status 2."""


def _database_url(arg: str | None) -> str:
    return arg or os.environ.get("MORROW_DATABASE_URL") or get_settings().database_url


def cmd_db_upgrade(args: argparse.Namespace) -> int:
    print(f"database at revision {db.current_revision(args.db)}")
    return EXIT_OK


def cmd_import(args: argparse.Namespace) -> int:
    if args.kind == "fhir":
        return fhir_replay.cmd_import_fhir(args)
    if args.kind == "hl7":
        return feeds.cmd_import_hl7(args)
    path = Path(args.file)
    if not path.is_file():
        raise BadInput(f"{path}: no such file")
    data = path.read_bytes()
    try:
        # Run again when another import of the same rows committed first: it then finds
        # them stored and reports them unchanged, instead of failing on the unique key.
        result = import_once(args.db, args.kind, data, path.name, tz=get_settings().tz,
                             actor=os.environ.get("USER", "cli"))
    except ImportRefused as refused:
        print(refused.summary(), file=sys.stderr)
        return EXIT_BAD_INPUT
    except ImportTimedOut as late:
        print(f"error: {late}", file=sys.stderr)
        return EXIT_ERROR
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


def _instant(text: str, option: str) -> datetime:
    try:
        moment = parse_timestamp(text, get_settings().tz)
    except ValueError:
        raise BadInput(f"{option} {text!r} is not an ISO 8601 timestamp (e.g. 2026-03-02T08:00)"
                       ) from None
    try:
        return bounds.check_as_of(moment, option)
    except bounds.OutOfBounds as exc:
        raise BadInput(str(exc)) from None


def _known_unit(session: Session, unit: str) -> None:
    if repo.get_unit(session, unit) is None:
        known = ", ".join(u.code for u in repo.list_units(session)) or "none yet"
        raise BadInput(f"unit {unit!r} is not known (known units: {known})")


def cmd_train(args: argparse.Namespace) -> int:
    from app.forecast.los import format_metrics
    from app.forecast.service import train_model
    from app.forecast.training_data import TooLittleHistory

    until = _instant(args.until, "--until") if args.until else datetime.now(UTC)
    with db.session_scope(args.db) as session:
        _known_unit(session, args.unit)
        print(f"training {args.unit} on what was known at {until.isoformat()} ...", flush=True)
        try:
            model_id, payload = train_model(session, args.unit, until, get_settings().tz)
        except TooLittleHistory as exc:  # the remedy is more history or a later --until
            raise BadInput(str(exc)) from None
    print(format_metrics(payload["metrics"]))
    print(f"stored model {model_id}")
    return EXIT_OK


def cmd_forecast(args: argparse.Namespace) -> int:
    from app.forecast.service import NoModel, forecast

    instants = [_instant(t, "--as-of") for t in args.as_of] or [datetime.now(UTC)]
    tz = get_settings().tz
    _forecast_days(args.days)
    results = []
    with db.session_scope(args.db) as session, command_limit("The forecast",
                                                             "Try fewer --days or --as-of."):
        _known_unit(session, args.unit)
        for at in instants:  # all of them first: one failure prints nothing
            try:
                results.append(forecast(session, args.unit, at, tz, days=args.days))
            except NoModel as exc:
                raise BadInput(str(exc)) from None
    if args.json:
        for result in results:
            print(json.dumps(result, allow_nan=False))
        return EXIT_OK
    for result in results:
        print(render_forecast_table(result))
    return EXIT_OK


def _forecast_days(days: int) -> None:
    try:
        bounds.check_forecast_days(days, "--days")
    except bounds.OutOfBounds as exc:
        raise BadInput(str(exc)) from None


def render_forecast_table(result: dict[str, Any]) -> str:
    from app.nights import night_of

    tz = get_settings().tz
    lines = [f"{result['unit']} as of {result['as_of']} (model trained until "
             f"{result['model']['trained_until']})",
             f"{'night':<16} {'census at':<27} {'beds':>4} {'median':>6} {'80% band':>9} "
             f"{'95% band':>9} {'more than beds':>14}"]
    for day in result["days"]:
        q = day["quantiles"]
        over = "" if day["p_over_capacity"] is None else f"{day['p_over_capacity']:.0%}"
        night = night_of(datetime.fromisoformat(day["census_at"]), tz).dated_name
        lines.append(f"{night:<16} {day['census_at']:<27} "
                     f"{day['beds'] if day['beds'] is not None else '-':>4} "
                     f"{q['0.5']:>6} {q['0.1']:>4}-{q['0.9']:<4} {q['0.025']:>4}-{q['0.975']:<4} "
                     f"{over:>14}")
    lines.append("more than beds: the chance of more patients than staffed beds that night")
    if "p_over_capacity_any_day" in result:
        lines.append(f"chance of more patients than staffed beds on any of these days: "
                     f"{result['p_over_capacity_any_day']:.0%}")
    return "\n".join(lines)


def cmd_backtest(args: argparse.Namespace) -> int:
    from app.forecast.backtest import run_backtest, store_backtest, text_progress
    from app.forecast.calibration_plot import save_calibration_plot
    from app.timeutil import parse_date

    try:
        start, end = parse_date(args.start), parse_date(args.end)
    except ValueError:
        raise BadInput("--from and --to take dates YYYY-MM-DD") from None
    _forecast_days(args.days)
    latest = (datetime.now(UTC) + bounds.AS_OF_AHEAD).date()
    try:
        bounds.check_date(start, "--from", latest=latest)
        bounds.check_date(end, "--to", latest=latest)
        bounds.check_date_range(start, end)
    except bounds.OutOfBounds as exc:
        raise BadInput(str(exc)) from None
    with db.session_scope(args.db) as session:
        _known_unit(session, args.unit)
        result = run_backtest(session, args.unit, start, end, get_settings().tz, days=args.days,
                              progress=None if args.json else text_progress,
                              transfers=args.transfers)
    default_plot = f"backtest-{args.unit}-{start}-{end}.png"
    plot = save_calibration_plot(result, Path(args.plot or default_plot))
    result["plot"] = str(plot)
    with db.session_scope(args.db) as session:
        store_backtest(session, result)
    if args.json:
        print(json.dumps({k: v for k, v in result.items() if k != "pit"}, allow_nan=False))
    else:
        print(render_backtest_table(result))
        print(f"calibration plot: {plot}")
    return EXIT_OK


def _cell(fmt: str, value: float | None) -> str:
    return "-" if value is None else fmt.format(value)


def render_backtest_table(result: dict[str, Any]) -> str:
    methods = list(result["methods"])
    lines = [f"backtest {result['unit']} {result['from']} .. {result['to']}"]
    for key, label, fmt in (("crps", "CRPS (beds, lower is better)", "{:.3f}"),
                            ("mae_median", "mean absolute error of the median", "{:.3f}"),
                            ("pit_80", "share of PIT in [0.1, 0.9] (target 0.80)", "{:.3f}"),
                            ("pit_95", "share of PIT in [0.025, 0.975] (target 0.95)", "{:.3f}"),
                            ("pit_80_se", "standard error of the [0.1, 0.9] share "
                             "(batch means; - with too few mornings)", "{:.3f}"),
                            ("pit_95_se", "standard error of the [0.025, 0.975] share", "{:.3f}"),
                            ("coverage_80", "literal 80% interval coverage", "{:.3f}"),
                            ("coverage_95", "literal 95% interval coverage", "{:.3f}"),
                            ("log_score", "log score (lower is better)", "{:.3f}")):
        lines.append("")
        lines.append(label)
        lines.append(f"{'days ahead':<18}" + "".join(f"{m:>17}" for m in methods))
        for h in range(result["days"]):
            lines.append(f"{h + 1:<18}" + "".join(
                f"{_cell(fmt, result['methods'][m]['by_horizon'][h].get(key)):>17}"
                for m in methods))
        lines.append(f"{'all':<18}" + "".join(
            f"{_cell(fmt, result['methods'][m]['all'].get(key)):>17}" for m in methods))
    return "\n".join(lines)


def cmd_demo_train(args: argparse.Namespace) -> int:
    """Train each unit that has no model yet (make demo runs this on every start)."""
    from app.forecast.los import format_metrics
    from app.forecast.models import newest_model
    from app.forecast.service import train_model

    now = current_time()
    with db.session_scope(args.db) as session:
        codes = [u.code for u in repo.list_units(session)]
    for code in codes:
        with db.session_scope(args.db) as session:
            if newest_model(session, code, now) is not None:
                print(f"{code}: a trained model is already there")
                continue
            print(f"{code}: training on the demo history (about a minute) ...", flush=True)
            model_id, payload = train_model(session, code, now, get_settings().tz)
        print(format_metrics(payload["metrics"]))
    from app.demo.backtest import DEMO_MORNINGS, store_demo_backtest

    for code in codes:
        print(f"{code}: backtest of the last {DEMO_MORNINGS} mornings for the model page ...",
              flush=True)
        try:
            stored = store_demo_backtest(args.db, code, now, get_settings().tz)
        except Exception as exc:  # the demo still works without it
            print(f"{code}: no backtest stored ({type(exc).__name__}: {exc})")
            continue
        print(f"{code}: {'stored' if stored else 'a backtest is already there'}")
    return EXIT_OK


def cmd_demo_now(args: argparse.Namespace) -> int:
    """The latest census instant of any unit: `make demo` replays the page from there."""
    with db.session_scope(args.db) as session:
        instants = [repo.latest_snapshot_at(session, u.code) for u in repo.list_units(session)]
    known = [i for i in instants if i is not None]
    if not known:
        raise BadInput("no census snapshot is stored yet")
    print(max(known).astimezone(get_settings().tz).isoformat())
    return EXIT_OK


# uvicorn replaces a worker that leaves its health check unanswered this long (its default,
# 5 s, kills workers that are only slow: busy computing forecasts on a loaded machine, the
# answer waits for the interpreter lock, and the requests in flight on them fail).
WORKER_HEALTHCHECK_S = 60
# On SIGTERM uvicorn waits for running requests; by default for ever, so one long planning
# request kept the server up for minutes. After this wait it cancels them and the app's
# lifespan end stops their computation (app/web/limits.py), so the process exits within
# seconds.
GRACEFUL_SHUTDOWN_S = 3


def cmd_serve(args: argparse.Namespace) -> int:
    import uvicorn

    if args.workers < 1:
        raise BadInput(f"--workers must be at least 1, got {args.workers}")
    if args.host not in ("127.0.0.1", "localhost", "::1"):
        print(f"warning: listening on {args.host}; put a TLS proxy in front before others use it",
              file=sys.stderr)
    workers = f" with {args.workers} worker processes" if args.workers > 1 else ""
    print(f"Morrow serving on http://{args.host}:{args.port}/{workers}", flush=True)
    if args.workers == 1:
        from app.web.app import create_app

        uvicorn.run(create_app(args.db), host=args.host, port=args.port, log_level="warning",
                    timeout_graceful_shutdown=GRACEFUL_SHUTDOWN_S)
        return EXIT_OK
    _prepare_workers(args.db)
    uvicorn.run("app.web.app:create_app", factory=True, workers=args.workers, host=args.host,
                port=args.port, log_level="warning",
                timeout_worker_healthcheck=WORKER_HEALTHCHECK_S,
                timeout_graceful_shutdown=GRACEFUL_SHUTDOWN_S)
    return EXIT_OK


def _prepare_workers(url: str) -> None:
    """Set up once, in the parent, what every worker process would otherwise race to do.

    Each worker is a new interpreter that builds the app from its import string and reads
    its settings from the environment, so the database URL travels there. ``main`` has
    already migrated the database; the CSRF signing key is made here, so workers starting
    together only read it. No connection of the parent is left open for them.
    """
    from app.web.security import load_csrf_key

    os.environ["MORROW_DATABASE_URL"] = url
    get_settings.cache_clear()
    load_csrf_key(url)
    db.release_engine(url)


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
    p.add_argument("kind", choices=(*KINDS, "hl7", "fhir"))
    p.add_argument("--mapping", default=None,
                   help="hl7, fhir: the feed mapping file (default: $MORROW_FEED_MAPPING)")
    p.add_argument("file")
    p.set_defaults(func=cmd_import)

    p = sub.add_parser("demo", help="the invented demo hospital")
    demosub = p.add_subparsers(dest="demo_command", required=True, metavar="ACTION")
    d = demosub.add_parser("load", help="import the demo CSVs")
    d.add_argument("--dir", default=str(Path(__file__).resolve().parents[2] / "demo_data"))
    d.add_argument("--no-shift", action="store_true",
                   help="keep the generated dates instead of moving them to this week")
    d.set_defaults(func=cmd_demo_load)
    users.register_demo(demosub)
    demosub.add_parser("train", help="train every unit on what is known now"
                       ).set_defaults(func=cmd_demo_train)
    demosub.add_parser("now", help="print the latest census instant (the demo's morning)"
                       ).set_defaults(func=cmd_demo_now)

    p = sub.add_parser("train", help="fit the unit's length-of-stay and arrivals models")
    p.add_argument("--unit", required=True, type=unit_code_arg)
    p.add_argument("--until", default=None,
                   help="use only what was known at this instant (default: now)")
    p.set_defaults(func=cmd_train)

    p = sub.add_parser("forecast", help="occupancy at the next census instants")
    p.add_argument("--unit", required=True, type=unit_code_arg)
    p.add_argument("--as-of", action="append", default=[], dest="as_of",
                   help="forecast from this instant (repeatable: JSON Lines; default: now)")
    p.add_argument("--days", type=int, default=7, help=f"census instants ahead, "
                   f"{bounds.MIN_FORECAST_DAYS} to {bounds.MAX_FORECAST_DAYS} (default 7)")
    p.add_argument("--json", action="store_true", help="the contract's JSON (format 1)")
    p.set_defaults(func=cmd_forecast)

    p = sub.add_parser("backtest", help="score past forecasts against the census that followed")
    p.add_argument("--unit", required=True, type=unit_code_arg)
    p.add_argument("--from", dest="start", required=True)
    p.add_argument("--to", dest="end", required=True)
    p.add_argument("--days", type=int, default=7, help=f"census instants ahead, "
                   f"{bounds.MIN_FORECAST_DAYS} to {bounds.MAX_FORECAST_DAYS} (default 7)")
    p.add_argument("--plot", default=None, help="where to save the calibration plot (PNG)")
    p.add_argument("--json", action="store_true")
    p.add_argument("--transfers", choices=("pass-on", "stream"), default="pass-on",
                   help="patients other units pass on: through their own forecasts "
                        "(pass-on, default) or as a stream of this unit's (stream)")
    p.set_defaults(func=cmd_backtest)

    p = sub.add_parser("serve", help="serve the web page and API")
    p.add_argument("--host", default="127.0.0.1")
    p.add_argument("--port", type=int, default=8000)
    p.add_argument("--workers", type=int, default=1,
                   help="server processes (several need a database that every process "
                        "reaches, such as PostgreSQL; default 1)")
    p.set_defaults(func=cmd_serve)
    users.register(sub)
    plan.register(sub)
    units.register(sub)
    fhir_replay.register(fhir_replay.feeds_subparsers(sub))
    feeds.register(sub, fhir_replay.feeds_subparsers(sub))
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
    except WorkCancelled as exc:  # past MORROW_COMMAND_SECONDS: the message says what to try
        print(f"error: {exc.message}", file=sys.stderr)
        return EXIT_ERROR
    except Exception as exc:  # the last line of defence: a message, not a trace
        print(f"error: {type(exc).__name__}: {exc}", file=sys.stderr)
        return EXIT_ERROR


if __name__ == "__main__":
    sys.exit(main())
