"""One note through the whole job: check, derive, schedule, emit.

The command line and (later) the REST routes call this and nothing below it, so both give
the same answer for the same note.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from capnote.clinic_calendar import ClinicCalendar, PolicyCalendar
from capnote.derive import Derived, PriorSession, derive
from capnote.fhir.bundle import OutputCheck, emit
from capnote.fhir.common import Version
from capnote.findings import Finding, has_errors
from capnote.note import Note
from capnote.policy.model import Policy
from capnote.rules import Context, check_payload
from capnote.schedule import DueItem, schedule


@dataclass(frozen=True, slots=True)
class Assessment:
    """What capnote makes of one payload; derived values and the Bundle need a clean note."""

    note: Note | None
    findings: list[Finding]
    derived: Derived | None = None
    due: tuple[DueItem, ...] = ()
    bundle: dict[str, Any] | None = None
    # Each Bundle entry's role, in entry order (see capnote.fhir.common.Emitted).
    roles: tuple[str, ...] = ()

    @property
    def accepted(self) -> bool:
        """True when nothing blocks saving the note."""
        return self.note is not None and not has_errors(self.findings)


class Assessor:
    """Holds the policy and calendar so that many notes share one set-up."""

    def __init__(
        self,
        policy: Policy,
        calendar: ClinicCalendar | None = None,
        output_check: OutputCheck = OutputCheck.BINDINGS,
    ) -> None:
        self.policy = policy
        self.calendar = calendar or PolicyCalendar.from_policy(policy.calendar)
        self.output_check = output_check

    def assess(
        self,
        payload: bytes | str,
        now: datetime,
        prior: Sequence[PriorSession] = (),
    ) -> Assessment:
        """Check a raw note and, when it is clean of errors, derive, schedule and emit."""
        note, findings = check_payload(payload, Context(self.policy, now))
        if note is None or has_errors(findings):
            return Assessment(note, findings)
        return self.complete(note, findings, prior)

    def complete(
        self,
        note: Note,
        findings: list[Finding],
        prior: Sequence[PriorSession] = (),
        version: Version | None = None,
    ) -> Assessment:
        """Derive, schedule and emit for a note that passed its checks."""
        derived = derive(note, self.policy, prior)
        due = schedule(note, derived, self.policy, self.calendar)
        emitted = emit(note, derived, due, version, self.output_check, self.policy.record)
        return Assessment(note, findings, derived, tuple(due), emitted.bundle, emitted.roles)
