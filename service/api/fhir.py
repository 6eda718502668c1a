"""The FHIR R4 read API and $validate, under /fhir, as application/fhir+json."""

from __future__ import annotations

import re
from datetime import UTC, date, datetime, time, timedelta
from typing import Annotated

import orjson
from fastapi import APIRouter, Depends, Path, Query, Request
from fastapi.responses import Response
from sqlmodel import Session

from service.api.auth import CHECK, READ, allow
from service.api.capability import capability_statement
from service.api.docs import responses
from service.api.media import FHIR_JSON, fhir_response, json_body
from service.errors import InputError, NotFoundError
from service.fhir.outcome import outcome
from service.fhir.readmodel import READABLE, StoredBundle, parse_id
from service.fhir.validate import validate_resource
from service.findings import Finding, Severity
from service.notes import Principal
from service.store import repository as repo
from service.store.codec import unpack_bundle, unpack_roles
from service.store.ledger import Ledger, VersionRow

router = APIRouter(prefix="/fhir", tags=["fhir"])
_DATE = re.compile(r"^(eq|ne|gt|lt|ge|le)?(\d{4}-\d{2}-\d{2}(T[0-9:.]+(Z|[+-]\d{2}:\d{2}))?)$")
Reader = Annotated[Principal, Depends(allow(*READ))]


def _problem(location: str, message: str, value: str | None = None) -> InputError:
    return InputError(
        message,
        [
            Finding(
                Severity.ERROR,
                "search-invalid",
                location,
                message,
                "FHIR R4 search parameters",
                value=value,
                issue_type="invalid",
            )
        ],
    )


def _kind(kind: str) -> str:
    if kind not in READABLE:
        raise NotFoundError("capnote serves no resources of this type")
    return kind


def _id(resource_id: str) -> tuple[str, str]:
    """(note id, role) of a resource id; anything else names nothing (and never reaches SQL)."""
    parsed = parse_id(resource_id)
    if parsed is None:
        raise NotFoundError("no record with this id")
    return parsed


def _stored(key: str, version: int, at: datetime, bundle: bytes, roles: str) -> StoredBundle:
    bundle_data = orjson.loads(unpack_bundle(bundle))
    return StoredBundle(key, version, at, bundle_data, tuple(r for _k, r in unpack_roles(roles)))


def _from_row(row: VersionRow) -> StoredBundle:
    return _stored(row.note_key, row.version, row.recorded_at, row.bundle, row.roles)


def _ledger(request: Request) -> Ledger:
    ledger: Ledger = request.app.state.ledger
    return ledger


@router.get("/metadata", responses=responses(200, media=FHIR_JSON))
def metadata(request: Request) -> Response:
    """The CapabilityStatement: what this server really supports (no token needed)."""
    return fhir_response(capability_statement(str(request.base_url).rstrip("/") + "/fhir"))


def _date_range(
    values: list[str], name: str
) -> tuple[datetime | None, datetime | None, bool, bool]:
    """FHIR date prefixes to (after, before, include_after, include_before)."""
    after: datetime | None = None
    before: datetime | None = None
    inc_after = inc_before = True
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
            after, inc_after = (end, False) if prefix == "gt" else (start, True)
        if prefix in ("eq", "le", "lt"):
            before, inc_before = (start, False) if prefix == "lt" else (end, True)
        if prefix == "ne":
            raise _problem(name, "the ne prefix is not supported", raw[:40])
    return after, before, inc_after, inc_before


def _patient(value: str | None) -> tuple[str, str] | None:
    if value is None:
        return None
    system, sep, ident = value.partition("|")
    if not sep or not system or not ident:
        raise _problem("patient:identifier", "patient:identifier must be system|value")
    return system, ident


def _searchset(
    request: Request, kind: str, total: int, rows: list[repo.Found], page: int, count: int
) -> Response:
    base = str(request.base_url).rstrip("/") + "/fhir"
    resources = []
    for r in rows:
        resource = _stored(r.note_key, r.version, r.recorded_at, r.bundle, r.roles).served(
            r.role, kind
        )
        if resource is not None:  # the index and the Bundle are written together: always
            resources.append(resource)
    self_link = str(request.url)
    links = [{"relation": "self", "url": self_link}]
    if page * count < total:
        query = dict(request.query_params) | {"_page": str(page + 1), "_count": str(count)}
        links.append({"relation": "next", "url": str(request.url.replace_query_params(**query))})
    bundle = {
        "resourceType": "Bundle",
        "type": "searchset",
        "total": total,
        "link": links,
        "entry": [
            {
                "fullUrl": f"{base}/{kind}/{resource['id']}",
                "resource": resource,
                "search": {"mode": "match"},
            }
            for resource in resources
        ],
    }
    return fhir_response(bundle)


Page = Annotated[int, Query(alias="_page", ge=1, le=100_000)]
Count = Annotated[int, Query(alias="_count", ge=1, le=200)]
PatientIdentifier = Annotated[str | None, Query(alias="patient:identifier")]


def _search(
    request: Request,
    kind: str,
    patient: str | None,
    dates: list[str],
    name: str,
    status: str | None,
    page: int,
    count: int,
) -> Response:
    """One searchset for a type: patient, a date parameter with prefixes, status; paged."""
    after, before, inc_a, inc_b = _date_range(dates, name)
    with Session(request.app.state.engine) as session:
        total, rows = repo.fhir_search(
            session,
            kind,
            patient=_patient(patient),
            status=status,
            after=after,
            before=before,
            include_after=inc_a,
            include_before=inc_b,
            offset=(page - 1) * count,
            limit=count,
        )
    return _searchset(request, kind, total, list(rows), page, count)


@router.get("/Procedure", responses=responses(200, 422, media=FHIR_JSON))
def search_procedures(
    request: Request,
    _who: Reader,
    patient_identifier: PatientIdentifier = None,
    date_: Annotated[list[str] | None, Query(alias="date")] = None,
    page: Page = 1,
    count: Count = 50,
) -> Response:
    """Procedures by patient identifier and performed date (prefixes ge, le, gt, lt, eq)."""
    return _search(request, "Procedure", patient_identifier, date_ or [], "date", None, page, count)


@router.get("/ServiceRequest", responses=responses(200, 422, media=FHIR_JSON))
def search_service_requests(
    request: Request,
    _who: Reader,
    status: Annotated[str | None, Query(pattern="^[a-z-]+$")] = None,
    occurrence: Annotated[list[str] | None, Query()] = None,
    patient_identifier: PatientIdentifier = None,
    page: Page = 1,
    count: Count = 50,
) -> Response:
    """Follow-up requests by status, target date and patient: what is due."""
    return _search(
        request,
        "ServiceRequest",
        patient_identifier,
        occurrence or [],
        "occurrence",
        status,
        page,
        count,
    )


@router.get("/{kind}/{resource_id}", responses=responses(200, 404, media=FHIR_JSON))
async def read_resource(request: Request, kind: str, resource_id: str, _who: Reader) -> Response:
    """The current version of a resource."""
    key, role = _id(resource_id)
    row = await _ledger(request).latest(key)
    resource = _from_row(row).served(role, _kind(kind)) if row is not None else None
    if resource is None:
        raise NotFoundError(f"no {kind} with this id")
    return fhir_response(resource, headers={"ETag": f'W/"{resource["meta"]["versionId"]}"'})


@router.get("/{kind}/{resource_id}/_history", responses=responses(200, 404, media=FHIR_JSON))
async def history(request: Request, kind: str, resource_id: str, _who: Reader) -> Response:
    """Every version of a resource, newest first."""
    key, role = _id(resource_id)
    kind = _kind(kind)
    found = []
    for row in reversed(await _ledger(request).versions(key)):
        resource = _from_row(row).served(role, kind)
        if resource is not None:
            found.append((row.version, resource))
    if not found:
        raise NotFoundError(f"no {kind} with this id")
    # The first version this resource appeared in created it; later ones updated it.
    first = found[-1][0]
    base = str(request.base_url).rstrip("/") + "/fhir"
    bundle = {
        "resourceType": "Bundle",
        "type": "history",
        "total": len(found),
        "entry": [
            {
                "fullUrl": f"{base}/{kind}/{resource_id}",
                "resource": resource,
                "request": {
                    "method": "POST" if version == first else "PUT",
                    "url": kind if version == first else f"{kind}/{resource_id}",
                },
                "response": {
                    "status": "201 Created" if version == first else "200 OK",
                    "etag": f'W/"{version}"',
                },
            }
            for version, resource in found
        ],
    }
    return fhir_response(bundle)


@router.get(
    "/{kind}/{resource_id}/_history/{version}", responses=responses(200, 404, media=FHIR_JSON)
)
async def version_read(
    request: Request,
    kind: str,
    resource_id: str,
    version: Annotated[int, Path(ge=1, le=2**31 - 1)],
    _who: Reader,
) -> Response:
    """One version of a resource (vread)."""
    key, role = _id(resource_id)
    row = await _ledger(request).version(key, version)
    resource = _from_row(row).served(role, _kind(kind)) if row is not None else None
    if resource is None:
        raise NotFoundError(f"no version {version} of this {kind}")
    return fhir_response(resource, headers={"ETag": f'W/"{version}"'})


@router.post("/{kind}/$validate", responses=responses(200, 422, media=FHIR_JSON))
async def validate(
    request: Request, kind: str, _who: Annotated[Principal, Depends(allow(*CHECK))]
) -> Response:
    """Validate one R4 JSON resource (or a Bundle): an OperationOutcome with FHIRPath
    expressions for every issue. The answer is 200 whether or not the resource is valid."""
    raw = await json_body(request)
    try:
        data = orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        raise _problem("", "the body is not valid JSON") from exc
    findings = validate_resource(data)
    if isinstance(data, dict) and data.get("resourceType") not in (kind, None):
        findings.insert(
            0,
            Finding(
                Severity.ERROR,
                "fhir-type-mismatch",
                "resourceType",
                f"resourceType {data.get('resourceType')!r} does not match the URL's {kind}",
                "POST [base]/[type]/$validate takes a resource of that type",
                issue_type="invalid",
            ),
        )
    return fhir_response(outcome(findings))
