"""Schemathesis drives every operation of the HTTP API's OpenAPI schema: no answer is a 5xx.

Valid and invalid requests (schemathesis' positive and negative modes), derandomized and
bounded, sent with a bed manager's bearer token (the valid ones also with no credentials).
Operations other modules add to the API are covered as they appear in the schema.
(schemathesis' own pytest fixture loader does not run under pytest 9, so the strategies
are driven with hypothesis directly.)
"""

from __future__ import annotations

import schemathesis
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis.errors import Unsatisfiable
from schemathesis import GenerationMode

from app.web.app import create_app
from tests.security.conftest import PASSWORD, ROLE_USERS
from tests.security.fixtures import issue_token, make_user

EXAMPLES_PER_OPERATION_AND_MODE = 8
BOUNDED = settings(max_examples=EXAMPLES_PER_OPERATION_AND_MODE, derandomize=True,
                   database=None, deadline=None, phases=[Phase.explicit, Phase.generate],
                   suppress_health_check=list(HealthCheck))


def test_no_operation_answers_with_a_server_error(db_url: str) -> None:
    for role, name in ROLE_USERS.items():
        make_user(db_url, name, role, PASSWORD)
    # The schema is served to signed-in users only.
    reader = {"Authorization": f"Bearer {issue_token(db_url, 'bm.test', 'schema reader')}"}
    schema = schemathesis.openapi.from_asgi("/openapi.json", create_app(db_url), headers=reader)
    operations = [result.ok() for result in schema.get_all_operations()]
    labels = {op.label for op in operations}
    assert {"GET /api/whoami", "POST /api/tokens", "DELETE /api/tokens/{token_id}"} <= labels
    failures: list[str] = []
    calls = 0
    served: dict[str, int] = {}  # signed-in answers below 400, by operation

    def drive(operation: schemathesis.APIOperation, mode: GenerationMode) -> None:
        # A fresh token each time: a generated DELETE /api/tokens/{id} may revoke the last.
        bearer = {"Authorization": f"Bearer {issue_token(db_url, 'bm.test', 'schemathesis')}"}

        @BOUNDED
        @given(case=operation.as_strategy(generation_mode=mode))
        def one(case: schemathesis.Case) -> None:
            nonlocal calls
            # Invalid requests are sent signed in, where they reach the validators; the
            # anonymous pass needs only the valid ones.
            for headers in (bearer, None) if mode is GenerationMode.POSITIVE else (bearer,):
                answer = case.call(headers=headers)
                calls += 1
                if headers is not None and answer.status_code < 400:
                    served[operation.label] = served.get(operation.label, 0) + 1
                if answer.status_code >= 500:
                    failures.append(f"{operation.label} [{mode}] "
                                    f"{'token' if headers else 'anonymous'}: "
                                    f"{answer.status_code} for {case.as_curl_command()}")
                elif headers is None and case.path.startswith("/api/"):
                    # Without credentials the API answers 401, or refuses the request's
                    # shape first; it never serves or stores anything.
                    assert answer.status_code in (400, 401, 404, 405, 413, 422), (
                        operation.label, answer.status_code)

        try:
            one()
        except Unsatisfiable:
            # An operation without parameters or body has no invalid request to make.
            assert mode is GenerationMode.NEGATIVE, operation.label

    for operation in operations:
        for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE):
            drive(operation, mode)
    assert not failures, "\n".join(failures[:20])
    assert calls >= len(operations)  # every operation was driven
    # The token worked: signed-in calls were served, not only refused.
    assert served.get("GET /api/whoami", 0) > 0 and served.get("GET /api/tokens", 0) > 0
