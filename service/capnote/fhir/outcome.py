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


def outcome(findings: Iterable[Finding]) -> dict[str, Any]:
    """An OperationOutcome for a list of findings; 'all OK' when there are none."""
    issues = [issue(f) for f in findings]
    if not issues:
        issues = [
            {
                "severity": "information",
                "code": "informational",
                "diagnostics": "no problems found",
            }
        ]
    return {"resourceType": "OperationOutcome", "issue": issues}


def error_outcome(error: CapnoteError) -> dict[str, Any]:
    """An OperationOutcome for a raised error; input errors list their findings."""
    if isinstance(error, InputError):
        return outcome(error.findings)
    return {
        "resourceType": "OperationOutcome",
        "issue": [
            {
                "severity": "error",
                "code": error.issue_type,
                "details": concept(coding(FINDING_CS, error.code)),
                "diagnostics": error.message,
            }
        ],
    }


def incident_outcome() -> tuple[str, dict[str, Any]]:
    """For the unexpected: a generic message and an incident id; details go to the log only."""
    incident = str(uuid.uuid4())
    return incident, {
        "resourceType": "OperationOutcome",
        "issue": [
            {
                "severity": "fatal",
                "code": "exception",
                "diagnostics": f"{GENERIC_MESSAGE} (incident {incident})",
            }
        ],
    }
