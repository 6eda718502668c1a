"""The FHIR R4 read API under /fhir, as application/fhir+json ($validate: fhir_validate)."""

from __future__ import annotations

import re
from datetime import UTC, date, datetime, time, timedelta
from typing import Annotated

from fastapi import APIRouter, Depends, Path, Query, Request
from fastapi.responses import Response

from capnote.api.auth import READ, allow
from capnote.api.capability import capability_statement
from capnote.api.deps import Reads
from capnote.api.docs import responses
from capnote.api.media import FHIR_JSON, fhir_response
from capnote.errors import InputError
from capnote.fhir_reads import SearchPage
from capnote.findings import refusal
from capnote.notes import Principal

router = APIRouter(prefix="/fhir", tags=["fhir"])
_DATE = re.compile(r"^(eq|ne|gt|lt|ge|le)?(\d{4}-\d{2}-\d{2}(T[0-9:.]+(Z|[+-]\d{2}:\d{2}))?)$")
Reader = Annotated[Principal, Depends(allow(*READ))]


def _problem(location: str, message: str, value: str | None = None) -> InputError:
    return refusal("search-invalid", location, message, "FHIR R4 search parameters", value=value)


@router.get("/metadata", responses=responses(200, media=FHIR_JSON))
async def metadata(request: Request) -> Response:
    """The CapabilityStatement: what this server really supports (no token needed)."""
    return fhir_response(capability_statement(str(request.base_url).rstrip("/") + "/fhir"))


def _date_range(
    values: list[str], name: str
) -> tuple[tuple[str, datetime] | None, tuple[str, datetime] | None]:
    """FHIR date prefixes to (after, before): ("ge" | "gt", time) and ("le" | "lt", time)."""
    after: tuple[str, datetime] | None = None
    before: tuple[str, datetime] | None = None
    for raw in values:
        match = _DATE.match(raw)
        if match is None:
            raise _problem(name, f"{name} must be [prefix]YYYY-MM-DD or a date-time", raw[:40])
        prefix, text = match[1] or "eq", match[2]
        try:
            if "T" in text:
                start = datetime.fromisoformat(text.replace("Z", "+00:00"))
                end = start
            else:
                day = date.fromisoformat(text)
                start = datetime.combine(day, time(), UTC)
                end = start + timedelta(days=1) - timedelta(microseconds=1)
        except ValueError as exc:
            raise _problem(name, f"{name} is not a date that exists", raw[:40]) from exc
        if prefix in ("eq", "ge", "gt"):
            after = ("gt", end) if prefix == "gt" else ("ge", start)
        if prefix in ("eq", "le", "lt"):
            before = ("lt", start) if prefix == "lt" else ("le", end)
        if prefix == "ne":
            raise _problem(name, "the ne prefix is not supported", raw[:40])
    return after, before


def _patient(value: str | None) -> tuple[str, str] | None:
    if value is None:
        return None
    system, sep, ident = value.partition("|")
    if not sep or not system or not ident:
        raise _problem("patient:identifier", "patient:identifier must be system|value")
    return system, ident


Page = Annotated[int, Query(alias="_page", ge=1, le=100_000)]
Count = Annotated[int, Query(alias="_count", ge=1, le=200)]
PatientIdentifier = Annotated[str | None, Query(alias="patient:identifier")]


def _base(request: Request) -> str:
    return str(request.base_url).rstrip("/") + "/fhir"


async def _search(
    request: Request,
    reads: Reads,
    kind: str,
    patient: str | None,
    dates: list[str],
    name: str,
    status: str | None,
    page: int,
    count: int,
) -> Response:
    """One searchset for a type: patient, a date parameter with prefixes, status; paged."""
    after, before = _date_range(dates, name)
    wanted = SearchPage(_patient(patient), status, after, before, page, count)

    def page_url(number: int) -> str:
        query = dict(request.query_params) | {"_page": str(number), "_count": str(count)}
        return str(request.url.replace_query_params(**query))

    bundle = await reads.search(kind, wanted, _base(request), str(request.url), page_url)
    return fhir_response(bundle)


@router.get("/Procedure", responses=responses(200, 422, media=FHIR_JSON))
async def search_procedures(
    request: Request,
    reads: Reads,
    _who: Reader,
    patient_identifier: PatientIdentifier = None,
    date_: Annotated[list[str] | None, Query(alias="date")] = None,
    page: Page = 1,
    count: Count = 50,
) -> Response:
    """Procedures by patient identifier and performed date (prefixes ge, le, gt, lt, eq)."""
    return await _search(
        request, reads, "Procedure", patient_identifier, date_ or [], "date", None, page, count
    )


@router.get("/ServiceRequest", responses=responses(200, 422, media=FHIR_JSON))
async def search_service_requests(
    request: Request,
    reads: Reads,
    _who: Reader,
    status: Annotated[str | None, Query(pattern="^[a-z-]+$")] = None,
    occurrence: Annotated[list[str] | None, Query()] = None,
    patient_identifier: PatientIdentifier = None,
    page: Page = 1,
    count: Count = 50,
) -> Response:
    """Follow-up requests by status, target date and patient: what is due."""
    return await _search(
        request,
        reads,
        "ServiceRequest",
        patient_identifier,
        occurrence or [],
        "occurrence",
        status,
        page,
        count,
    )


@router.get("/{kind}/{resource_id}", responses=responses(200, 404, media=FHIR_JSON))
async def read_resource(reads: Reads, kind: str, resource_id: str, _who: Reader) -> Response:
    """The current version of a resource."""
    resource = await reads.read(kind, resource_id)
    return fhir_response(resource, headers={"ETag": f'W/"{resource["meta"]["versionId"]}"'})


@router.get("/{kind}/{resource_id}/_history", responses=responses(200, 404, media=FHIR_JSON))
async def history(
    request: Request, reads: Reads, kind: str, resource_id: str, _who: Reader
) -> Response:
    """Every version of a resource, newest first."""
    return fhir_response(await reads.history(kind, resource_id, _base(request)))


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
    return fhir_response(resource, headers={"ETag": f'W/"{version}"'})
