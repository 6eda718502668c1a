"""The FHIR R4 read API under /fhir, as application/fhir+json ($validate: fhir_validate)."""

from __future__ import annotations

from typing import Annotated, Any
from urllib.parse import parse_qsl

from fastapi import APIRouter, Depends, Path, Request
from fastapi.responses import Response

from capnote.api.auth import READ, allow
from capnote.api.capability import capability_statement
from capnote.api.deps import Reads
from capnote.api.docs import responses
from capnote.api.formats import json_only
from capnote.api.media import FHIR_JSON, fhir_response, http_date
from capnote.api.prefer import lenient
from capnote.errors import InputError, PayloadError
from capnote.fhir_reads import SearchRequest
from capnote.findings import refusal
from capnote.notes import Principal

router = APIRouter(prefix="/fhir", tags=["fhir"], dependencies=[Depends(json_only)])
Reader = Annotated[Principal, Depends(allow(*READ))]


def _problem(location: str, message: str, value: str | None = None) -> InputError:
    return refusal("search-invalid", location, message, "FHIR R4 search parameters", value=value)


@router.get("/metadata", responses=responses(200, media=FHIR_JSON))
async def metadata(request: Request) -> Response:
    """The CapabilityStatement: what this server really supports (no token needed)."""
    return fhir_response(capability_statement(str(request.base_url).rstrip("/") + "/fhir"))


def _version_headers(resource: dict[str, Any]) -> dict[str, str]:
    """ETag and Last-Modified of a resource version (FHIR R4 http 3.1.0.3: read)."""
    meta = resource["meta"]
    return {"ETag": f'W/"{meta["versionId"]}"', "Last-Modified": http_date(meta["lastUpdated"])}


def _base(request: Request) -> str:
    return str(request.base_url).rstrip("/") + "/fhir"


_FORM = "application/x-www-form-urlencoded"


@router.get("/{kind}", responses=responses(200, 400, 404, media=FHIR_JSON))
async def search(request: Request, reads: Reads, kind: str, _who: Reader) -> Response:
    """Search a type (GET [type]?...): every parameter is applied or refused with 400 (see
    the CapabilityStatement for each type's); Prefer: handling=lenient ignores the others."""
    asked = SearchRequest(
        list(request.query_params.multi_items()), lenient(request), False, _base(request)
    )
    return fhir_response(await reads.search(kind, asked))


@router.post("/{kind}/_search", responses=responses(200, 400, 404, 415, media=FHIR_JSON))
async def search_posted(request: Request, reads: Reads, kind: str, _who: Reader) -> Response:
    """Search a type with the parameters in an application/x-www-form-urlencoded body (and
    any in the URL), which keeps identifiers out of URLs: the links of the answer leave the
    identifying parameters out, so a client posts the same body to the next link."""
    media = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if media != _FORM:
        raise PayloadError(
            f"POST _search takes {_FORM}, not {media or 'no body'}", 415, "not-supported"
        )
    try:
        body = (await request.body()).decode("utf-8")
    except UnicodeDecodeError as exc:
        raise _problem("", "the form body is not UTF-8") from exc
    pairs = list(request.query_params.multi_items()) + parse_qsl(body, keep_blank_values=True)
    asked = SearchRequest(pairs, lenient(request), True, _base(request))
    return fhir_response(await reads.search(kind, asked))


@router.get("/{kind}/{resource_id}", responses=responses(200, 404, media=FHIR_JSON))
async def read_resource(reads: Reads, kind: str, resource_id: str, _who: Reader) -> Response:
    """The current version of a resource."""
    resource = await reads.read(kind, resource_id)
    return fhir_response(resource, headers=_version_headers(resource))


@router.get("/{kind}/{resource_id}/_history", responses=responses(200, 404, media=FHIR_JSON))
async def history(
    request: Request, reads: Reads, kind: str, resource_id: str, _who: Reader
) -> Response:
    """Every version of a resource, newest first."""
    bundle = await reads.history(kind, resource_id, _base(request))
    newest = bundle["entry"][0]["resource"]  # newest first; a history has one at least
    return fhir_response(
        bundle, headers={"Last-Modified": http_date(newest["meta"]["lastUpdated"])}
    )


@router.get(
    "/{kind}/{resource_id}/_history/{version}", responses=responses(200, 404, media=FHIR_JSON)
)
async def version_read(
    reads: Reads,
    kind: str,
    resource_id: str,
    version: Annotated[int, Path(ge=1, le=2**31 - 1)],
    _who: Reader,
) -> Response:
    """One version of a resource (vread)."""
    resource = await reads.vread(kind, resource_id, version)
    return fhir_response(resource, headers=_version_headers(resource))
