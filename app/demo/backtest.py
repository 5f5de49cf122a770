"""The demo ships with a stored backtest per unit, so the model page has a track record on
first start: the last two weeks of mornings whose week has passed (a few seconds a unit)."""

from __future__ import annotations

import json
from datetime import datetime
from zoneinfo import ZoneInfo

from app.forecast.backtest import run_backtest
from app.forecast.backtest_jobs import backtest_span, latest_finished
from app.store import db
from app.store.models import BacktestRun

DEMO_MORNINGS = 14


def store_demo_backtest(url: str, unit: str, now: datetime, tz: ZoneInfo,
                        mornings: int = DEMO_MORNINGS) -> int | None:
    """Run and store a short backtest of ``unit`` unless a finished one is stored; its id,
    or None when one was there already."""
    with db.session_scope(url) as session:
        if latest_finished(session, unit) is not None:
            return None
    start, end = backtest_span(now, tz, mornings)
    with db.session_scope(url) as session:
        result = run_backtest(session, unit, start, end, tz, days=7)
    result.update(state="done", requested_by="the demo set-up",
                  requested_at=now.isoformat())
    with db.session_scope(url) as session:
        row = BacktestRun(unit=unit, date_from=start, date_to=end, days=7,
                          result=json.dumps(result, allow_nan=False))
        session.add(row)
        session.flush()
        return row.id
