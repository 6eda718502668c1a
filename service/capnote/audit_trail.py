"""The audit trail as the auditor reads it: who did what to which note, newest first."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from capnote.errors import NotFoundError
from capnote.fhir.audit_event import audit_event
from capnote.store.base import Store


@dataclass(frozen=True, slots=True)
class EventQuery:
    """An AuditEvent search: each filter applied, or None."""

    after: tuple[str, datetime] | None
    before: tuple[str, datetime] | None
    token_id: int | None
    actor: str | None
    note_key: str | None
    outcome: str | None
    page: int
    count: int


class AuditTrail:
    """Pages of the audit trail."""

    def __init__(self, store: Store) -> None:
        self.store = store

    async def entries(self, note_key: str | None, page: int, count: int) -> list[dict[str, Any]]:
        """One page of entries, optionally for one note."""
        rows = await self.store.audit_entries(note_key, (page - 1) * count, count)
        return [
            {
                "at": r.at.isoformat(),
                "actor": r.actor,
                "role": r.role,
                "action": r.action,
                "note": r.note_key,
                "version": r.version,
                "remote": r.remote,
                "outcome": r.outcome,
                "token_id": r.token_id,
                "detail": r.detail,
            }
            for r in rows
        ]

    async def events(
        self, query: EventQuery, base: str, self_url: str, page_url: Callable[[int], str]
    ) -> dict[str, Any]:
        """One page of the trail as a searchset of AuditEvents."""
        total, rows = await self.store.audit_search(
            after=query.after,
            before=query.before,
            token_id=query.token_id,
            actor=query.actor,
            note_key=query.note_key,
            outcome=query.outcome,
            offset=(query.page - 1) * query.count,
            limit=query.count,
        )
        links = [{"relation": "self", "url": self_url}]
        if query.page * query.count < total:
            links.append({"relation": "next", "url": page_url(query.page + 1)})
        return {
            "resourceType": "Bundle",
            "type": "searchset",
            "total": total,
            "link": links,
            "entry": [
                {
                    "fullUrl": f"{base}/AuditEvent/{r.id}",
                    "resource": audit_event(r),
                    "search": {"mode": "match"},
                }
                for r in rows
            ],
        }

    async def event(self, event_id: int) -> dict[str, Any]:
        """One AuditEvent."""
        row = await self.store.audit_entry(event_id)
        if row is None:
            raise NotFoundError("no AuditEvent with this id")
        return audit_event(row)
