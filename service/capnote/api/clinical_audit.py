"""The clinical audit over HTTP, for the auditor role: GET /audit/clinical answers the same
report as `capnote audit` (HTML with its SVG funnel plots, or CSV) for a period.

The auditor role is the one that may see it: it reads every note and the audit trail
already, and figures per clinician are for clinical governance, not for every reader."""

from __future__ import annotations

import base64
import hashlib
from datetime import date
from typing import Annotated

from fastapi import APIRouter, Depends, Query
from fastapi.responses import Response

from capnote.api.auth import AUDIT, allow
from capnote.api.deps import Notes
from capnote.api.docs import responses
from capnote.audit.render import STYLE, csv_text, html_page
from capnote.audit.report import build, period
from capnote.findings import refusal
from capnote.notes import Principal

router = APIRouter(tags=["audit"])
Auditor = Annotated[Principal, Depends(allow(*AUDIT))]
# The page's one inline style block is allowed by its hash; nothing else runs or loads.
_STYLE_HASH = base64.b64encode(hashlib.sha256(STYLE.encode()).digest()).decode()
REPORT_STYLE_SOURCE = f"'sha256-{_STYLE_HASH}'"
_PAGE_CSP = f"default-src 'none'; style-src {REPORT_STYLE_SOURCE}; frame-ancestors 'none'"
_DAY = r"^\d{4}-\d{2}-\d{2}$"


def _day(text: str, name: str) -> date:
    try:
        return date.fromisoformat(text)
    except ValueError:
        raise refusal(
            "audit-period-invalid",
            name,
            f"{name} is not a calendar date",
            "a day as YYYY-MM-DD (ISO 8601)",
            value=text,
            allowed="YYYY-MM-DD",
        ) from None


@router.get("/audit/clinical", responses=responses(200, 422, media="text/html"))
async def clinical_audit(
    notes: Notes,
    _who: Auditor,
    start: Annotated[str, Query(alias="from", pattern=_DAY)],
    end: Annotated[str, Query(alias="to", pattern=_DAY)],
    site: Annotated[str | None, Query(max_length=255)] = None,
    clinician: Annotated[str | None, Query(max_length=320)] = None,
    format: Annotated[str, Query(pattern="^(html|csv)$")] = "html",
) -> Response:
    """The clinical audit of the final sessions of a period (from and to included)."""
    first, last = _day(start, "from"), _day(end, "to")
    if last < first:
        raise refusal(
            "audit-period-invalid",
            "to",
            f"to ({last}) is before from ({first})",
            "the period runs from 'from' to 'to', both included",
            value=str(last),
            allowed=f"{first} or later",
        )
    since, until = period(first, last)
    groups = await notes.store.audit_figures(since, until, site)
    report = build(groups, first, last, site, clinician)
    if format == "csv":
        return Response(csv_text(report), media_type="text/csv; charset=utf-8")
    return Response(
        html_page(report),
        media_type="text/html; charset=utf-8",
        headers={"content-security-policy": _PAGE_CSP},
    )
