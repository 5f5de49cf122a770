"""Training asked for from the model page, done by a process of its own.

Fitting a unit's models takes a minute or more of CPU; a web worker doing it would hold
its requests up. So the web process only records the request (a ``TrainingRun`` row,
``request_training``) and starts ``python -m app.forecast.training_jobs RUN_ID``
(``start_process``), then answers at once. The training process writes its stage and a
heartbeat to the row, so whichever web worker serves the page can show how far it is. A
run whose heartbeat stops for ``STALE_AFTER`` (its process died) is ended as failed and
lets a new run in. One run at a time per unit: the row's unique ``active_unit`` sees to it.
"""

from __future__ import annotations

import os
import subprocess
import sys
import threading
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta

from sqlalchemy import select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from app.config import PROJECT_ROOT, get_settings
from app.store import db
from app.store.audit import record_audit
from app.store.models import TrainingRun
from app.store.retry import run_transaction

HEARTBEAT_EVERY = timedelta(seconds=5)
STALE_AFTER = timedelta(minutes=2)
# "cancelling": the page asked a running fit to stop; its process ends at its next beat.
ACTIVE = ("queued", "running", "cancelling")
STAGE_QUEUED = "waiting for its process to start"
STAGE_FITTING = "reading the history and fitting the models"


class TrainingBusy(Exception):
    """A run for this unit is already queued or running."""


def _now() -> datetime:
    return datetime.now(UTC)


def _last_sign_of_life(run: TrainingRun) -> datetime:
    return run.heartbeat_at or run.started_at or run.requested_at


def is_stale(run: TrainingRun, now: datetime) -> bool:
    """Queued or running, but no sign of life for ``STALE_AFTER``: its process has died."""
    return run.status in ACTIVE and now - _last_sign_of_life(run) > STALE_AFTER


def end_stale_runs(session: Session, unit: str, now: datetime) -> int:
    """Mark the unit's dead runs failed and free the unit for a new run; how many there were."""
    stale = [r for r in session.scalars(select(TrainingRun).where(
        TrainingRun.unit == unit, TrainingRun.status.in_(ACTIVE))) if is_stale(r, now)]
    for run in stale:
        run.status, run.active_unit, run.finished_at = "failed", None, now
        run.message = "the training process stopped without finishing"
    session.flush()
    return len(stale)


def request_training(url: str, unit: str, actor: str, until: datetime, *,
                     form: str | None = None, now: datetime | None = None) -> int:
    """Record a run of ``unit`` on what was known at ``until``, audited (``form`` names the
    route that asked); its id. ``TrainingBusy`` when one is already queued or running, also
    when another web worker records one at the same moment."""
    moment = now or _now()

    def work(session: Session) -> int:
        end_stale_runs(session, unit, moment)
        run = TrainingRun(unit=unit, active_unit=unit, requested_by=actor[:100],
                          requested_at=moment, until=until, status="queued", stage=STAGE_QUEUED)
        session.add(run)
        session.flush()
        record_audit(session, actor, "insert", "training_run", str(run.id), None,
                     {"unit": unit, "until": until}, form=form)
        return run.id

    try:
        return run_transaction(url, work)
    except IntegrityError:
        raise TrainingBusy(f"a training run for {unit} is already queued or running") from None


def start_process(url: str, run_id: int) -> subprocess.Popen[bytes]:
    """Start the process that does run ``run_id``, and return at once.

    The database URL goes through the environment, not the command line, where other
    users of the machine could read a password in the process list. The child is in a
    session of its own, so stopping the web server does not cut a fit short; a thread
    waits for it so that it does not linger as a zombie.
    """
    child = subprocess.Popen(
        [sys.executable, "-m", "app.forecast.training_jobs", str(run_id)], cwd=PROJECT_ROOT,
        env={**os.environ, "MORROW_DATABASE_URL": url}, stdin=subprocess.DEVNULL,
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    threading.Thread(target=child.wait, name=f"training-run-{run_id}", daemon=True).start()
    return child


def recent_runs(session: Session, unit: str, limit: int = 10) -> list[TrainingRun]:
    return list(session.scalars(select(TrainingRun).where(TrainingRun.unit == unit)
                                .order_by(TrainingRun.id.desc()).limit(limit)))


def last_duration(session: Session, unit: str) -> timedelta | None:
    """How long the unit's latest successful run took: what the progress bar expects."""
    row = session.execute(select(TrainingRun.started_at, TrainingRun.finished_at).where(
        TrainingRun.unit == unit, TrainingRun.status == "done",
        TrainingRun.started_at.is_not(None), TrainingRun.finished_at.is_not(None))
        .order_by(TrainingRun.id.desc()).limit(1)).first()
    if row is None or row[0] is None or row[1] is None:
        return None
    return row[1] - row[0]


@dataclass(frozen=True)
class RunView:
    """A run as the page shows it."""

    id: int
    status: str  # queued, running, done, failed, or "stopped" (a dead process)
    stage: str
    requested_by: str
    requested_at: datetime
    until: datetime
    started_at: datetime | None
    finished_at: datetime | None
    model_id: str | None
    message: str | None
    elapsed_s: float
    expected_s: float | None
    # Elapsed over the last run's duration, kept under 1 until the run says it is done.
    fraction: float | None

    @property
    def active(self) -> bool:
        return self.status in ACTIVE


def describe(run: TrainingRun, now: datetime, expected: timedelta | None) -> RunView:
    status = "stopped" if is_stale(run, now) else run.status
    end = run.finished_at or now
    elapsed = (end - (run.started_at or run.requested_at)).total_seconds()
    expected_s = None if expected is None else expected.total_seconds()
    fraction: float | None
    if status == "done":
        fraction = 1.0
    elif status == "running" and expected_s:
        fraction = min(elapsed / expected_s, 0.95)
    else:
        fraction = None
    return RunView(run.id, status, run.stage, run.requested_by, run.requested_at, run.until,
                   run.started_at, run.finished_at, run.model_id, run.message,
                   max(elapsed, 0.0), expected_s, fraction)


# -- the training process ------------------------------------------------------------------------

def _update(url: str, run_id: int, **values: object) -> None:
    run_transaction(url, lambda session: session.execute(
        update(TrainingRun).where(TrainingRun.id == run_id).values(**values)))


def cancel_training(url: str, run_id: int, actor: str, *, form: str | None = None) -> bool:
    """Ask a queued or running run to stop, audited; whether it was active. A queued run
    ends here; a running one is ended by its own process at its next heartbeat."""
    def work(session: Session) -> bool:
        run = session.get(TrainingRun, run_id, with_for_update=True)
        if run is None or run.status not in ACTIVE:
            return False
        if run.status == "queued":
            run.status, run.active_unit, run.finished_at = "cancelled", None, _now()
        else:
            run.status = "cancelling"
        run.message = f"cancelled by {actor[:80]}"
        record_audit(session, actor, "update", "training_run", str(run_id), None,
                     {"status": run.status}, form=form)
        return True

    return run_transaction(url, work)


def _beat(url: str, run_id: int) -> str:
    """Write the heartbeat; the run's status (the page may have asked it to stop)."""
    def work(session: Session) -> str:
        run = session.get(TrainingRun, run_id, with_for_update=True)
        if run is None:
            return "failed"
        if run.status == "cancelling":
            run.status, run.active_unit, run.finished_at = "cancelled", None, _now()
            run.stage = ""
        else:
            run.heartbeat_at = _now()
        return run.status

    return run_transaction(url, work)


def _heartbeat(url: str, run_id: int, stop: threading.Event) -> None:
    while not stop.wait(HEARTBEAT_EVERY.total_seconds()):
        try:
            status = _beat(url, run_id)
        except Exception:  # a missed beat is harmless; the next one may get through
            continue
        if status == "cancelled":
            # The fit cannot be interrupted from another thread: the process ends here,
            # and its unfinished transaction (nothing is stored before the end) with it.
            os._exit(3)


def _claim(url: str, run_id: int) -> TrainingRun | None:
    """Move the run from queued to running; None if it is not queued (taken or ended)."""
    def work(session: Session) -> TrainingRun | None:
        now = _now()
        claimed = session.execute(
            update(TrainingRun).where(TrainingRun.id == run_id, TrainingRun.status == "queued")
            .values(status="running", stage=STAGE_FITTING, started_at=now, heartbeat_at=now))
        if claimed.rowcount != 1:  # type: ignore[attr-defined]
            return None
        return session.get(TrainingRun, run_id)

    return run_transaction(url, work)


def run_training(url: str, run_id: int) -> int:
    """Do run ``run_id`` (in this process) and record how it ended; the exit status."""
    from app.forecast.service import train_model

    run = _claim(url, run_id)
    if run is None:
        print(f"training run {run_id} is not waiting to start", file=sys.stderr)
        return 1
    stop = threading.Event()
    beat = threading.Thread(target=_heartbeat, args=(url, run_id, stop), daemon=True)
    beat.start()
    try:
        with db.session_scope(url) as session:
            model_id, _ = train_model(session, run.unit, run.until, get_settings().tz)
    except Exception as exc:
        stop.set()
        beat.join()
        from app.forecast.training_data import TooLittleHistory

        why = str(exc) if isinstance(exc, TooLittleHistory) else f"{type(exc).__name__}: {exc}"
        _update(url, run_id, status="failed", active_unit=None, finished_at=_now(),
                stage="", message=why[:500])
        return 1
    stop.set()
    beat.join()
    _update(url, run_id, status="done", active_unit=None, finished_at=_now(), stage="",
            model_id=model_id)
    return 0


def main(argv: Sequence[str]) -> int:
    if len(argv) != 1 or not argv[0].isdigit():
        print("usage: python -m app.forecast.training_jobs RUN_ID "
              "(the database comes from MORROW_DATABASE_URL)", file=sys.stderr)
        return 2
    return run_training(get_settings().database_url, int(argv[0]))


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
