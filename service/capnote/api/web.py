"""The clinician's form: the page at /, its assets under /static and the form defaults.

No route here needs a token or touches patient data; the page itself calls the note API
with the clinician's token. The routes stay out of the OpenAPI document: they serve the
page, not integrations.
"""

from __future__ import annotations

import re
from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import FileResponse, Response

from capnote.api.clinical_audit import REPORT_STYLE_SOURCE
from capnote.api.deps import SitePolicy
from capnote.api.media import json_response
from capnote.config import Settings
from capnote.errors import NotFoundError
from capnote.note import LaserSettings
from capnote.plain_text import CAUTION
from capnote.policy.model import Policy, Window
from capnote.web import AUDIT_PAGE, PAGE, STATIC

router = APIRouter(include_in_schema=False)

# Only plain file names with a known type are served; nothing can climb out of STATIC.
_ASSET_NAME = re.compile(r"^[a-z0-9][a-z0-9-]*\.(js|css|svg)$")
_MEDIA_TYPES = {
    "js": "text/javascript; charset=utf-8",
    "css": "text/css; charset=utf-8",
    "svg": "image/svg+xml",
}
_MINUTES = {"min": 1, "h": 60, "d": 1440}
# The form's own note identifiers: a urn:uuid value under the RFC 3986 system (FHIR's way of
# saying "the value is itself a URI"), so the form needs no namespace of its own.
FORM_NOTE_SYSTEM = "urn:ietf:rfc:3986"
# Shown on the page and on the printed summary.
FORM_CAUTION = (
    "Thresholds are literature defaults; local protocol and the treating clinician decide. "
    "capnote is not a certified medical device."
)


@router.get("/")
def form_page() -> Response:
    """The clinician's note form."""
    return FileResponse(PAGE, media_type="text/html; charset=utf-8")


# The audit page shows the report in a sandboxed srcdoc frame, which keeps this page's
# policy: the report's one style block is allowed by its hash, and nothing else inline.
_AUDIT_CSP = f"default-src 'self'; style-src 'self' {REPORT_STYLE_SOURCE}; frame-ancestors 'none'"


@router.get("/audit-page")
def audit_page() -> Response:
    """The clinical audit page (the report itself needs an auditor token)."""
    return FileResponse(
        AUDIT_PAGE,
        media_type="text/html; charset=utf-8",
        headers={"content-security-policy": _AUDIT_CSP},
    )


@router.get("/static/{name}")
def asset(name: str) -> Response:
    """One static asset of the form."""
    match = _ASSET_NAME.match(name)
    path = STATIC / name
    if match is None or not path.is_file():
        raise NotFoundError("no such file")
    return FileResponse(path, media_type=_MEDIA_TYPES[match.group(1)])


def _minutes(window: Window) -> int:
    return window.target * _MINUTES[window.unit]


def _days(window: Window) -> float:
    return window.target * _MINUTES[window.unit] / _MINUTES["d"]


def form_defaults(policy: Policy, settings: Settings | None = None) -> dict[str, Any]:
    """What the form shows before anything is typed: the site policy's defaults and the
    site's numbering systems; no patient data."""
    schedule = policy.schedule

    return {
        "policy_name": policy.policy_name,
        "timezone": policy.calendar.timezone,
        "holiday_country": policy.calendar.holiday_country,
        "holiday_subdivision": policy.calendar.holiday_subdivision,
        "wavelength_nm": LaserSettings.model_fields["wavelength_nm"].default,
        "iop_recheck_minutes": _minutes(schedule.iop_recheck),
        "review_days_routine": _days(schedule.review_routine),
        "review_days_raised": _days(schedule.review_raised),
        "usual_pulse_energy_max_mj": policy.thresholds.usual_pulse_energy_max_mj.value,
        "opening_min_mm": policy.thresholds.opening_min_mm.value,
        # The site's lens list: choosing one fills its magnification into the note.
        "contact_lenses": [
            {"name": lens.name, "magnification": lens.magnification}
            for lens in policy.contact_lenses
        ],
        "note_id_system": FORM_NOTE_SYSTEM,
        # The form records every number under the site's system; null: not set here.
        "identifier_systems": {
            "patient": settings.patient_id_system if settings else None,
            "visit": settings.visit_id_system if settings else None,
            "staff": settings.staff_id_system if settings else None,
        },
        "caution": FORM_CAUTION,
        "service_caution": CAUTION,
    }


@router.get("/web/defaults")
def defaults(policy: SitePolicy, request: Request) -> Response:
    """The form's defaults from the site policy and settings (token-free: no patient data)."""
    return json_response(form_defaults(policy, request.app.state.settings))
