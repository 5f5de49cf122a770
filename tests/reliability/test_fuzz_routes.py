"""Fuzz: no input reaches a 500 or runs past a per-request limit, and no import stores a date
outside the bounds (app/bounds.py).

Two parts, both bounded and derandomized. Schemathesis sends valid and invalid requests to
every operation of the OpenAPI schema (pages included) with a bed manager's token, with the
``unit`` of the path set to a small invented unit that has a trained model, so the requests
reach the forecast, planning and booking code rather than a 404. Hypothesis then fills every
form (score entry, booking, booking check, planning, audit filters, upload of each import
kind) and the API's ``as_of`` with values from the whole calendar (years 1 to 9999, offsets
up to 14 hours), numbers in odd spellings and free text. Valid-shaped bodies then reach the
handlers of the four operations random data never gets past validation (a FHIR Bundle built
from the standard's example, alert levels, a score, a token request), and the routes outside
the schema (sign-in and out, the people page and its forms with the CSRF token, Plotly's
JavaScript, the schema, static files) are fuzzed too. Afterwards every date the database
holds lies within the import bounds.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from datetime import UTC, date, datetime, timedelta, timezone
from pathlib import Path
from typing import Any
from urllib.parse import quote

import pytest
import schemathesis
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st
from hypothesis.errors import Unsatisfiable
from schemathesis import GenerationMode
from sqlalchemy import Date, func, inspect, select

from app import bounds
from app.ingest import KINDS
from app.store import db
from app.store import users as accounts
from app.store.models import (
    Booking,
    CensusRow,
    CensusSnapshot,
    Observation,
    Stay,
    UnitBeds,
    UTCDateTime,
)
from app.timeutil import as_utc
from app.web.security import ROLES
from tests.feeds import fhir_examples
from tests.reliability.conftest import PASSWORD, SecuredApp
from tests.reliability.live import feed_setup
from tests.reliability.small_unit import NOW, UNIT, load_unit
from tests.security.fixtures import csrf, form_csrf, issue_token, make_user, signed_in_client

pytestmark = pytest.mark.both_databases

# No single request may take longer, on this 2-core machine shared with other work; the
# slowest legitimate ones (a planning run of 2 years x 20 replications on the small unit)
# take about 1.5 s.
PER_REQUEST_SECONDS = 10.0
SCHEMA_EXAMPLES = 5
FORM_EXAMPLES = 20


def bounded(examples: int) -> settings:
    return settings(max_examples=examples, derandomize=True, database=None, deadline=None,
                    phases=[Phase.explicit, Phase.generate],
                    suppress_health_check=list(HealthCheck))


class Recorder:
    """Times every answer; stops at the first 5xx or answer slower than the limit (code that
    hangs on some input would otherwise keep the rest of the run waiting)."""

    def __init__(self) -> None:
        self.failures: list[str] = []
        self.calls = 0
        self.slowest = 0.0
        self.served: dict[str, int] = {}  # answers below 400, by form or operation

    def timed(self, form: str, detail: str, send: Callable[[], Any]) -> Any:
        started = time.monotonic()
        answer = send()
        seconds = time.monotonic() - started
        self.calls += 1
        self.slowest = max(self.slowest, seconds)
        self.served[form] = self.served.get(form, 0) + (answer.status_code < 400)
        if answer.status_code >= 500:
            self.failures.append(f"{form} {detail}: {answer.status_code} {answer.text[:200]}")
        if seconds > PER_REQUEST_SECONDS:
            self.failures.append(f"{form} {detail}: {seconds:.1f} s")
        if self.failures:
            pytest.fail("\n".join(self.failures))
        return answer


@pytest.fixture
def fuzzed(secured: SecuredApp) -> SecuredApp:
    load_unit(secured.db_url)
    return secured


# -- values from the whole calendar and odd spellings ------------------------------------------

ZONES = st.sampled_from([None, UTC, timezone(timedelta(hours=14)),
                         timezone(timedelta(hours=-12))])
EDGE_DAYS = ["0001-01-01", "1677-09-21", "1677-09-22", "1899-12-31", "1900-01-01",
             "2262-04-03", "2262-04-11", "2262-04-12", "9999-12-31", "2026-02-30", "", "x"]


def any_day() -> st.SearchStrategy[str]:
    recent = st.dates(min_value=date(2025, 1, 1), max_value=date(2027, 12, 31))
    return st.one_of(st.dates().map(date.isoformat), recent.map(date.isoformat),
                     st.sampled_from(EDGE_DAYS), st.text(max_size=12))


def any_instant() -> st.SearchStrategy[str]:
    recent = st.datetimes(min_value=datetime(2025, 1, 1), max_value=datetime(2027, 1, 1))
    return st.one_of(
        st.datetimes(timezones=ZONES).map(lambda d: d.isoformat()),
        recent.map(lambda d: d.isoformat(timespec="minutes")),
        st.sampled_from([f"{d}T00:00" for d in EDGE_DAYS] + ["9999-12-31T23:59:59+14:00",
                                                              "0001-01-01T00:00-12:00"]),
        st.text(max_size=20))


def any_number() -> st.SearchStrategy[str]:
    return st.one_of(st.integers(-10**20, 10**20).map(str), st.floats().map(repr),
                     st.sampled_from(["1_2", "\u0665\u0660", "1e400", "-0", " 7 ", "", "inf"]),
                     st.text(max_size=8))


def _csv(header: list[str], row: list[str]) -> bytes:
    import csv
    import io

    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(header)
    writer.writerow(row)
    return out.getvalue().encode("utf-8")


def import_file_strategy(stay_ids: list[str]) -> st.SearchStrategy[tuple[str, bytes]]:
    """(kind, CSV) for every import kind, its time, date and number cells fuzzed."""
    ids = st.sampled_from(stay_ids)
    types = st.sampled_from(["emergency", "elective", "sideways"])
    cases = {
        "units": st.tuples(st.sampled_from([UNIT, "TB-FUZZ"]), any_number(), any_day(),
                           st.sampled_from(["08:00", "24:00", "7:5", ""])).map(
            lambda r: _csv(["unit", "beds", "valid_from", "census_time"], list(r))),
        "stays": st.tuples(ids, st.just(UNIT), any_instant(), any_instant() | st.just(""),
                           types, any_number()).map(
            lambda r: _csv(["stay_id", "unit", "admitted_at", "discharged_at",
                            "admission_type", "age"], list(r))),
        "census": st.tuples(any_instant(), st.just(UNIT), ids, any_instant(), types).map(
            lambda r: _csv(["taken_at", "unit", "stay_id", "admitted_at", "admission_type"],
                           list(r))),
        "observations": st.tuples(ids, any_instant(), st.sampled_from(["sofa", "news2", "x"]),
                                  any_number(), any_instant() | st.just("")).map(
            lambda r: _csv(["stay_id", "observed_at", "name", "value", "recorded_at"],
                           list(r))),
        "bookings": st.tuples(st.sampled_from(["TB-FB1", "TB-FB2"]), st.just(UNIT),
                              any_instant(), any_day(), any_instant() | st.just("")).map(
            lambda r: _csv(["booking_id", "unit", "booked_at", "planned_date", "cancelled_at"],
                           list(r))),
    }
    assert set(cases) == set(KINDS)
    return st.one_of([st.tuples(st.just(kind), files) for kind, files in cases.items()])


def often(*values: str) -> st.SearchStrategy[str]:
    """Mostly one of ``values`` (so requests get past the first check), else any number."""
    return st.one_of(st.sampled_from(values), st.sampled_from(values), any_number())


# -- the test -----------------------------------------------------------------------------------

def test_no_input_reaches_a_500_or_runs_past_the_limit(
        fuzzed: SecuredApp, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    record = Recorder()
    feed_setup(tmp_path, monkeypatch, UNIT)  # the FHIR example's ward is this unit
    token = issue_token(fuzzed.db_url, "bm.test", "fuzz")
    client = TestClient(fuzzed.app, raise_server_exceptions=False,
                        headers={"Authorization": f"Bearer {token}"})
    operations = _schema_operations(fuzzed, client, record)
    _forms(fuzzed, client, record)
    # Bodies random data almost never makes valid (a FHIR Bundle, alert levels with warning
    # below alarm, a score for a patient in the unit, a token for an existing account):
    # valid-shaped ones, fuzzed within their shape, so the handlers themselves are reached.
    _api_bodies(fuzzed, client, record)
    # Routes outside the schema: sign-in and out, the people page and its forms (signed in,
    # with the CSRF token), Plotly's JavaScript, the schema itself, static files. Last: they
    # revoke tokens and disable accounts.
    _outside_the_schema(fuzzed, record)
    assert not record.failures, "\n".join(record.failures[:20])
    # The requests got past the first check: every form and every operation served some.
    starved = [form for form in (*FORMS, *OUTSIDE_THE_SCHEMA) if not record.served.get(form)]
    assert not starved, record.served
    unserved = [op for op in operations if not record.served.get(op)]
    assert not unserved, unserved
    _stored_dates_within_bounds(fuzzed.db_url)


def _schema_operations(fuzzed: SecuredApp, client: TestClient, record: Recorder) -> list[str]:
    # The schema is served to signed-in users only (code before that serves it to anyone).
    schema = schemathesis.openapi.from_asgi("/openapi.json", fuzzed.app,
                                            headers=dict(client.headers))
    operations = [result.ok() for result in schema.get_all_operations()]
    assert len(operations) >= 15

    def drive(operation: schemathesis.APIOperation, mode: GenerationMode) -> None:
        # A fresh token each time: a generated DELETE /api/tokens/{id} may revoke the last.
        bearer = {"Authorization": f"Bearer {issue_token(fuzzed.db_url, 'bm.test', 'fuzz')}"}

        @bounded(SCHEMA_EXAMPLES)
        @given(case=operation.as_strategy(generation_mode=mode))
        def one(case: schemathesis.Case) -> None:
            # Starting training spawns a worker process per call: its path stays generated.
            if (isinstance(case.path_parameters, dict) and "unit" in case.path_parameters
                    and operation.label != "POST /units/{unit}/training"):
                case.path_parameters["unit"] = UNIT
            record.timed(operation.label, f"[{mode}] {case.as_curl_command()}",
                         lambda: case.call(headers=bearer))

        try:
            one()
        except Unsatisfiable:
            assert mode is GenerationMode.NEGATIVE, operation.label

    for operation in operations:
        for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE):
            drive(operation, mode)
    return [op.label for op in operations]


FORMS = ("score entry", "booking", "booking check", "planning", "audit", "audit export",
         "upload", "api forecast")


def _forms(fuzzed: SecuredApp, client: TestClient, record: Recorder) -> None:
    with db.session_scope(fuzzed.db_url) as session:
        open_stays = list(session.scalars(select(Stay.stay_id).where(
            Stay.discharged_at.is_(None)).order_by(Stay.stay_id).limit(3)))
    assert open_stays
    today = datetime.now(UTC).date()
    texts = st.text(max_size=30)

    @bounded(FORM_EXAMPLES)
    @given(stay=st.sampled_from([*open_stays, "nobody"]) | texts,
           name=st.sampled_from(["sofa", "news2", "apache_ii", "fit_for_discharge"]) | texts,
           value=any_number())
    def score_entry(stay: str, name: str, value: str) -> None:
        record.timed("score entry", f"{stay!r} {name!r} {value!r}", lambda: client.post(
            f"/units/{UNIT}/scores", data={"stay_id": stay, "name": name, "value": value},
            follow_redirects=False))

    near = st.dates(min_value=today - timedelta(days=5), max_value=today + timedelta(days=70))

    @bounded(FORM_EXAMPLES)
    @given(planned=near.map(date.isoformat) | any_day(), age=often("", "70"),
           specialty=texts, procedure=texts)
    def booking(planned: str, age: str, specialty: str, procedure: str) -> None:
        form = {"planned_date": planned, "age": age, "specialty": specialty,
                "procedure": procedure}
        record.timed("booking", repr(form), lambda: client.post(
            f"/units/{UNIT}/booking", data=form, follow_redirects=False))
        record.timed("booking check", repr(form), lambda: client.get(
            f"/units/{UNIT}/booking", params=form))

    factor = st.one_of(any_number(), st.integers(-150, 250).map(str))
    kinds = st.sampled_from(["arrivals", "stay", "share", "electives", "none", "other"])

    @bounded(FORM_EXAMPLES)
    @given(target=often("5", "0.1", "50"), years=often("1", "2"),
           replications=often("10", "20"), compare_at=often("", "8", "1000"),
           s1=kinds, s1_type=st.sampled_from(["emergency", "elective", "all", "x"]),
           s1_arrivals=factor, s2=kinds, s2_group=st.sampled_from(["longest", "G1", "G9"]),
           s2_stay=factor, s3=kinds, s3_share=factor, s3_day_from=st.sampled_from(["Mon", "x"]),
           s3_day_to=st.sampled_from(["Fri", "Mon"]), s3_day_share=factor)
    def planning(**query: str) -> None:
        record.timed("planning", repr(query), lambda: client.get(
            f"/units/{UNIT}/planning", params=query))

    @bounded(FORM_EXAMPLES)
    @given(since=near.map(date.isoformat) | any_day(), until=near.map(date.isoformat) | any_day(),
           who=texts, batch=often(""), page=often("1", "2"))
    def audit(since: str, until: str, who: str, batch: str, page: str) -> None:
        # A blank field is left out, as the page's own links do.
        query = {name: value for name, value in (("since", since), ("until", until),
                 ("who", who), ("batch", batch), ("page", page)) if value}
        record.timed("audit", repr(query), lambda: client.get("/audit", params=query))
        record.timed("audit export", repr(query), lambda: client.get("/audit.csv",
                                                                     params=query))

    @bounded(2 * FORM_EXAMPLES)
    @given(upload=import_file_strategy([*open_stays, "TB-F0001"]), wrong_kind=st.booleans())
    def upload(upload: tuple[str, bytes], wrong_kind: bool) -> None:
        kind, data = upload
        sent_kind = "patients" if wrong_kind else kind
        record.timed("upload", f"{sent_kind} {data!r}", lambda: client.post(
            "/data/upload", data={"kind": sent_kind},
            files={"file": (f"{kind}.csv", data, "text/csv")}))

    # After the model's training instant (before it there is no model: 409).
    trained_since = st.datetimes(min_value=NOW.replace(tzinfo=None),
                                 max_value=NOW.replace(tzinfo=None) + timedelta(days=40))

    @bounded(FORM_EXAMPLES)
    @given(as_of=trained_since.map(lambda d: d.isoformat(timespec="minutes")) | any_instant(),
           days=st.integers(1, 28) | st.sampled_from([-1, 0, 29, 400]))
    def api_forecast(as_of: str, days: int) -> None:
        record.timed("api forecast", f"as_of={as_of!r} days={days}", lambda: client.get(
            f"/api/units/{UNIT}/forecast", params={"as_of": as_of, "days": days}))

    # Planning last: with no bound on its factors, it is the one input that can hang.
    for run in (api_forecast, audit, score_entry, booking, upload, planning):
        run()


# -- valid-shaped bodies for the operations whose schema random data rarely satisfies --------

BODY_EXAMPLES = 15
VISIT_CHARS = "abcdefghjkmnpqrstuvwxyz0123456789"
OFFSETS = st.sampled_from([UTC, timezone(timedelta(hours=10)), timezone(timedelta(hours=-5)),
                           timezone(timedelta(hours=14))])


def _bundle(start: datetime, minutes: int, seen: int, value: float, visit: str, ward: str,
            status: str, ended: bool, dropped: frozenset[int]) -> bytes:
    """The standard's example Bundle (tests/feeds/fhir_examples.py) with its visit, times,
    ward, status and score value replaced: a new stay for each new ``visit``."""
    bundle = fhir_examples.standard_bundle()
    location, _patient, encounter, observation = (e["resource"] for e in bundle["entry"])
    location["identifier"][0]["value"] = ward
    encounter["id"] = f"v-{visit}"
    encounter["identifier"][0]["value"] = visit
    encounter["status"] = status
    period = {"start": start.isoformat()}
    if ended:
        period["end"] = (start + timedelta(minutes=minutes)).isoformat()
    encounter["period"] = period
    encounter["location"][0]["period"] = dict(period)
    encounter["location"][0]["status"] = "completed" if ended else "active"
    observation["encounter"]["reference"] = f"Encounter/v-{visit}"
    observation["effectiveDateTime"] = (start + timedelta(minutes=seen)).isoformat()
    observation["valueQuantity"]["value"] = value
    bundle["timestamp"] = (start + timedelta(minutes=max(minutes, seen, 0) + 10)).isoformat()
    bundle["entry"] = [e for i, e in enumerate(bundle["entry"]) if i not in dropped]
    return json.dumps(bundle).encode("utf-8")


def fhir_bundles() -> st.SearchStrategy[bytes]:
    today = datetime.now(UTC).replace(tzinfo=None)
    starts = st.one_of(
        st.datetimes(min_value=today - timedelta(days=30), max_value=today, timezones=OFFSETS),
        st.datetimes(min_value=datetime(1990, 1, 1), max_value=datetime(2100, 1, 1),
                     timezones=OFFSETS))
    return st.builds(
        _bundle, start=starts, minutes=st.integers(-120, 30 * 24 * 60),
        seen=st.integers(-120, 30 * 24 * 60),
        value=st.one_of(st.integers(-5, 30), st.floats(allow_nan=False, allow_infinity=False)),
        visit=st.text(VISIT_CHARS, min_size=1, max_size=10),
        ward=st.sampled_from(["ICU-B", "ICU-B", "ICU-B", "WARD-9"]),
        status=st.sampled_from(["finished", "in-progress", "arrived", "planned", "cancelled"]),
        ended=st.booleans(),
        dropped=st.one_of(st.just(frozenset()), st.just(frozenset()),
                          st.frozensets(st.integers(0, 3), max_size=2)))


def _api_bodies(fuzzed: SecuredApp, client: TestClient, record: Recorder) -> None:
    with db.session_scope(fuzzed.db_url) as session:
        open_stays = list(session.scalars(select(Stay.stay_id).where(
            Stay.unit == UNIT, Stay.discharged_at.is_(None)).order_by(Stay.stay_id).limit(5)))
    assert open_stays
    now = datetime.now(UTC).replace(microsecond=0)
    # Printable text with no control characters (the bound of a token's name and label).
    plain = st.text(st.characters(blacklist_categories=("Cc", "Cs")), min_size=1, max_size=100)

    @bounded(BODY_EXAMPLES)
    @given(stay=st.one_of(st.sampled_from(open_stays), st.sampled_from(open_stays),
                          st.text(min_size=1, max_size=64)),
           name=st.one_of(*[st.sampled_from(["sofa", "news2", "apache_ii",
                                             "fit_for_discharge"])] * 2, plain),
           value=st.integers(-3, 30) | st.floats(allow_nan=False, allow_infinity=False),
           observed=st.one_of(st.none(), st.integers(-8 * 24 * 60, 60).map(
               lambda m: (now + timedelta(minutes=m)).isoformat()), any_instant()))
    def observations(stay: str, name: str, value: float, observed: str | None) -> None:
        body = {"stay_id": stay, "name": name, "value": value, "observed_at": observed}
        record.timed("POST /api/units/{unit}/observations", repr(body), lambda: client.post(
            f"/api/units/{UNIT}/observations", json=body))

    within = st.floats(bounds.MIN_ALERT_LEVEL, bounds.MAX_ALERT_LEVEL)
    chance = st.one_of(within, within, st.sampled_from([0.01, 0.99, 0.0, 1.0, 0.5]),
                       st.floats(allow_nan=False, allow_infinity=False))

    @bounded(BODY_EXAMPLES)
    @given(first=chance, second=chance, ordered=st.booleans())
    def levels(first: float, second: float, ordered: bool) -> None:
        warning, alarm = sorted((first, second)) if ordered else (first, second)
        body = {"warning": warning, "alarm": alarm}
        record.timed("PUT /api/units/{unit}/levels", repr(body), lambda: client.put(
            f"/api/units/{UNIT}/levels", json=body))

    @bounded(BODY_EXAMPLES)
    @given(username=st.sampled_from(["view.test", "sched.test", "nic.test", "BM.Test"]) | plain,
           label=plain)
    def tokens(username: str, label: str) -> None:
        body = {"username": username, "label": label}
        record.timed("POST /api/tokens", repr(body), lambda: client.post("/api/tokens",
                                                                         json=body))

    @bounded(BODY_EXAMPLES)
    @given(bundle=fhir_bundles(),
           media=st.sampled_from(["application/fhir+json", "application/json",
                                  "application/fhir+json; charset=utf-8"]))
    def fhir(bundle: bytes, media: str) -> None:
        record.timed("POST /api/feeds/fhir", bundle[:300].decode(), lambda: client.post(
            "/api/feeds/fhir", content=bundle, headers={"Content-Type": media}))

    for run in (observations, levels, tokens, fhir):
        run()


# -- routes outside the schema -----------------------------------------------------------------

OUTSIDE_THE_SCHEMA = ("GET /signin", "POST /signin", "POST /signout", "GET /people",
                      "POST /people/users", "POST /people/users/{username}/role",
                      "POST /people/users/{username}/password",
                      "POST /people/users/{username}/active", "POST /people/tokens",
                      "POST /people/tokens/{token_id}/revoke", "GET /vendor/plotly.min.js",
                      "GET /openapi.json", "GET /static/{path}")
ACCOUNT_EXAMPLES = 8  # a new password is hashed at the service's cost (about 0.5 s)
SIGNIN_USER = "fz.signin"
ACCOUNTS = ("fz.one", "fz.two", "fz.three")
NEXT_TARGETS = ["/", "/units/" + UNIT, "//elsewhere.example", "https://elsewhere.example/",
                "/\\elsewhere.example", "/people?x=1#y", ""]


def _outside_the_schema(fuzzed: SecuredApp, record: Recorder) -> None:
    url, app = fuzzed.db_url, fuzzed.app
    make_user(url, SIGNIN_USER, "viewer", PASSWORD)
    for name in ACCOUNTS:
        make_user(url, name, "nurse_in_charge", PASSWORD)
    with db.session_scope(url) as session:
        token_ids = [accounts.issue_token(session, ACCOUNTS[0], f"fuzz {i}",
                                          actor="test-fixture")[0].id for i in range(3)]
    texts = st.text(max_size=30)
    # Header values travel as Latin-1 text: printable ASCII keeps them sendable.
    header = st.text(st.characters(min_codepoint=32, max_codepoint=126), max_size=60)
    manager = signed_in_client(app, "bm.test", PASSWORD)

    def form(**fields: str) -> dict[str, str]:
        return {"csrf_token": csrf(manager), **fields}

    def account() -> st.SearchStrategy[str]:
        return st.one_of(st.sampled_from(ACCOUNTS), st.sampled_from(ACCOUNTS), texts)

    new_password = st.one_of(st.just("a fresh long fuzz password"),
                             st.just("another long fuzz password"), st.just("short"), texts)
    roles = st.sampled_from([*ROLES, "admin", ""]) | texts

    @bounded(ACCOUNT_EXAMPLES)
    @given(username=st.text("abcdefghjkmnpqrstuvwxyz.-_0123456789", min_size=1, max_size=20)
           | texts, role=roles, password=new_password)
    def add_user(username: str, role: str, password: str) -> None:
        fields = {"username": username, "role": role, "password": password}
        record.timed("POST /people/users", repr(fields), lambda: manager.post(
            "/people/users", data=form(**fields)))
        record.timed("GET /people", "", lambda: manager.get("/people"))

    @bounded(ACCOUNT_EXAMPLES)
    @given(username=account(), role=roles, active=st.sampled_from(["0", "1", "", "yes"])
           | texts)
    def role_and_active(username: str, role: str, active: str) -> None:
        at = f"/people/users/{quote(username, safe='')}"
        record.timed("POST /people/users/{username}/role", f"{username!r} {role!r}",
                     lambda: manager.post(f"{at}/role", data=form(role=role)))
        record.timed("POST /people/users/{username}/active", f"{username!r} {active!r}",
                     lambda: manager.post(f"{at}/active", data=form(active=active)))

    @bounded(ACCOUNT_EXAMPLES)
    @given(username=account(), password=new_password)
    def reset_password(username: str, password: str) -> None:
        record.timed("POST /people/users/{username}/password", f"{username!r} {password!r}",
                     lambda: manager.post(f"/people/users/{quote(username, safe='')}/password",
                                          data=form(password=password)))

    @bounded(ACCOUNT_EXAMPLES)
    @given(username=account(), label=texts,
           token_id=st.sampled_from([str(t) for t in token_ids])
           | st.integers(-5, 10**20).map(str) | texts)
    def tokens(username: str, label: str, token_id: str) -> None:
        record.timed("POST /people/tokens", f"{username!r} {label!r}", lambda: manager.post(
            "/people/tokens", data=form(username=username, label=label)))
        record.timed("POST /people/tokens/{token_id}/revoke", repr(token_id),
                     lambda: manager.post(f"/people/tokens/{quote(token_id, safe='')}/revoke",
                                          data=form()))

    @bounded(2 * ACCOUNT_EXAMPLES)
    @given(username=st.sampled_from([SIGNIN_USER, SIGNIN_USER, " FZ.Signin "]) | texts,
           password=st.sampled_from([PASSWORD, PASSWORD, "a wrong password"]) | texts,
           target=st.sampled_from(NEXT_TARGETS) | texts, token=st.sampled_from(["page", "none"])
           | texts, sign_out=st.booleans())
    def signin_and_out(username: str, password: str, target: str, token: str,
                       sign_out: bool) -> None:
        browser = TestClient(app, raise_server_exceptions=False)
        page = record.timed("GET /signin", repr(target), lambda: browser.get(
            "/signin", params={"next": target}))
        sent = {"page": form_csrf(page.text) if page.status_code == 200 else "",
                "none": ""}.get(token, token)
        fields = {"username": username, "password": password, "next": target,
                  "csrf_token": sent}
        answer = record.timed("POST /signin", repr(fields), lambda: browser.post(
            "/signin", data=fields, follow_redirects=False))
        if answer.status_code == 303:
            # Never sent elsewhere (an open redirect), whatever ``next`` said.
            place = answer.headers["location"]
            assert place.startswith("/") and not place.startswith("//"), place
            assert "\\" not in place, place
        if sign_out:
            session_token = (csrf(browser) if answer.status_code == 303 else "")
            record.timed("POST /signout", "", lambda: browser.post(
                "/signout", data={"csrf_token": session_token}, follow_redirects=False))

    @bounded(ACCOUNT_EXAMPLES)
    @given(coding=st.sampled_from(["br", "gzip", "identity", "*", "", "br;q=0, gzip;q=0",
                                   "gzip;q=abc", "x-gzip, deflate"]) | header,
           tag=st.sampled_from(["", "*", "W/\"x\""]) | header,
           bearer=st.sampled_from(["good", "none", "bad"]),
           asset=st.sampled_from(["morrow.css", "morrow.js", "../app/config.py",
                                  "%2e%2e/pyproject.toml", "nothing.css"]) | texts)
    def assets(coding: str, tag: str, bearer: str, asset: str) -> None:
        headers = {"Accept-Encoding": coding, "If-None-Match": tag}
        record.timed("GET /vendor/plotly.min.js", repr(headers), lambda: manager.get(
            "/vendor/plotly.min.js", headers=headers))
        token = {"good": issue_token(url, "bm.test", "schema reader"), "none": "",
                 "bad": "not-a-token"}[bearer]
        plain = TestClient(app, raise_server_exceptions=False)
        record.timed("GET /openapi.json", bearer, lambda: plain.get(
            "/openapi.json", headers={"Authorization": f"Bearer {token}"} if token else {}))
        record.timed("GET /static/{path}", repr(asset), lambda: plain.get(
            f"/static/{quote(asset, safe='/%')}", headers=headers))

    for run in (assets, add_user, role_and_active, reset_password, tokens, signin_and_out):
        run()


def _stored_dates_within_bounds(url: str) -> None:
    latest_event = bounds.latest_event()
    latest_day = bounds.latest_planned_date()
    with db.session_scope(url) as session:
        for model in (Stay, CensusSnapshot, CensusRow, Observation, Booking, UnitBeds):
            for column in inspect(model).columns:
                if not isinstance(column.type, UTCDateTime | Date):
                    continue
                low, high = session.execute(select(func.min(column), func.max(column))).one()
                if low is None:
                    continue
                if isinstance(column.type, Date):
                    assert bounds.EARLIEST_DATE <= low <= high <= latest_day, column
                else:
                    assert bounds.EARLIEST <= as_utc(low) <= as_utc(high) <= latest_event, column
