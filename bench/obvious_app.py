"""The obvious implementation, for the benchmark only: what capnote would cost if it built
its Bundle with the fhir.resources R4B classes and stored it through the ORM.

Same note contract, same checks, derived values and follow-up (capnote's own functions),
then every resource is built as its R4B class, the Bundle is serialised with
model_dump_json and one row is inserted into SQLite through a SQLModel session, all in a
thread-pool route as capnote's own. It skips what capnote adds besides
(tokens, cumulative energy from earlier sessions, the read model, the audit trail), so the
comparison flatters it, not capnote.

Run: ``uvicorn bench.obvious_app:create --factory`` with BENCH_OBVIOUS_DB set to a SQLite URL.
"""

from __future__ import annotations

import os
from datetime import UTC, datetime
from typing import Any

from fastapi import FastAPI, Request
from fastapi.responses import Response
from fhir.resources.R4B import get_fhir_model_class
from fhir.resources.R4B.bundle import Bundle, BundleEntry, BundleEntryRequest
from sqlalchemy import Column, Text
from sqlmodel import Field, Session, SQLModel, create_engine
from starlette.concurrency import run_in_threadpool

from capnote.clinic_calendar import PolicyCalendar
from capnote.derive import Derived, derive
from capnote.fhir.bundle import entries
from capnote.fhir.codes import RESOURCE_KEY
from capnote.fhir.common import stable_uuid
from capnote.findings import has_errors
from capnote.note import Note
from capnote.policy import Policy, load_policy
from capnote.rules import Context, check_note
from capnote.schedule import DueItem, schedule


class ObviousRecord(SQLModel, table=True):
    """One stored note with its Bundle."""

    __tablename__ = "obvious_record"

    id: int | None = Field(default=None, primary_key=True)
    note_id: str = Field(max_length=64, unique=True)
    bundle_json: str = Field(sa_column=Column(Text, nullable=False))


def r4b_bundle(note: Note, derived: Derived, due: list[DueItem]) -> Bundle:
    """The same transaction Bundle as capnote's, built from R4B classes resource by resource."""
    built = []
    for entry in entries(note, derived, due):
        resource: dict[str, Any] = dict(entry.resource)
        model = get_fhir_model_class(resource.pop("resourceType"))
        built.append(
            BundleEntry(
                fullUrl=entry.full_url,
                resource=model(**resource),
                request=BundleEntryRequest(
                    method="POST",
                    url=entry.resource["resourceType"],
                    ifNoneExist=entry.if_none_exist,
                ),
            )
        )
    return Bundle(
        type="transaction",
        identifier={"system": RESOURCE_KEY, "value": stable_uuid(note, "bundle")},
        entry=built,
    )


def create() -> FastAPI:
    """The app factory uvicorn calls."""
    policy: Policy = load_policy()
    calendar = PolicyCalendar.from_policy(policy.calendar)
    engine = create_engine(
        os.environ.get("BENCH_OBVIOUS_DB", "sqlite:///obvious.sqlite3"),
        connect_args={"check_same_thread": False},
    )
    SQLModel.metadata.create_all(engine, tables=[ObviousRecord.__table__])  # type: ignore[attr-defined]
    app = FastAPI(openapi_url=None, docs_url=None, redoc_url=None)

    # The raw body, parsed by the contract (strict: a dict from FastAPI's own parse would
    # refuse ISO date strings), and the work in the thread pool, as capnote's route does it.
    @app.post("/notes", status_code=201)
    async def submit(request: Request) -> Response:
        return await run_in_threadpool(_submit, await request.body())

    def _submit(body: bytes) -> Response:
        note = Note.model_validate_json(body)
        findings = check_note(note, Context(policy, datetime.now(UTC)))
        if has_errors(findings):
            return Response(b'{"accepted":false}', 422, media_type="application/json")
        derived = derive(note, policy, ())
        due = schedule(note, derived, policy, calendar)
        text = r4b_bundle(note, derived, due).model_dump_json(exclude_none=True)
        with Session(engine) as session:
            session.add(ObviousRecord(note_id=note.note_id.value, bundle_json=text))
            session.commit()
        return Response(text, 201, media_type="application/fhir+json")

    return app
