"""JSON only: a FHIR request for another format answers 406 (FHIR R4 http 3.1.0.1.10:
_format overrides Accept; a server that cannot give the format asked for says so)."""

from __future__ import annotations

from fastapi import Request
from starlette.exceptions import HTTPException

# What Accept may name for the JSON capnote sends (with the R4 and the older FHIR names).
_JSON_TYPES = frozenset(
    {"*/*", "application/*", "application/json", "application/fhir+json", "application/json+fhir"}
)
_JSON_FORMATS = _JSON_TYPES | {"json"}


def _acceptable(accept: str) -> bool:
    """True when an Accept header takes JSON (no header takes anything)."""
    if not accept.strip():
        return True
    for item in accept.split(","):
        media, *params = (part.strip() for part in item.split(";"))
        refused = any(p.replace(" ", "") in ("q=0", "q=0.0", "q=0.00", "q=0.000") for p in params)
        if media.lower() in _JSON_TYPES and not refused:
            return True
    return False


async def json_only(request: Request) -> None:
    """406 for _format or Accept naming only formats capnote does not send (XML, say)."""
    wanted = request.query_params.get("_format")
    if wanted is not None:
        if wanted.strip().lower() not in _JSON_FORMATS:
            raise HTTPException(406, "capnote answers in FHIR JSON only (_format=json)")
    elif not _acceptable(request.headers.get("accept", "")):
        raise HTTPException(406, "capnote answers in FHIR JSON only (application/fhir+json)")
