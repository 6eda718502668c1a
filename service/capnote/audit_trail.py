"""The audit trail as the auditor reads it: who did what to which note, newest first."""

from __future__ import annotations

from typing import Any

from capnote.store.base import Store


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
