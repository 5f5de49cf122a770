"""FHIR R4 in over HTTP: ``POST /api/feeds/fhir`` takes one Bundle, all of it or nothing."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Request
from fastapi.responses import JSONResponse

from app.config import get_settings
from app.feeds.fhir import BundleRefused
from app.feeds.fhir_import import import_bundle_once
from app.feeds.mapping import MappingError, load_mapping
from app.feeds.pseudonym import SecretError, site_pseudonymiser
from app.ingest.retried import IMPORT_TIME_LIMIT_S, ImportTimedOut
from app.web.deps import SessionDep
from app.web.security import DataActor

router = APIRouter(prefix="/api/feeds")

MEDIA_TYPES = ("application/fhir+json", "application/json")


async def _raw_body(request: Request) -> bytes:
    """The body as sent (the request guard has already refused one over the upload limit)."""
    return await request.body()


def _outcome(problems: list[tuple[str, str]], code: str = "invalid") -> dict[str, Any]:
    """A FHIR OperationOutcome naming each problem's element in ``expression``."""
    return {"resourceType": "OperationOutcome", "issue": [
        {"severity": "error", "code": code, "diagnostics": why,
         **({"expression": [path]} if path else {})} for path, why in problems]}


@router.post("/fhir")
def post_fhir_bundle(request: Request, session: SessionDep, actor: DataActor,
                     data: Annotated[bytes, Depends(_raw_body)]) -> JSONResponse:
    """Import one FHIR R4 Bundle (Encounter, Observation, Location, Patient): all or nothing.

    A plain ``def`` (run in a worker thread): the Bundle is validated, applied and committed
    in a transaction of its own (``import_bundle_once``) before this answers. A refusal is a
    422 with an OperationOutcome whose issues name the entry and element.
    """
    media = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if media not in MEDIA_TYPES:
        return JSONResponse(_outcome([("", "send the Bundle as application/fhir+json")],
                                     "not-supported"), status_code=415)
    try:
        mapping = load_mapping()
        pseudonymiser = site_pseudonymiser()
    except (MappingError, SecretError) as exc:
        return JSONResponse(_outcome([("", f"the feed is not set up: {exc}")], "exception"),
                            status_code=503)
    try:
        result = import_bundle_once(
            request.app.state.database_url, data, "POST /api/feeds/fhir", mapping=mapping,
            pseudonymiser=pseudonymiser, tz=get_settings().tz, actor=actor.username,
            limit_s=min(IMPORT_TIME_LIMIT_S, get_settings().request_seconds))
    except BundleRefused as refused:
        return JSONResponse(_outcome([(p.path, p.why) for p in refused.problems]),
                            status_code=422)
    except ImportTimedOut as late:
        return JSONResponse(_outcome([("", str(late))], "timeout"), status_code=503)
    return JSONResponse({"imported": True, **result.as_json()})
