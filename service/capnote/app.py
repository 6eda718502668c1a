"""create_app(settings): the only place that wires capnote together."""

from __future__ import annotations

import asyncio
import gc
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from datetime import UTC, datetime

from fastapi import FastAPI
from fastapi.middleware.cors import CORSMiddleware

from capnote import __version__
from capnote.access import Access
from capnote.api import (
    audit,
    clinical_audit,
    docs,
    errors,
    fhir,
    fhir_package,
    fhir_validate,
    health,
    notes,
    reviews,
    web,
)
from capnote.api.access_audit import AccessAudit
from capnote.api.body_limit import BodyLimit
from capnote.api.guard import Guard
from capnote.api.head import HeadAsGet
from capnote.api.headers import SecurityHeaders
from capnote.api.hosts import PublicHost
from capnote.assess import Assessor
from capnote.audit_trail import AuditTrail
from capnote.config import Settings, effective_policy
from capnote.delivery import DeliveryWorker
from capnote.fhir_reads import FhirReads
from capnote.notes import Clock, NoteService
from capnote.reviews import ReviewService
from capnote.store.database import migrate, open_store

DESCRIPTION = (
    "Structured, checked records of Nd:YAG laser posterior capsulotomy sessions, emitted as "
    "FHIR R4. Thresholds are literature defaults, overridable per site; local protocol and "
    "the treating clinician decide. capnote is not a certified medical device."
)


def utc_now() -> datetime:
    """The real clock."""
    return datetime.now(UTC)


def create_app(settings: Settings | None = None, clock: Clock = utc_now) -> FastAPI:
    """The whole service for these settings."""
    settings = settings or Settings()
    policy = effective_policy(settings)
    if settings.migrate_on_start:
        migrate(settings.database_url)
    receiver = settings.receiver()
    store = open_store(settings.database_url)

    @asynccontextmanager
    async def lifespan(_app: FastAPI) -> AsyncIterator[None]:
        # Everything built so far (modules, models, policy) lives as long as the process:
        # moved out of the collector's reach, it is not traversed again by every full
        # collection, which otherwise costs about a tenth of each request's time.
        gc.collect()
        gc.freeze()
        await store.start()
        # Delivery runs beside the service when forwarding is on, as a task on the same
        # store; claims in the database keep several processes from sending one entry twice.
        stop = asyncio.Event()
        worker = task = None
        if receiver is not None and settings.deliver_in_service:
            worker = DeliveryWorker(store, receiver, clock)
            task = asyncio.create_task(worker.run_forever(stop))
        yield
        stop.set()
        if task is not None and worker is not None:
            try:
                await asyncio.wait_for(task, timeout=10)
            except TimeoutError:
                task.cancel()
            await worker.aclose()
        await store.aclose()

    # No /docs or /redoc: both pages load their scripts from a CDN, which the CSP (and many
    # hospital networks) refuse; the OpenAPI document itself is at /openapi.json.
    app = FastAPI(
        title="capnote",
        version=__version__,
        description=DESCRIPTION,
        lifespan=lifespan,
        docs_url=None,
        redoc_url=None,
    )
    # The services routes ask for (capnote.api.deps); nothing else is kept on the app.
    assessor = Assessor(policy, output_check=settings.output_check)
    app.state.notes = NoteService(store, assessor, clock, forward=receiver is not None)
    app.state.reviews = ReviewService(store, assessor, clock, forward=receiver is not None)
    app.state.fhir_reads = FhirReads(store, clock, settings.patient_id_system)
    app.state.audit_trail = AuditTrail(store)
    app.state.access = Access(store, clock)
    app.state.settings = settings
    errors.install(app)
    docs.install(app)
    # audit before fhir: /fhir/AuditEvent is the auditor's, not the read API's.
    for router in (
        health.router,
        reviews.router,
        notes.router,
        fhir_validate.router,
        fhir_package.router,
        audit.router,
        clinical_audit.router,
        fhir.router,
        web.router,
    ):
        app.include_router(router)

    if settings.cors_origins:
        app.add_middleware(
            CORSMiddleware,
            allow_origins=settings.cors_origins,
            allow_methods=["GET", "POST", "PUT"],
            allow_headers=["Authorization", "Content-Type", "If-Match"],
            expose_headers=["ETag", "Location"],
        )
    app.add_middleware(AccessAudit, store=store, clock=clock)
    app.add_middleware(HeadAsGet)
    app.add_middleware(BodyLimit, max_bytes=settings.max_body_bytes)
    app.add_middleware(Guard)
    # Before anything reads the Host: links follow the public base URL, never a client's.
    app.add_middleware(
        PublicHost, public_base_url=settings.public_base_url, allowed=settings.allowed_hosts
    )
    # Outermost, so that the 413 of BodyLimit and the 500 of Guard carry the headers too.
    app.add_middleware(SecurityHeaders)
    return app


def app_from_environment() -> FastAPI:
    """The factory uvicorn workers call (`capnote serve`): settings from the environment."""
    return create_app(Settings())
