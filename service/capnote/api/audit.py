"""The audit trail, for the auditor role only: GET /audit (capnote's own JSON) and the same
entries as FHIR AuditEvent resources under /fhir/AuditEvent, searchable."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Annotated

from fastapi import APIRouter, Depends, Path, Query, Request
from fastapi.responses import Response

from capnote.api.answers import AuditAnswer
from capnote.api.auth import AUDIT, allow
from capnote.api.deps import Audit
from capnote.api.docs import responses
from capnote.api.media import FHIR_JSON, fhir_response, json_response
from capnote.audit_trail import EventQuery
from capnote.errors import InputError, UsageError
from capnote.fhir.search import parse_date
from capnote.findings import refusal
from capnote.notes import Principal

router = APIRouter(tags=["audit"])
Auditor = Annotated[Principal, Depends(allow(*AUDIT))]

# The AuditEvent search parameters applied (R4 AuditEvent search: date, agent, agent-name,
# entity, outcome), and paging; any other is refused, never ignored.
SUPPORTED = ("date", "agent", "agent-name", "entity", "outcome", "_count", "_page")
COUNT_MAX = 500


@router.get("/audit", responses=responses(200, model=AuditAnswer))
async def audit_trail(
    trail: Audit,
    _who: Auditor,
    note: Annotated[str | None, Query(max_length=36)] = None,
    page: Annotated[int, Query(ge=1, le=100_000)] = 1,
    count: Annotated[int, Query(ge=1, le=500)] = 100,
) -> Response:
    """Who did what to which note, newest first."""
    entries = await trail.entries(note, page, count)
    return json_response({"page": page, "count": count, "entries": entries})


@router.get("/fhir/AuditEvent", responses=responses(200, 400, media=FHIR_JSON))
async def audit_events(request: Request, trail: Audit, _who: Auditor) -> Response:
    """The audit trail as a searchset of AuditEvent resources, newest first."""
    query = _event_query(request)

    def page_url(number: int) -> str:
        wanted = dict(request.query_params) | {"_page": str(number), "_count": str(query.count)}
        return str(request.url.replace_query_params(**wanted))

    base = str(request.base_url).rstrip("/") + "/fhir"
    return fhir_response(await trail.events(query, base, str(request.url), page_url))


@router.get("/fhir/AuditEvent/{event_id}", responses=responses(200, 404, media=FHIR_JSON))
async def audit_event(
    trail: Audit, _who: Auditor, event_id: Annotated[int, Path(ge=1, le=2**62)]
) -> Response:
    """One AuditEvent."""
    return fhir_response(await trail.event(event_id))


def _event_query(request: Request) -> EventQuery:
    params = request.query_params
    unknown = sorted(set(params) - set(SUPPORTED))
    if unknown:
        raise UsageError(
            f"the search parameter {unknown[0]!r} is not supported on AuditEvent; "
            f"supported: {', '.join(SUPPORTED)}"
        )
    after, before = _at_range(params.getlist("date"), datetime.now(UTC))
    agent = params.get("agent")
    if agent is not None and not (agent.isascii() and agent.isdigit() and len(agent) <= 18):
        raise _bad("agent", "agent is the id of the token used (capnote token list)", agent)
    outcome = params.get("outcome")
    if outcome is not None and outcome not in ("0", "4", "8", "12"):
        raise _bad("outcome", "outcome is 0, 4, 8 or 12 (R4 AuditEventOutcome)", outcome)
    entity = params.get("entity")
    note_key = None if entity is None else entity.removeprefix("Procedure/").lower()
    return EventQuery(
        after=after,
        before=before,
        token_id=None if agent is None else int(agent),
        actor=params.get("agent-name"),
        note_key=note_key,
        outcome=outcome,
        page=_number(params.get("_page"), "_page", 1, 100_000, 1),
        count=min(_number(params.get("_count"), "_count", 1, 10**6, 100), COUNT_MAX),
    )


def _at_range(
    values: list[str], now: datetime
) -> tuple[tuple[str, datetime] | None, tuple[str, datetime] | None]:
    """date= values (every R4 prefix but ne, partial dates) as the range an entry's moment
    must fall in: (after: ("ge" | "gt", t), before: ("le" | "lt", t)); several narrow it."""
    after: tuple[str, datetime] | None = None
    before: tuple[str, datetime] | None = None
    for raw in values:
        test = parse_date(raw, "date", now)
        if test.prefix == "ne":
            raise _bad("date", "the ne prefix is not supported on AuditEvent", raw)
        low = {
            "eq": ("ge", test.low),
            "ap": ("ge", test.low),
            "ge": ("ge", test.low),
            "gt": ("gt", test.high),
            "sa": ("gt", test.high),
        }.get(test.prefix)
        high = {
            "eq": ("le", test.high),
            "ap": ("le", test.high),
            "le": ("le", test.high),
            "lt": ("lt", test.low),
            "eb": ("lt", test.low),
        }.get(test.prefix)
        if low is not None and (after is None or low[1] > after[1]):
            after = low
        if high is not None and (before is None or high[1] < before[1]):
            before = high
    return after, before


def _number(text: str | None, name: str, low: int, high: int, default: int) -> int:
    if text is None:
        return default
    if not (text.isascii() and text.isdigit() and low <= int(text) <= high):
        raise _bad(name, f"{name} is a whole number from {low} to {high}", text)
    return int(text)


def _bad(name: str, message: str, value: str) -> InputError:
    return refusal("search-invalid", name, message, "R4 AuditEvent search", value=value[:40])
