"""The application services a route may ask for, declared once.

create_app() builds the services and keeps them on the app; routes name what they need by
these aliases (``notes: Notes``), and tests swap any of them with
``app.dependency_overrides[notes_service] = ...``.

Each is ``async def`` although it awaits nothing: FastAPI runs a plain ``def`` dependency in
a worker thread, a thread hop per dependency per request (the benchmark showed it).
"""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Request

from capnote.access import Access
from capnote.audit_trail import AuditTrail
from capnote.fhir_reads import FhirReads
from capnote.notes import NoteService
from capnote.policy import Policy
from capnote.reviews import ReviewService


async def notes_service(request: Request) -> NoteService:
    """The note lifecycle."""
    service: NoteService = request.app.state.notes
    return service


async def review_service(request: Request) -> ReviewService:
    """The review visit lifecycle."""
    service: ReviewService = request.app.state.reviews
    return service


async def fhir_reads(request: Request) -> FhirReads:
    """The FHIR read API's reads."""
    service: FhirReads = request.app.state.fhir_reads
    return service


async def audit_trail(request: Request) -> AuditTrail:
    """The audit trail."""
    service: AuditTrail = request.app.state.audit_trail
    return service


async def access(request: Request) -> Access:
    """Token lookup."""
    service: Access = request.app.state.access
    return service


async def site_policy(request: Request) -> Policy:
    """The site policy in force."""
    service: NoteService = request.app.state.notes
    return service.assessor.policy


Notes = Annotated[NoteService, Depends(notes_service)]
Reviews = Annotated[ReviewService, Depends(review_service)]
Reads = Annotated[FhirReads, Depends(fhir_reads)]
Audit = Annotated[AuditTrail, Depends(audit_trail)]
Tokens = Annotated[Access, Depends(access)]
SitePolicy = Annotated[Policy, Depends(site_policy)]
