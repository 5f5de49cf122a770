"""Backtests asked for from the model page, done by a process of their own (as training is,
app/forecast/training_jobs.py).

A backtest replays weeks of mornings and takes seconds to minutes of CPU, so the web process
only records the request and starts ``python -m app.forecast.backtest_jobs RUN_ID``. The run
is a ``BacktestRun`` row whose ``result`` JSON carries its state until it ends: ``{"state":
"queued" | "running" | "cancelling" | "failed" | "cancelled", "done", "total", "stage",
"requested_by", "requested_at", "heartbeat_at", "message"}``; a finished run holds the
backtest's summary (``run_backtest``'s dict) with ``"state": "done"``. Rows stored by
``morrow backtest`` carry no state and are finished ones. The process writes its progress
after every replayed morning and stops at the next one once the page asks it to cancel. A
run whose heartbeat stops for ``STALE_AFTER`` (its process died) is shown as stopped and
lets a new run in. One run at a time per unit.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.config import PROJECT_ROOT, get_settings
from app.store import db
from app.store.audit import record_audit
from app.store.models import BacktestRun
from app.store.retry import run_transaction

STALE_AFTER = timedelta(minutes=2)
HEARTBEAT_EVERY = timedelta(seconds=5)
ACTIVE = ("queued", "running", "cancelling")
# The page's choices: how many past mornings to replay, ending the day before today.
SPAN_CHOICES = (14, 28, 56)
DEFAULT_SPAN = 28
RECENT = 10
_writing = threading.Lock()


def backtest_span(now: datetime, tz: ZoneInfo, mornings: int, days: int = 7
                  ) -> tuple[date, date]:
    """The last ``mornings`` mornings whose ``days`` census nights have all passed by
    ``now``: (first, last) local dates."""
    end = now.astimezone(tz).date() - timedelta(days=days + 1)
    return end - timedelta(days=mornings - 1), end


class BacktestBusy(Exception):
    """A backtest of this unit is already queued or running."""


class BacktestCancelled(Exception):
    """The page asked the running backtest to stop."""


def _now() -> datetime:
    return datetime.now(UTC)


def state_of(row: BacktestRun) -> dict[str, Any]:
    try:
        result = json.loads(row.result)
    except ValueError:
        return {"state": "failed", "message": "unreadable record"}
    if not isinstance(result, dict):
        return {"state": "failed", "message": "unreadable record"}
    if "state" not in result:
        result["state"] = "done" if "methods" in result else "failed"
    return result


def _stale(info: dict[str, Any], created_at: datetime, now: datetime) -> bool:
    if info["state"] not in ACTIVE:
        return False
    beat = info.get("heartbeat_at") or info.get("requested_at")
    last = datetime.fromisoformat(beat) if beat else created_at.replace(tzinfo=UTC)
    return now - last > STALE_AFTER


def recent_runs(session: Session, unit: str, limit: int = RECENT) -> list[BacktestRun]:
    return list(session.scalars(select(BacktestRun).where(BacktestRun.unit == unit)
                                .order_by(BacktestRun.id.desc()).limit(limit)))


def latest_finished(session: Session, unit: str) -> tuple[int, dict[str, Any]] | None:
    """The newest finished backtest of ``unit``: (id, summary), or None."""
    for row in recent_runs(session, unit, RECENT):
        info = state_of(row)
        if info["state"] == "done":
            return row.id, info
    return None


def request_backtest(url: str, unit: str, actor: str, start: date, end: date, days: int, *,
                     form: str | None = None, now: datetime | None = None) -> int:
    """Record a backtest of ``unit`` over ``start``..``end``, audited; its id.
    ``BacktestBusy`` when one is already queued or running (a dead one is ended first)."""
    moment = now or _now()

    def work(session: Session) -> int:
        for row in recent_runs(session, unit):
            info = state_of(row)
            if _stale(info, row.created_at, moment):
                info.update(state="failed", message="the backtest process stopped without "
                            "finishing")
                row.result = json.dumps(info)
            elif info["state"] in ACTIVE:
                raise BacktestBusy(f"a backtest of {unit} is already queued or running")
        info = {"state": "queued", "done": 0, "total": (end - start).days + 1,
                "stage": "waiting for its process to start", "requested_by": actor[:100],
                "requested_at": moment.isoformat(), "heartbeat_at": moment.isoformat()}
        row = BacktestRun(unit=unit, created_at=moment, date_from=start, date_to=end,
                          days=days, result=json.dumps(info))
        session.add(row)
        session.flush()
        record_audit(session, actor, "insert", "backtest_run", str(row.id), None,
                     {"unit": unit, "from": start, "to": end, "days": days}, form=form)
        return row.id

    return run_transaction(url, work)


def cancel_backtest(url: str, run_id: int, actor: str, *, form: str | None = None) -> bool:
    """Ask a queued or running backtest to stop; whether it was active."""
    def work(session: Session) -> bool:
        row = session.get(BacktestRun, run_id, with_for_update=True)
        if row is None:
            return False
        info = state_of(row)
        if info["state"] not in ACTIVE:
            return False
        # A queued run has no process working on it yet: it ends here.
        info["state"] = "cancelled" if info["state"] == "queued" else "cancelling"
        info["message"] = f"cancelled by {actor[:100]}"
        row.result = json.dumps(info)
        record_audit(session, actor, "update", "backtest_run", str(run_id), None,
                     {"state": info["state"]}, form=form)
        return True

    return run_transaction(url, work)


def start_process(url: str, run_id: int) -> subprocess.Popen[bytes]:
    """Start the process that does run ``run_id`` and return at once (the URL goes through
    the environment, never the command line; see training_jobs.start_process)."""
    child = subprocess.Popen(
        [sys.executable, "-m", "app.forecast.backtest_jobs", str(run_id)], cwd=PROJECT_ROOT,
        env={**os.environ, "MORROW_DATABASE_URL": url}, stdin=subprocess.DEVNULL,
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    threading.Thread(target=child.wait, name=f"backtest-run-{run_id}", daemon=True).start()
    return child


@dataclass(frozen=True)
class BacktestView:
    """A run as the page shows it."""

    id: int
    state: str  # queued, running, cancelling, done, failed, cancelled, or stopped (died)
    date_from: date
    date_to: date
    days: int
    requested_by: str
    requested_at: datetime
    done: int
    total: int
    stage: str
    message: str | None

    @property
    def active(self) -> bool:
        return self.state in ACTIVE

    @property
    def fraction(self) -> float | None:
        if self.state == "done":
            return 1.0
        return None if not self.total else min(self.done / self.total, 1.0)


def describe(row: BacktestRun, now: datetime) -> BacktestView:
    info = state_of(row)
    state = "stopped" if _stale(info, row.created_at, now) else info["state"]
    requested = info.get("requested_at")
    total = int(info.get("total") or (row.date_to - row.date_from).days + 1)
    return BacktestView(row.id, state, row.date_from, row.date_to, row.days,
                        str(info.get("requested_by", "the command line")),
                        datetime.fromisoformat(requested) if requested
                        else row.created_at.replace(tzinfo=UTC),
                        total if state == "done" else int(info.get("done", 0)), total,
                        str(info.get("stage", "")), info.get("message"))


def views(session: Session, unit: str) -> list[BacktestView]:
    now = _now()
    return [describe(row, now) for row in recent_runs(session, unit)]


# -- the backtest process ------------------------------------------------------------------------

def _write(url: str, run_id: int, change: dict[str, Any], *, check_cancel: bool) -> None:
    """Merge ``change`` into the run's state; ``BacktestCancelled`` if the page asked it to
    stop (then the run is marked cancelled)."""
    cancelled = False

    def work(session: Session) -> None:
        nonlocal cancelled
        # Locked (PostgreSQL; SQLite has one writer anyway), so a cancel from the page
        # between this read and the write is never overwritten.
        row = session.get(BacktestRun, run_id, with_for_update=True)
        if row is None:
            return
        info = state_of(row)
        if check_cancel and info["state"] in ("cancelling", "cancelled"):
            cancelled = True
            info.update(state="cancelled", heartbeat_at=_now().isoformat())
        else:
            info.update(change, heartbeat_at=_now().isoformat())
        row.result = json.dumps(info, allow_nan=False)

    with _writing:  # the heartbeat thread and the progress callback take turns
        run_transaction(url, work)
    if cancelled:
        raise BacktestCancelled


def _heartbeat(url: str, run_id: int, stop: threading.Event) -> None:
    while not stop.wait(HEARTBEAT_EVERY.total_seconds()):
        try:
            _write(url, run_id, {}, check_cancel=False)
        except Exception:  # a missed beat is harmless; the next one may get through
            continue


def run_job(url: str, run_id: int) -> int:
    """Do backtest ``run_id`` in this process and record how it ended; the exit status."""
    from app.forecast.backtest import run_backtest

    with db.session_scope(url) as session:
        row = session.get(BacktestRun, run_id)
        if row is None or state_of(row)["state"] != "queued":
            print(f"backtest run {run_id} is not waiting to start", file=sys.stderr)
            return 1
        unit, start, end, days = row.unit, row.date_from, row.date_to, row.days
        requested = {k: v for k, v in state_of(row).items()
                     if k in ("requested_by", "requested_at")}
    _write(url, run_id, {"state": "running", "stage": "reading the history",
                         "started_at": _now().isoformat()}, check_cancel=True)

    def progress(done: int, total: int, what: str) -> None:
        stage = (what if what.startswith("training")
                 else f"replayed the morning of {what}")
        _write(url, run_id, {"done": done, "total": total, "stage": stage}, check_cancel=True)

    stop = threading.Event()
    beat = threading.Thread(target=_heartbeat, args=(url, run_id, stop), daemon=True)
    beat.start()
    try:
        with db.session_scope(url) as session:
            result = run_backtest(session, unit, start, end, get_settings().tz, days=days,
                                  progress=progress)
    except BacktestCancelled:
        return 3
    except Exception as exc:
        _write(url, run_id, {"state": "failed", "message": f"{type(exc).__name__}: {exc}"[:500]},
               check_cancel=False)
        return 1
    finally:
        stop.set()
        beat.join()
    result.update(requested, state="done", finished_at=_now().isoformat())
    try:
        _write(url, run_id, result, check_cancel=True)
    except BacktestCancelled:
        return 3
    return 0


def main(argv: Sequence[str]) -> int:
    if len(argv) != 1 or not argv[0].isdigit():
        print("usage: python -m app.forecast.backtest_jobs RUN_ID "
              "(the database comes from MORROW_DATABASE_URL)", file=sys.stderr)
        return 2
    return run_job(get_settings().database_url, int(argv[0]))


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
