"""Typed SQLAlchemy 2 models. Every timestamp is stored as naive UTC and read back aware."""

from __future__ import annotations

from datetime import UTC, date, datetime
from typing import Any

from sqlalchemy import (
    JSON,
    Date,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    Text,
    TypeDecorator,
    UniqueConstraint,
)
from sqlalchemy import false as sa_false
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column


class UTCDateTime(TypeDecorator[datetime]):
    """Aware datetimes in, aware UTC datetimes out; naive UTC in the column on every database."""

    impl = DateTime
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Any) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime given to a UTC column; attach a time zone first")
        return value.astimezone(UTC).replace(tzinfo=None)

    def process_result_value(self, value: datetime | None, dialect: Any) -> datetime | None:
        if value is None:
            return None
        return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)


NAMING_CONVENTION = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING_CONVENTION)
    type_annotation_map = {datetime: UTCDateTime, dict[str, Any]: JSON}


def utcnow() -> datetime:
    return datetime.now(UTC)


class ImportBatch(Base):
    """One imported file (or one form submission): what came in and what it changed."""

    __tablename__ = "import_batch"

    id: Mapped[int] = mapped_column(primary_key=True)
    kind: Mapped[str] = mapped_column(String(20))
    filename: Mapped[str] = mapped_column(String(255))
    sha256: Mapped[str] = mapped_column(String(64), index=True)
    rows: Mapped[int] = mapped_column(Integer)
    inserted: Mapped[int] = mapped_column(Integer, default=0)
    updated: Mapped[int] = mapped_column(Integer, default=0)
    unchanged: Mapped[int] = mapped_column(Integer, default=0)
    actor: Mapped[str] = mapped_column(String(100))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)


class Unit(Base):
    __tablename__ = "unit"

    code: Mapped[str] = mapped_column(String(64), primary_key=True)
    census_time: Mapped[str] = mapped_column(String(5), default="00:00")
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    # The chance over staffed beds shown as a warning / an alarm; None: the site's defaults.
    warning_level: Mapped[float | None] = mapped_column(Float)
    alarm_level: Mapped[float | None] = mapped_column(Float)


class UnitBeds(Base):
    """Staffed beds of a unit from ``valid_from`` on (``None``: always). Plans are known early."""

    __tablename__ = "unit_beds"
    __table_args__ = (UniqueConstraint("unit", "valid_from"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    unit: Mapped[str] = mapped_column(ForeignKey("unit.code"), index=True)
    valid_from: Mapped[date | None] = mapped_column(Date)
    beds: Mapped[int] = mapped_column(Integer)
    batch_id: Mapped[int | None] = mapped_column(ForeignKey("import_batch.id"))


class Stay(Base):
    """One patient's continuous time in one unit."""

    __tablename__ = "stay"
    __table_args__ = (Index("ix_stay_unit_admitted", "unit", "admitted_at"),)

    stay_id: Mapped[str] = mapped_column(String(64), primary_key=True)
    unit: Mapped[str] = mapped_column(ForeignKey("unit.code"))
    admitted_at: Mapped[datetime]
    discharged_at: Mapped[datetime | None]
    # "stays" when an exact time came from a stays file, "census" when inferred from snapshots.
    discharge_source: Mapped[str | None] = mapped_column(String(10))
    admission_type: Mapped[str] = mapped_column(String(10))
    outcome: Mapped[str | None] = mapped_column(String(10))
    age: Mapped[int | None] = mapped_column(Integer)
    sex: Mapped[str | None] = mapped_column(String(1))
    specialty: Mapped[str | None] = mapped_column(String(100))
    source: Mapped[str | None] = mapped_column(String(100))
    booking_id: Mapped[str | None] = mapped_column(String(64))
    # Pseudonymous person id (never a hospital number) and the units it came from / went to.
    patient: Mapped[str | None] = mapped_column(String(64), index=True)
    from_unit: Mapped[str | None] = mapped_column(String(64))
    to_unit: Mapped[str | None] = mapped_column(String(64))
    batch_id: Mapped[int | None] = mapped_column(ForeignKey("import_batch.id"))


class CensusSnapshot(Base):
    """The set of census rows of one unit at one instant."""

    __tablename__ = "census_snapshot"
    __table_args__ = (UniqueConstraint("unit", "taken_at"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    unit: Mapped[str] = mapped_column(ForeignKey("unit.code"))
    taken_at: Mapped[datetime]
    batch_id: Mapped[int | None] = mapped_column(ForeignKey("import_batch.id"))


class CensusRow(Base):
    """One occupied bed in a snapshot, kept as received."""

    __tablename__ = "census_row"
    __table_args__ = (UniqueConstraint("snapshot_id", "stay_id"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    snapshot_id: Mapped[int] = mapped_column(ForeignKey("census_snapshot.id"), index=True)
    stay_id: Mapped[str] = mapped_column(ForeignKey("stay.stay_id"), index=True)
    bed: Mapped[str | None] = mapped_column(String(64))
    admitted_at: Mapped[datetime]
    admission_type: Mapped[str] = mapped_column(String(10))
    age: Mapped[int | None] = mapped_column(Integer)
    sex: Mapped[str | None] = mapped_column(String(1))
    specialty: Mapped[str | None] = mapped_column(String(100))
    source: Mapped[str | None] = mapped_column(String(100))
    booking_id: Mapped[str | None] = mapped_column(String(64))


class Observation(Base):
    """A timed score or flag. Append-only: a correction is a new row, recorded later or, at
    the same ``recorded_at`` (a clock read to the second, or a fixed replay clock), with the
    next ``revision``. The latest value is the one with the latest (recorded_at, revision)."""

    __tablename__ = "observation"
    __table_args__ = (
        # The revision is part of the key so that two writers entering the same value at
        # once still collide here (one is stored), while a correction gets the next number.
        UniqueConstraint("stay_id", "observed_at", "name", "recorded_at", "revision"),
        Index("ix_observation_stay_name", "stay_id", "name"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    stay_id: Mapped[str] = mapped_column(ForeignKey("stay.stay_id"))
    observed_at: Mapped[datetime]
    name: Mapped[str] = mapped_column(String(64))
    value: Mapped[float] = mapped_column(Float)
    recorded_at: Mapped[datetime]
    revision: Mapped[int] = mapped_column(Integer, default=0, server_default="0")
    # True on an entry that withdraws the value (kept for the record) instead of giving one.
    withdrawn: Mapped[bool] = mapped_column(default=False, server_default=sa_false())
    batch_id: Mapped[int | None] = mapped_column(ForeignKey("import_batch.id"))


class Booking(Base):
    """A planned elective admission."""

    __tablename__ = "booking"
    __table_args__ = (Index("ix_booking_unit_planned", "unit", "planned_date"),)

    booking_id: Mapped[str] = mapped_column(String(64), primary_key=True)
    unit: Mapped[str] = mapped_column(ForeignKey("unit.code"))
    booked_at: Mapped[datetime]
    planned_date: Mapped[date] = mapped_column(Date)
    age: Mapped[int | None] = mapped_column(Integer)
    sex: Mapped[str | None] = mapped_column(String(1))
    specialty: Mapped[str | None] = mapped_column(String(100))
    source: Mapped[str | None] = mapped_column(String(100))
    procedure: Mapped[str | None] = mapped_column(String(100))
    cancelled_at: Mapped[datetime | None]
    batch_id: Mapped[int | None] = mapped_column(ForeignKey("import_batch.id"))


class AuditEvent(Base):
    """Who changed which record, when, from which batch or form, values before and after."""

    __tablename__ = "audit_event"
    __table_args__ = (Index("ix_audit_entity", "entity", "entity_id"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    at: Mapped[datetime] = mapped_column(default=utcnow, index=True)
    actor: Mapped[str] = mapped_column(String(100))
    action: Mapped[str] = mapped_column(String(20))
    entity: Mapped[str] = mapped_column(String(30))
    entity_id: Mapped[str] = mapped_column(String(200))
    before: Mapped[dict[str, Any] | None]
    after: Mapped[dict[str, Any] | None]
    batch_id: Mapped[int | None] = mapped_column(ForeignKey("import_batch.id"))


class TrainedModel(Base):
    """A fitted length-of-stay and arrivals model, stored as JSON (never pickle)."""

    __tablename__ = "trained_model"
    __table_args__ = (Index("ix_trained_model_unit_until", "unit", "trained_until"),)

    id: Mapped[str] = mapped_column(String(36), primary_key=True)
    unit: Mapped[str] = mapped_column(ForeignKey("unit.code"))
    trained_until: Mapped[datetime]
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    kind: Mapped[str] = mapped_column(String(40))
    payload: Mapped[str] = mapped_column(Text)


class StoredForecast(Base):
    """A forecast as it was shown, kept to compare with the census that followed."""

    __tablename__ = "stored_forecast"
    __table_args__ = (Index("ix_stored_forecast_unit_as_of", "unit", "as_of"),
                      # One page forecast per clock hour, unit and model, however many
                      # server workers compute one (NULL for other origins: not limited).
                      Index("uq_stored_forecast_hour", "unit", "model_id", "origin", "hour",
                            unique=True))

    id: Mapped[int] = mapped_column(primary_key=True)
    unit: Mapped[str] = mapped_column(ForeignKey("unit.code"))
    as_of: Mapped[datetime]
    model_id: Mapped[str] = mapped_column(ForeignKey("trained_model.id"))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    origin: Mapped[str] = mapped_column(String(20))
    hour: Mapped[datetime | None]
    payload: Mapped[str] = mapped_column(Text)


# -- people: accounts, sessions, API tokens, sign-in limits (app/store/users.py) ---------------

class UserAccount(Base):
    """A person who signs in. ``role`` is one of app.store.users.ROLES."""

    __tablename__ = "user_account"

    id: Mapped[int] = mapped_column(primary_key=True)
    username: Mapped[str] = mapped_column(String(64), unique=True)
    role: Mapped[str] = mapped_column(String(20))
    # "scrypt$<log2 n>$<r>$<p>$<salt b64>$<key b64>": the cost travels with the hash.
    password_hash: Mapped[str] = mapped_column(String(255))
    active: Mapped[bool] = mapped_column(default=True)
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    password_changed_at: Mapped[datetime] = mapped_column(default=utcnow)


class WebSession(Base):
    """A signed-in browser. Only a hash of the cookie's secret is stored."""

    __tablename__ = "web_session"

    id: Mapped[int] = mapped_column(primary_key=True)
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("user_account.id", ondelete="CASCADE"),
                                         index=True)
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    expires_at: Mapped[datetime]
    last_seen_at: Mapped[datetime] = mapped_column(default=utcnow)


class ApiToken(Base):
    """A bearer token a bed manager issued to an API client; it acts with its user's role."""

    __tablename__ = "api_token"

    id: Mapped[int] = mapped_column(primary_key=True)
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    # The first characters of the token, shown so a person can tell tokens apart.
    prefix: Mapped[str] = mapped_column(String(16))
    label: Mapped[str] = mapped_column(String(100))
    user_id: Mapped[int] = mapped_column(ForeignKey("user_account.id", ondelete="CASCADE"),
                                         index=True)
    created_by: Mapped[str] = mapped_column(String(100))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    last_used_at: Mapped[datetime | None]
    revoked_at: Mapped[datetime | None]


class SigninFailure(Base):
    """Failed sign-ins for one typed name in the current window (known names or not)."""

    __tablename__ = "signin_failure"

    username: Mapped[str] = mapped_column(String(64), primary_key=True)
    failures: Mapped[int] = mapped_column(Integer, default=0)
    first_failed_at: Mapped[datetime]
    locked_until: Mapped[datetime | None]


class SigningKey(Base):
    """Server secrets (the CSRF key), made once per database so every worker shares them."""

    __tablename__ = "signing_key"

    purpose: Mapped[str] = mapped_column(String(20), primary_key=True)
    secret: Mapped[str] = mapped_column(String(128))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)


class BacktestRun(Base):
    """A backtest's summary (scores by method and horizon, PIT values), for the model page."""

    __tablename__ = "backtest_run"
    __table_args__ = (Index("ix_backtest_run_unit_created", "unit", "created_at"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    unit: Mapped[str] = mapped_column(ForeignKey("unit.code"))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    date_from: Mapped[date] = mapped_column(Date)
    date_to: Mapped[date] = mapped_column(Date)
    days: Mapped[int] = mapped_column(Integer)
    result: Mapped[str] = mapped_column(Text)


class TrainingRun(Base):
    """A training run asked for from the model page, done by a separate process.

    ``active_unit`` holds the unit while the run is queued or running and is cleared when it
    ends: being unique, it lets one run at a time per unit in, on every database.
    """

    __tablename__ = "training_run"
    __table_args__ = (Index("ix_training_run_unit_requested", "unit", "requested_at"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    unit: Mapped[str] = mapped_column(ForeignKey("unit.code"))
    active_unit: Mapped[str | None] = mapped_column(String(64), unique=True)
    requested_by: Mapped[str] = mapped_column(String(100))
    requested_at: Mapped[datetime] = mapped_column(default=utcnow)
    # Train on what was known at this instant.
    until: Mapped[datetime]
    # "queued", "running", "done" or "failed".
    status: Mapped[str] = mapped_column(String(10), default="queued")
    stage: Mapped[str] = mapped_column(String(100), default="")
    started_at: Mapped[datetime | None]
    # The worker process writes this every few seconds; a run whose beat stops has died.
    heartbeat_at: Mapped[datetime | None]
    finished_at: Mapped[datetime | None]
    model_id: Mapped[str | None] = mapped_column(String(36))
    message: Mapped[str | None] = mapped_column(String(500))


# -- feeds: HL7 v2 and FHIR messages received (app/feeds) ---------------------------------------

class FeedMessage(Base):
    """One message received from a feed: enough to recognise a repeat and to count, no text.

    A repeated (source, control_id) changes nothing. Nothing here identifies a person: the
    message's text is not kept (only its SHA-256), ``unmapped`` lists codes (points of care,
    observation codes) the mapping did not name, for ``morrow feeds check``.
    """

    __tablename__ = "feed_message"
    __table_args__ = (UniqueConstraint("source", "control_id"),
                      Index("ix_feed_message_received", "received_at"))

    id: Mapped[int] = mapped_column(primary_key=True)
    kind: Mapped[str] = mapped_column(String(10))
    source: Mapped[str] = mapped_column(String(100))
    control_id: Mapped[str] = mapped_column(String(200))
    message_type: Mapped[str] = mapped_column(String(20))
    digest: Mapped[str] = mapped_column(String(64))
    sent_at: Mapped[datetime | None]
    received_at: Mapped[datetime]
    # "applied", "ignored", "dead_letter" or "refused" (a refused message may come again).
    outcome: Mapped[str] = mapped_column(String(12))
    reason: Mapped[str | None] = mapped_column(String(500))
    repeats: Mapped[int] = mapped_column(Integer, default=0, server_default="0")
    unmapped: Mapped[dict[str, Any] | None]
    batch_id: Mapped[int | None] = mapped_column(ForeignKey("import_batch.id"))


class FeedStay(Base):
    """Which feed visit a stay belongs to, and the known-at time of its last change."""

    __tablename__ = "feed_stay"

    stay_id: Mapped[str] = mapped_column(ForeignKey("stay.stay_id"), primary_key=True)
    visit: Mapped[str] = mapped_column(String(64), index=True)
    known_at: Mapped[datetime]
    message_id: Mapped[int | None] = mapped_column(ForeignKey("feed_message.id"))


class FeedDeadLetter(Base):
    """A message that could not be applied yet (unmapped code, or its visit not known yet).

    Kept for replay (``morrow feeds replay``) until it applies or ``expires_at`` passes.
    ``events`` holds what the message says as neutral events (app.feeds.events) and
    ``text`` the message itself with names, addresses and dates of birth blanked and
    identifiers replaced by their keyed hash; both are cleared once it has been applied.
    """

    __tablename__ = "feed_dead_letter"

    id: Mapped[int] = mapped_column(primary_key=True)
    message_id: Mapped[int] = mapped_column(ForeignKey("feed_message.id"), unique=True)
    visit: Mapped[str | None] = mapped_column(String(64), index=True)
    reason: Mapped[str] = mapped_column(String(500))
    events: Mapped[dict[str, Any] | None]
    text: Mapped[str | None] = mapped_column(Text)
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    expires_at: Mapped[datetime]
    attempts: Mapped[int] = mapped_column(Integer, default=0, server_default="0")
    resolved_at: Mapped[datetime | None]
