"""Plausibility checks: a payload in, findings out (error | warning | information).

Contract errors (service.rules.contract) stop the other checks, which need a whole note.
Blocking checks (limits) and clinical ones run side by side, so the caller sees every
problem at once. To add a check, write a function ``(note, ctx) -> Iterable[Finding]`` in
the module for its kind and add it to that module's CHECKS.
"""

from __future__ import annotations

from collections.abc import Iterable

from schemas.note import Note
from service.findings import Finding, ordered
from service.rules import clinical, limits
from service.rules.base import Check, Context
from service.rules.contract import parse_note

ALL_CHECKS: tuple[Check, ...] = (*limits.CHECKS, *clinical.CHECKS)


def check_note(note: Note, ctx: Context, checks: Iterable[Check] = ALL_CHECKS) -> list[Finding]:
    """Every finding of every check, errors first."""
    return ordered(f for check in checks for f in check(note, ctx))


def check_payload(payload: bytes | str, ctx: Context) -> tuple[Note | None, list[Finding]]:
    """Parse and check a raw note; the note is None when it breaks the contract."""
    note, findings = parse_note(payload)
    if note is None:
        return None, findings
    return note, check_note(note, ctx)


__all__ = ["ALL_CHECKS", "Context", "check_note", "check_payload"]
