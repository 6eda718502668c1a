"""Findings: what a check says about one place in a payload.

A finding is plain data so that rules stay free of HTTP and FHIR; capnote.fhir.outcome turns a
list of findings into an OperationOutcome, the command line prints them.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from enum import StrEnum

from capnote.errors import InputError


class Severity(StrEnum):
    """How much a finding matters; only errors block saving."""

    ERROR = "error"
    WARNING = "warning"
    INFORMATION = "information"


# FHIR issue-type codes (http://hl7.org/fhir/issue-type) that findings use.
IssueType = str

# Places whose values identify a person: a finding there says where, never what.
_IDENTIFYING_PREFIXES = ("patient", "patient_details", "encounter")
WITHHELD = "(withheld: identifying data)"


@dataclass(frozen=True, slots=True, kw_only=True)
class Finding:
    """One problem or remark at one location.

    location is a path into the payload in FHIRPath form (``laser.series[0].energy_mj``);
    value is what was seen there, already made safe to show; allowed says the accepted range
    or set; source names where a clinical threshold comes from.
    """

    severity: Severity
    code: str
    location: str
    message: str
    rule: str
    value: str | None = None
    allowed: str | None = None
    source: str | None = None
    issue_type: IssueType = "business-rule"

    @property
    def blocking(self) -> bool:
        """True when the finding stops a note from being saved."""
        return self.severity is Severity.ERROR


def show_value(location: str, value: object) -> str | None:
    """Render a seen value for a message, withholding identifying fields."""
    if value is None:
        return None
    if location.split(".", 1)[0].split("[", 1)[0] in _IDENTIFYING_PREFIXES:
        return WITHHELD
    if isinstance(value, dict | list):
        # An object or list may hold anything, identifiers included: say what it is, not what
        # is in it.
        return "(a JSON object)" if isinstance(value, dict) else "(a JSON list)"
    if isinstance(value, float):
        text = f"{value:g}"
    else:
        text = value if isinstance(value, str) else repr(value)
    # Long inputs are cut so a hostile payload cannot flood a report or a log line.
    return text if len(text) <= 80 else text[:77] + "..."


def has_errors(findings: Iterable[Finding]) -> bool:
    """True when any finding blocks saving."""
    return any(f.blocking for f in findings)


_ORDER = {Severity.ERROR: 0, Severity.WARNING: 1, Severity.INFORMATION: 2}


# Findings kept for one record: a payload of 90,000 unknown keys made a 56 MB answer.
FINDINGS_MAX = 200


def bounded(findings: list[Finding], limit: int = FINDINGS_MAX) -> list[Finding]:
    """The first limit findings, then one that says how many more were left out (as severe
    as the worst of those, so a record's verdict never changes by the cut)."""
    if len(findings) <= limit:
        return findings
    rest = findings[limit:]
    worst = min((f.severity for f in rest), key=_ORDER.__getitem__)
    return [*findings[:limit], left_out(len(rest), worst, limit)]


def left_out(count: int, severity: Severity, limit: int = FINDINGS_MAX) -> Finding:
    """The finding that closes a list cut at limit: how many more there were."""
    return Finding(
        severity=severity,
        code="findings-left-out",
        location="",
        message=f"{count} more findings were left out; the first {limit} are shown",
        rule=f"an answer lists at most {limit} findings per record",
        value=str(limit + count),
        allowed=f"at most {limit} findings listed",
        issue_type="too-costly",
    )


def ordered(findings: Iterable[Finding]) -> list[Finding]:
    """Errors first, then warnings, then information; stable within each."""
    return sorted(findings, key=lambda f: _ORDER[f.severity])


def error_finding(
    code: str,
    location: str,
    message: str,
    rule: str,
    *,
    value: str | None = None,
    allowed: str | None = None,
    issue_type: IssueType = "invalid",
) -> Finding:
    """One error finding (the value already shown as it may be: see show_value)."""
    return Finding(
        severity=Severity.ERROR,
        code=code,
        location=location,
        message=message,
        rule=rule,
        value=value,
        allowed=allowed,
        issue_type=issue_type,
    )


def refusal(
    code: str,
    location: str,
    message: str,
    rule: str,
    *,
    value: str | None = None,
    allowed: str | None = None,
    issue_type: IssueType = "invalid",
) -> InputError:
    """A request refused for one reason: an InputError with the one error finding that
    names the field, the value, the rule and the allowed range (answered as 422 with an
    OperationOutcome). The one way to build such a refusal."""
    finding = error_finding(
        code, location, message, rule, value=value, allowed=allowed, issue_type=issue_type
    )
    return InputError(message, [finding])


def unstorable() -> InputError:
    """A value the database cannot hold or search (PostgreSQL refuses a NUL byte in text):
    the caller's error, answered 422 alike on both engines' paths, never a 500."""
    return refusal(
        "parameter-unstorable",
        "request",
        "a parameter holds characters that cannot be stored or searched",
        "text without NUL bytes",
        issue_type="value",
    )
