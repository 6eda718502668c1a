"""Plausibility checks: a payload in, findings out (error | warning | information).

Contract errors (capnote.rules.contract) stop the other checks, which need a whole note.
Blocking checks (limits) and clinical ones run side by side, so the caller sees every
problem at once. A clinical finding's severity is then the site policy's (``[severity]``):
warning or information, never error, and errors from the limits are never touched. To add a
check, write a function ``(note, ctx) -> Iterable[Finding]`` in the module for its kind and
add it to that module's CHECKS (and its code to the policy's CLINICAL_FINDING_CODES).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import replace

from capnote.findings import Finding, Severity, bounded, ordered
from capnote.note import Note
from capnote.rules import clinical, limits
from capnote.rules.base import Check, Context
from capnote.rules.contract import parse_note

ALL_CHECKS: tuple[Check, ...] = (*limits.CHECKS, *clinical.CHECKS)


# The FHIR issue type each level carries, as rules.base.warning() and information() set it.
_ISSUE_TYPES = {Severity.WARNING: "business-rule", Severity.INFORMATION: "informational"}


def graded(finding: Finding, ctx: Context) -> Finding:
    """The finding at the site policy's level for its code.

    Errors are returned as they are; so is a finding whose code the policy does not list
    (a new check's code keeps the severity its check gave it)."""
    if finding.severity is Severity.ERROR:
        return finding
    level = ctx.policy.level_of(finding.code)
    if level is None:
        return finding
    severity = Severity(level)
    if severity is finding.severity:
        return finding
    return replace(finding, severity=severity, issue_type=_ISSUE_TYPES[severity])


def check_note(note: Note, ctx: Context, checks: Iterable[Check] = ALL_CHECKS) -> list[Finding]:
    """Every finding of every check at the policy's severity, errors first."""
    return ordered(graded(f, ctx) for check in checks for f in check(note, ctx))


def check_payload(payload: bytes | str, ctx: Context) -> tuple[Note | None, list[Finding]]:
    """Parse and check a raw note; the note is None when it breaks the contract."""
    note, findings = parse_note(payload)
    if note is None:
        return None, findings
    return note, bounded(check_note(note, ctx))


__all__ = ["ALL_CHECKS", "Context", "check_note", "check_payload", "graded"]
