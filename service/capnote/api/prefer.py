"""The Prefer request header (RFC 7240) as FHIR R4 uses it: handling= for searches
(http://hl7.org/fhir/R4/search.html, "Handling errors") and return= for writes
(http://hl7.org/fhir/R4/http.html, "create" and "update": minimal, representation,
OperationOutcome)."""

from __future__ import annotations

from fastapi import Request

RETURNS = ("minimal", "representation", "OperationOutcome")


def preferences(request: Request) -> dict[str, str]:
    """Each preference's name (lower case) and value; the first of a name wins (RFC 7240
    2: a repeated preference is read once), parameters after ';' are not used here."""
    found: dict[str, str] = {}
    for header in request.headers.getlist("prefer"):
        for item in header.split(","):
            name, _, value = item.split(";", 1)[0].strip().partition("=")
            name = name.strip().lower()
            if name and name not in found:
                found[name] = value.strip().strip('"')
    return found


def lenient(request: Request) -> bool:
    """True when the client asked that unsupported search parameters be ignored."""
    return preferences(request).get("handling") == "lenient"


def wanted_return(request: Request) -> str | None:
    """The return= preference when it is one FHIR defines; None otherwise (the default)."""
    value = preferences(request).get("return")
    return value if value in RETURNS else None
