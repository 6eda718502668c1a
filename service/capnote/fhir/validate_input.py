"""The inputs of the $validate operation: a resource, or a Parameters body; mode; profile.

FHIR R4 (resource-operation-validate.html): POST [base]/[type]/$validate takes the
resource as the body, or a Parameters resource whose `resource` parameter holds it, with
the optional parameters `mode` (create | update | delete) and `profile` (a canonical URL).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from capnote.errors import InputError
from capnote.findings import Finding, Severity, refusal

MODES = ("create", "update", "delete")  # ValueSet resource-validation-mode (required)
_RULE = "FHIR R4 $validate (resource-operation-validate.html)"
_PARAMETERS = ("resource", "mode", "profile")


@dataclass(frozen=True)
class ValidateInput:
    """What to validate, and how."""

    resource: Any
    mode: str | None
    profile: str | None


def _bad(
    location: str, message: str, value: str | None = None, allowed: str | None = None
) -> InputError:
    return refusal("validate-parameter", location, message, _RULE, value=value, allowed=allowed)


def _one(name: str, from_url: str | None, from_body: str | None) -> str | None:
    if from_url is not None and from_body is not None and from_url != from_body:
        raise _bad(name, f"{name} is given in the URL and in the Parameters body, differently")
    return from_body if from_body is not None else from_url


def read_input(kind: str | None, body: Any, mode: str | None, profile: str | None) -> ValidateInput:
    """The operation's inputs from the parsed body and the URL's mode and profile (kind is
    None at the system level, where a Parameters body is always the operation's)."""
    resource = body
    body_mode = body_profile = None
    if (
        isinstance(body, dict)
        and body.get("resourceType") == "Parameters"
        and (kind != "Parameters" or _names(body) & set(_PARAMETERS))
    ):
        resource, body_mode, body_profile = _from_parameters(body)
    mode = _one("mode", mode, body_mode)
    profile = _one("profile", profile, body_profile)
    if mode is not None and mode not in MODES:
        raise _bad(
            "mode",
            f"mode must be one of {', '.join(MODES)}",
            value=mode[:40],
            allowed=" | ".join(MODES),
        )
    if profile is not None and not profile.strip():
        raise _bad("profile", "profile is a canonical URL, not empty")
    if resource is None:
        raise _bad("resource", "the Parameters body has no resource parameter to validate")
    return ValidateInput(resource, mode, profile)


def _names(body: dict[str, Any]) -> set[str]:
    parameters = body.get("parameter")
    if not isinstance(parameters, list):
        return set()
    return {str(p.get("name")) for p in parameters if isinstance(p, dict)}


def _from_parameters(body: dict[str, Any]) -> tuple[Any, str | None, str | None]:
    resource: Any = None
    mode = profile = None
    parameters = body.get("parameter")
    if not isinstance(parameters, list):
        raise _bad("Parameters.parameter", "Parameters.parameter must be a JSON array")
    for i, parameter in enumerate(parameters):
        where = f"Parameters.parameter[{i}]"
        name = parameter.get("name") if isinstance(parameter, dict) else None
        if name not in _PARAMETERS:
            raise _bad(
                f"{where}.name",
                "$validate takes the parameters resource, mode and profile",
                value=str(name)[:40] if name is not None else None,
                allowed=", ".join(_PARAMETERS),
            )
        assert isinstance(parameter, dict)
        if name == "resource":
            if resource is not None:
                raise _bad(where, "resource is given more than once")
            resource = parameter.get("resource")
            if not isinstance(resource, dict):
                raise _bad(f"{where}.resource", "the resource parameter holds a resource")
        elif name == "mode":
            mode = _text(parameter, where, "valueCode")
        else:
            profile = _text(parameter, where, "valueUri", "valueCanonical")
    return resource, mode, profile


def _text(parameter: dict[str, Any], where: str, *names: str) -> str:
    for name in names:
        value = parameter.get(name)
        if isinstance(value, str):
            return value
    raise _bad(where, f"{parameter.get('name')} needs {' or '.join(names)} (a JSON string)")


def mode_findings(mode: str | None, kind: str) -> list[Finding]:
    """What mode asks: whether the resource would be accepted as a create, update or
    delete here. The FHIR API is read-only (records are written through POST /notes), so
    none would be; the answer says so instead of passing the content as if it would."""
    if mode is None:
        return []
    return [
        Finding(
            severity=Severity.ERROR,
            code="validate-mode-not-accepted",
            location="mode",
            message=f"this server does not {mode} {kind} resources through the FHIR API "
            "(records are written through POST /notes), so the content would not be "
            f"accepted as a {mode}",
            rule=_RULE + ": mode checks the content would be acceptable as that interaction",
            value=mode,
            issue_type="not-supported",
        )
    ]
