"""What every rule module shares: the context a check runs in and how it reports."""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import dataclass
from datetime import datetime

from capnote.findings import Finding, Severity, show_value
from capnote.note import Note
from capnote.policy.model import Number, Policy, Range, spoken_unit


@dataclass(frozen=True, slots=True)
class Context:
    """What checks may consult besides the note: the policy and the present time."""

    policy: Policy
    now: datetime


Check = Callable[[Note, Context], Iterable[Finding]]


def error(
    code: str,
    location: str,
    message: str,
    rule: str,
    *,
    value: object = None,
    allowed: str | None = None,
    source: str | None = None,
    issue_type: str = "business-rule",
) -> Finding:
    """A blocking finding."""
    return Finding(
        severity=Severity.ERROR,
        code=code,
        location=location,
        message=message,
        rule=rule,
        value=show_value(location, value),
        allowed=allowed,
        source=source,
        issue_type=issue_type,
    )


def warning(
    code: str,
    location: str,
    message: str,
    rule: str,
    *,
    value: object = None,
    allowed: str | None = None,
    source: str | None = None,
) -> Finding:
    """A finding that raises a question but never blocks saving."""
    return Finding(
        severity=Severity.WARNING,
        code=code,
        location=location,
        message=message,
        rule=rule,
        value=show_value(location, value),
        allowed=allowed,
        source=source,
        issue_type="business-rule",
    )


def information(
    code: str, location: str, message: str, rule: str, *, source: str | None = None
) -> Finding:
    """A remark for the record."""
    return Finding(
        severity=Severity.INFORMATION,
        code=code,
        location=location,
        message=message,
        rule=rule,
        value=None,
        allowed=None,
        source=source,
        issue_type="informational",
    )


def outside_limit(location: str, value: float | None, limit: Range, what: str) -> Finding | None:
    """An error when a value lies outside a hard limit, else None."""
    if value is None or limit.contains(value):
        return None
    return error(
        "out-of-range",
        location,
        f"{what} of {_number(value)} {spoken_unit(limit.unit)} is outside {limit.describe()}",
        f"{what} must be {limit.describe()}",
        value=value,
        allowed=limit.describe(),
        source=limit.source,
        issue_type="value",
    )


def _number(value: float) -> str:
    """A number for a message; an int of any size prints whole (float() would overflow)."""
    return str(value) if isinstance(value, int) else f"{value:g}"


def above(value: float, threshold: Number) -> bool:
    """True when value is over the threshold."""
    return value > threshold.value
