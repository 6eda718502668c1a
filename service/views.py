"""What capnote says about a note, as JSON-ready data: one shape for the API and the store."""

from __future__ import annotations

import dataclasses
from datetime import date, datetime
from typing import Any

from service.assess import Assessment
from service.derive import Derived
from service.fhir.outcome import outcome
from service.findings import Finding
from service.report import CAUTION
from service.schedule import DueItem

# Field names per dataclass, looked up once: dataclasses.fields() is slow on every call.
_FIELDS: dict[type, tuple[str, ...]] = {}


def _plain(value: Any) -> Any:
    """JSON-ready data: what _plain(dataclasses.asdict(value)) gave, in one pass.

    asdict deep-copies every value before _plain converts it again; the derived values and
    due items are frozen dataclasses of numbers, text, dates and tuples, so one walk that
    builds new dicts and lists gives the same data at a fraction of the cost.
    """
    if isinstance(value, str | int | float | bool | None):
        return value
    if isinstance(value, datetime | date):
        return value.isoformat()
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    kind = type(value)
    names = _FIELDS.get(kind)
    if names is None and dataclasses.is_dataclass(value):
        names = _FIELDS[kind] = tuple(f.name for f in dataclasses.fields(value))
    if names is not None:
        return {name: _plain(getattr(value, name)) for name in names}
    return value


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


def derived_view(d: Derived) -> dict[str, Any]:
    """Derived values as JSON; the focal estimate says it is idealised."""
    data: dict[str, Any] = _plain(d)
    data["focal_spot"]["label"] = "idealised diffraction-limited estimate, not a measurement"
    return data


def due_view(item: DueItem) -> dict[str, Any]:
    """One due item as JSON, with the days it passed over."""
    data: dict[str, Any] = _plain(item)
    return data


def assessment_view(a: Assessment) -> dict[str, Any]:
    """Findings, derived values, due items and the OperationOutcome for one note."""
    return {
        "accepted": a.accepted,
        "findings": [finding_view(f) for f in a.findings],
        "outcome": outcome(a.findings),
        "derived": derived_view(a.derived) if a.derived is not None else None,
        "due": [due_view(i) for i in a.due],
        "caution": CAUTION,
    }
