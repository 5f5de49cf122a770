"""Numbers only in ASCII digits, unit codes only from their documented characters, and a line
(and column) in every refusal (units and ids invented)."""

from __future__ import annotations

from datetime import UTC
from urllib.parse import quote

import pytest

from app.cli.main import main
from app.ingest import ImportRefused, import_file
from app.ingest.parse import Problem
from app.store import db
from tests.reliability.conftest import PASSWORD, ROLE_USERS, SecuredApp
from tests.security.fixtures import signed_in_client

pytestmark = pytest.mark.both_databases

STAYS = "stay_id,unit,admitted_at,admission_type,age\n"
OBSERVATIONS = "stay_id,observed_at,name,value\n"


def _problems(url: str, kind: str, text: str | bytes) -> list[Problem]:
    data = text.encode() if isinstance(text, str) else text
    with pytest.raises(ImportRefused) as refused, db.session_scope(url) as session:
        import_file(session, kind, data, f"{kind}.csv", tz=UTC)
    return refused.value.problems


def _seed(url: str) -> None:
    with db.session_scope(url) as session:
        import_file(session, "units", b"unit,beds\nU-SP,6\n", "units.csv", tz=UTC)
        import_file(session, "stays", (STAYS + "S-SP-1,U-SP,2026-03-01T08:00,emergency,60\n")
                    .encode(), "stays.csv", tz=UTC)


@pytest.mark.parametrize("written", ["1_2", "\u0661\u0662", "\uff11\uff12"],
                         ids=["underscore", "arabic-indic", "fullwidth"])
@pytest.mark.parametrize("kind, text, column", [
    ("units", "unit,beds\nU-SP2,{}\n", "beds"),
    ("stays", STAYS + "S-SP-2,U-SP,2026-03-01T09:00,emergency,{}\n", "age"),
    ("observations", OBSERVATIONS + "S-SP-1,2026-03-01T10:00,news2,{}\n", "value"),
], ids=["beds", "age", "score"])
def test_numbers_take_ascii_digits_only(db_url: str, kind: str, text: str, column: str,
                                        written: str) -> None:
    """Failure 10: "1_2" and Arabic-Indic digits were read as 12 (beds, age, scores)."""
    _seed(db_url)
    [problem] = _problems(db_url, kind, text.format(written))
    assert (problem.line, problem.column) == (2, column)
    assert "digits 0-9" in problem.why


@pytest.mark.parametrize("content, line, column, why", [
    (b"unit,beds\nU-A,4\nU-B\x00,4\n", 3, "unit", "NUL bytes"),
    (b"unit,beds\nU-A,4\n\"U-B,4\nU-C,4\n", 3, None, "never closed"),
    (b"unit,beds\nU-A,4\nU-B,4\nU-C," + b"7" * 140_000 + b"\n", 4, None, "longer than"),
    (b"unit,beds\nU-A,4\n\"U-B\"x,4\n", 3, None, "followed by text"),
], ids=["nul", "unclosed-quote", "over-long-cell", "text-after-quote"])
def test_every_refusal_names_its_line(db_url: str, content: bytes, line: int,
                                      column: str | None, why: str) -> None:
    """Failure 10: NUL bytes, an over-long cell and an unclosed quote gave no line."""
    [problem] = _problems(db_url, "units", content)
    assert (problem.line, problem.column) == (line, column)
    assert why in problem.why
    assert "Error" not in problem.why


REFUSED_CODES = ["U/1", "U?x=1", "U#2", "U%2F", "U 3", "..", "U\\4", "Stati\u00f6n"]
ACCEPTED_CODES = ["KV-CRIT", "=1+1", "@U-X", "U.a_b+c=d@e", "7"]


def test_every_unit_code_an_import_accepts_has_reachable_pages(secured: SecuredApp) -> None:
    """Failure 10: codes with "/", "?" or "#" were accepted and their pages unreachable."""
    refused = []
    for code in REFUSED_CODES + ACCEPTED_CODES:
        data = f'unit,beds\n"{code}",4\n'.encode()
        try:
            with db.session_scope(secured.db_url) as session:
                import_file(session, "units", data, "units.csv", tz=UTC)
        except ImportRefused as exc:
            [problem] = exc.problems
            assert (problem.line, problem.column) == (2, "unit")
            assert "A-Z and a-z, digits 0-9 and - _ . + = @" in problem.why
            refused.append(code)
    assert refused == REFUSED_CODES
    client = signed_in_client(secured.app, ROLE_USERS["viewer"], PASSWORD)
    for code in ACCEPTED_CODES:
        for page in ("", "/model", "/booking"):
            answer = client.get(f"/units/{quote(code, safe='')}{page}")
            assert answer.status_code == 200, (code, page, answer.status_code)


def test_the_command_line_refuses_a_unit_code_outside_the_set(
        db_url: str, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as ended:
        main(["--db", db_url, "train", "--unit", "U/1"])
    assert ended.value.code == 2
    err = capsys.readouterr().err
    assert "argument --unit: 'U/1': a unit code is 1 to 64 characters" in err


def test_the_api_takes_a_score_as_a_json_number_only(secured: SecuredApp) -> None:
    """Failure 10: the API read the text "1_2" as the score 12."""
    from fastapi.testclient import TestClient
    from sqlalchemy import select

    from app.store.models import Observation
    from tests.security.fixtures import issue_token

    _seed(secured.db_url)
    api = TestClient(secured.app, headers={
        "Authorization": f"Bearer {issue_token(secured.db_url, ROLE_USERS['nurse_in_charge'])}"})
    for value in ("1_2", "\u0661\u0662"):
        answer = api.post("/api/units/U-SP/observations",
                          json={"stay_id": "S-SP-1", "name": "news2", "value": value})
        assert answer.status_code == 422, value
    assert api.post("/api/units/U-SP/observations",
                    json={"stay_id": "S-SP-1", "name": "news2", "value": 12}).status_code == 201
    with db.session_scope(secured.db_url) as session:
        assert session.scalars(select(Observation.value)).all() == [12.0]
