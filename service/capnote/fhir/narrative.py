"""A readable narrative (text.div) for every emitted resource but the Procedure, which
builds its own (capnote.fhir.procedure).

A receiving record shows text.div to a person when it does not render the coded content
(FHIR R4 narrative.html), and the narrative must not hide a modifier such as the status, so
each line here is what the resource says, in words: the code's text, the value, the eye,
the time and the status. bundle.emit writes it once every status is settled.
"""

from __future__ import annotations

from html import escape
from typing import Any


def _text(concept: dict[str, Any] | None) -> str | None:
    if not concept:
        return None
    if concept.get("text"):
        return str(concept["text"])
    for c in concept.get("coding", ()):
        if c.get("display"):
            return str(c["display"])
    return None


def _value(node: dict[str, Any]) -> str | None:
    if "valueQuantity" in node:
        q = node["valueQuantity"]
        return f"{q['value']:g} {q.get('unit', q.get('code', ''))}".strip()
    if "valueString" in node:
        return str(node["valueString"])
    if "valueInteger" in node:
        return str(node["valueInteger"])
    if "valueBoolean" in node:
        return "yes" if node["valueBoolean"] else "no"
    if "valueCodeableConcept" in node:
        return _text(node["valueCodeableConcept"])
    if "valueDateTime" in node:
        return str(node["valueDateTime"])
    return None


def _observation(r: dict[str, Any]) -> list[str]:
    head = _text(r.get("code")) or "Observation"
    value = _value(r)
    lines = [f"{head}: {value}" if value is not None else head]
    for part in r.get("component", ()):
        shown = _value(part)
        if shown is not None:
            lines.append(f"{_text(part.get('code')) or 'component'}: {shown}")
    site = _text(r.get("bodySite"))
    if site:
        lines.append(f"Site: {site}")
    if r.get("effectiveDateTime"):
        lines.append(f"At {r['effectiveDateTime']}")
    return lines


def _medication(r: dict[str, Any]) -> list[str]:
    lines = [_text(r.get("medicationCodeableConcept")) or "Medication"]
    for dosage in [r.get("dosage") or {}, *r.get("dosageInstruction", ())]:
        if dosage.get("text"):
            lines.append(str(dosage["text"]))
    if r.get("effectiveDateTime"):
        lines.append(f"Given at {r['effectiveDateTime']}")
    return lines


def _service_request(r: dict[str, Any]) -> list[str]:
    lines = [_text(r.get("code")) or "Request"]
    lines += [str(n["text"]) for n in r.get("note", ()) if n.get("text")]
    return lines


def _condition(r: dict[str, Any]) -> list[str]:
    lines = [_text(r.get("code")) or "Condition"]
    verification = _text(r.get("verificationStatus"))
    if verification:
        lines.append(f"Verification: {verification}")
    clinical = _text(r.get("clinicalStatus"))
    if clinical:
        lines.append(f"Clinical status: {clinical}")
    sites = [t for site in r.get("bodySite", ()) if (t := _text(site))]
    if sites:
        lines.append("Site: " + ", ".join(sites))
    lines += [str(n["text"]) for n in r.get("note", ()) if n.get("text")]
    if r.get("recordedDate"):
        lines.append(f"Recorded {r['recordedDate']}")
    return lines


_BY_KIND = {
    "Condition": _condition,
    "Observation": _observation,
    "MedicationAdministration": _medication,
    "MedicationRequest": _medication,
    "ServiceRequest": _service_request,
}


def narrative(resource: dict[str, Any]) -> dict[str, str] | None:
    """A generated narrative for a resource of a kind listed here (None for others)."""
    describe = _BY_KIND.get(resource["resourceType"])
    if describe is None:
        return None
    lines = describe(resource)
    status = resource.get("status")
    if status:
        lines.append(f"Status: {status}")
    body = "".join(f"<p>{escape(line)}</p>" for line in lines)
    return {"status": "generated", "div": f'<div xmlns="http://www.w3.org/1999/xhtml">{body}</div>'}
