"""What capnote says about a note, as JSON-ready data: one shape for the API and the store."""

from __future__ import annotations

from typing import Any

from capnote.assess import Assessment
from capnote.fhir.outcome import outcome
from capnote.findings import Finding
from capnote.plain_text import CAUTION


def finding_view(f: Finding) -> dict[str, Any]:
    """One finding as JSON."""
    return {
        "severity": f.severity.value,
        "code": f.code,
        "location": f.location,
        "message": f.message,
        "rule": f.rule,
        "value": f.value,
        "allowed": f.allowed,
        "source": f.source,
    }


def assessment_view(a: Assessment) -> dict[str, Any]:
    """Findings, derived values, due items and the OperationOutcome for one note."""
    return {
        "accepted": a.accepted,
        "findings": [finding_view(f) for f in a.findings],
        "outcome": outcome(a.findings),
        # The derived values and due items as they are: orjson writes dataclasses, dates and
        # tuples itself, in C, as the same JSON a walk in Python made at ten times the cost.
        "derived": a.derived,
        "due": a.due,
        "caution": CAUTION,
    }
