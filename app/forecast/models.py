"""Store and find trained models (JSON payloads in the ``trained_model`` table)."""

from __future__ import annotations

import json
import uuid
from datetime import datetime
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.bounded_cache import BoundedCache
from app.store.models import TrainedModel
from app.timeutil import as_utc

MODEL_KIND = "forecast-model"


def save_model(session: Session, unit: str, trained_until: datetime,
               payload: dict[str, Any]) -> str:
    """Add a trained model (never commits: the caller's session scope does); returns its id."""
    if trained_until.tzinfo is None:
        raise ValueError("trained_until: must be an aware datetime")
    model_id = str(uuid.uuid4())
    session.add(TrainedModel(id=model_id, unit=unit, trained_until=as_utc(trained_until),
                             kind=MODEL_KIND, payload=json.dumps(payload, allow_nan=False)))
    session.flush()
    return model_id


def newest_model(session: Session, unit: str, not_after: datetime
                 ) -> tuple[str, datetime, dict[str, Any]] | None:
    """The newest model of ``unit`` whose ``trained_until`` is not after ``not_after``:
    (id, trained_until, payload), or None. Ties go to the one stored last."""
    if not_after.tzinfo is None:
        raise ValueError("not_after: must be an aware datetime")
    row = session.execute(
        select(TrainedModel.id, TrainedModel.trained_until)
        .where(TrainedModel.unit == unit, TrainedModel.kind == MODEL_KIND,
               TrainedModel.trained_until <= as_utc(not_after))
        .order_by(TrainedModel.trained_until.desc(), TrainedModel.created_at.desc())
        .limit(1)).first()
    if row is None:
        return None
    model_id = str(row[0])
    # A stored model never changes, so its parsed payload is kept: every page view asks.
    payload = _payloads.get(model_id)
    if payload is None:
        text = session.scalar(select(TrainedModel.payload).where(TrainedModel.id == model_id))
        if text is None:  # removed between the two reads
            return None
        payload = json.loads(text)
        _payloads.put(model_id, payload)
    return model_id, as_utc(row[1]), payload


# Parsed payloads of the models asked for lately (a server runs for months while units are
# retrained daily: kept without a bound they would fill its memory).
PAYLOADS_KEPT = 64
_payloads: BoundedCache[dict[str, Any]] = BoundedCache(PAYLOADS_KEPT)
