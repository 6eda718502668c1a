"""POST /fhir/{type}/$validate: the analyst's check of one R4 resource."""

from __future__ import annotations

from typing import Annotated

import orjson
from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import Response

from capnote.api.auth import CHECK, allow
from capnote.api.docs import responses
from capnote.api.media import FHIR_JSON, fhir_response, json_body
from capnote.errors import NotFoundError
from capnote.fhir import core_table
from capnote.fhir.outcome import outcome
from capnote.fhir.validate import validate_resource
from capnote.fhir.validate_input import mode_findings, read_input
from capnote.findings import Finding, Severity, refusal
from capnote.notes import Principal

router = APIRouter(prefix="/fhir", tags=["fhir"])


Mode = Annotated[str | None, Query(max_length=40)]
Profile = Annotated[str | None, Query(max_length=1024)]
Checker = Annotated[Principal, Depends(allow(*CHECK))]


@router.post("/$validate", responses=responses(200, 413, 415, 422, media=FHIR_JSON))
async def validate_any(
    request: Request, _who: Checker, mode: Mode = None, profile: Profile = None
) -> Response:
    """Validate one R4 JSON resource of any type (system-level $validate); as
    POST /fhir/{type}/$validate, with the type taken from the resource."""
    return await _validate(request, None, mode, profile)


@router.post("/{kind}/$validate", responses=responses(200, 404, 413, 415, 422, media=FHIR_JSON))
async def validate(
    request: Request, kind: str, _who: Checker, mode: Mode = None, profile: Profile = None
) -> Response:
    """Validate one R4 JSON resource (or a Bundle), sent as the body or as the `resource`
    parameter of a Parameters body, with optional `mode` and `profile`: an
    OperationOutcome with FHIRPath expressions for every issue. The answer is 200 whether
    or not the resource is valid."""
    if not core_table.is_resource_type(kind):
        raise NotFoundError(f"{kind[:64]!r} is not a FHIR R4 resource type, so it has no $validate")
    return await _validate(request, kind, mode, profile)


async def _validate(
    request: Request, kind: str | None, mode: str | None, profile: str | None
) -> Response:
    raw = await json_body(request)
    try:
        body = orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        raise refusal(
            "json-invalid",
            "",
            f"the body is not well-formed JSON ({exc.msg} at character {exc.pos})",
            "a FHIR resource in JSON (FHIR R4 json.html; RFC 8259)",
            issue_type="structure",
        ) from exc
    wanted = read_input(kind, body, mode, profile)
    findings = validate_resource(wanted.resource, wanted.profile)
    resource = wanted.resource
    named = resource.get("resourceType") if isinstance(resource, dict) else None
    if kind is None:
        kind = named[:64] if isinstance(named, str) else "Resource"
    elif named not in (kind, None):
        findings.insert(
            0,
            Finding(
                severity=Severity.ERROR,
                code="fhir-type-mismatch",
                location="resourceType",
                message=f"resourceType {str(resource.get('resourceType'))[:64]!r} does not "
                f"match the URL's {kind}",
                rule="POST [base]/[type]/$validate takes a resource of that type",
                issue_type="invalid",
            ),
        )
    findings += mode_findings(wanted.mode, kind)
    return fhir_response(outcome(findings))
