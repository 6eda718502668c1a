"""Findings and errors as FHIR R4 OperationOutcome resources: the one mapping place."""

from __future__ import annotations

import uuid
from collections.abc import Iterable
from typing import Any

from capnote.errors import CapnoteError, InputError
from capnote.fhir.codes import FINDING_CS, coding, concept
from capnote.findings import Finding

GENERIC_MESSAGE = "capnote could not finish this request; quote the incident id to support"


def issue(finding: Finding) -> dict[str, Any]:
    """One finding as an OperationOutcome.issue."""
    parts = [finding.message, f"rule: {finding.rule}"]
    if finding.value is not None:
        parts.append(f"value: {finding.value}")
    if finding.allowed is not None:
        parts.append(f"allowed: {finding.allowed}")
    if finding.source is not None:
        parts.append(f"source: {finding.source}")
    out: dict[str, Any] = {
        "severity": finding.severity.value,
        "code": finding.issue_type,
        "details": concept(coding(FINDING_CS, finding.code), text=finding.message),
        "diagnostics": "; ".join(parts),
    }
    if finding.location:
        out["expression"] = [finding.location]
    return out


def message_issue(
    severity: str, issue_type: str, diagnostics: str, code: str | None = None
) -> dict[str, Any]:
    """An OperationOutcome.issue that carries a message, not a finding."""
    out: dict[str, Any] = {"severity": severity, "code": issue_type}
    if code is not None:
        out["details"] = concept(coding(FINDING_CS, code))
    out["diagnostics"] = diagnostics
    return out


def message_outcome(
    severity: str, issue_type: str, diagnostics: str, code: str | None = None
) -> dict[str, Any]:
    """An OperationOutcome of one message issue."""
    return {
        "resourceType": "OperationOutcome",
        "issue": [message_issue(severity, issue_type, diagnostics, code)],
    }


def outcome(findings: Iterable[Finding]) -> dict[str, Any]:
    """An OperationOutcome for a list of findings; 'all OK' when there are none."""
    issues = [issue(f) for f in findings]
    if not issues:
        issues = [message_issue("information", "informational", "no problems found")]
    return {"resourceType": "OperationOutcome", "issue": issues}


def error_outcome(error: CapnoteError) -> dict[str, Any]:
    """An OperationOutcome for a raised error; input errors list their findings."""
    if isinstance(error, InputError):
        return outcome(error.findings)
    return message_outcome("error", error.issue_type, error.message, error.code)


def incident_outcome() -> tuple[str, dict[str, Any]]:
    """For the unexpected: a generic message and an incident id; details go to the log only."""
    incident = str(uuid.uuid4())
    return incident, message_outcome(
        "fatal", "exception", f"{GENERIC_MESSAGE} (incident {incident})"
    )
