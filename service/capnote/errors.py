"""The one exception tree of capnote.

    CapnoteError             (500, exception)   base; never raised bare
    ├── InputError           (422, invalid)     a payload capnote cannot accept; has findings
    │   └── SearchError      (400, invalid)     a search parameter capnote does not apply
    ├── NotFoundError        (404, not-found)   no such record
    ├── ConflictError        (409, conflict)    same identifier, different content
    ├── PreconditionError    (412, conflict)    If-Match names a version that is not the latest
    ├── PreconditionRequiredError (428, required)  an amend or void without If-Match
    ├── AuthenticationError  (401, login)       no token, or one capnote does not know
    ├── ForbiddenError       (403, forbidden)   the token's role may not do this
    ├── PayloadError         (413/415, ...)     a body too large or of the wrong media type
    ├── PolicyError          (500, invalid)     the site policy file is unusable
    ├── UsageError           (400, invalid)     a command-line input or output it cannot use
    ├── ConfigurationError   (500, invalid)     a setting names what capnote cannot use (exit 2)
    ├── EmissionError        (500, exception)   emitted FHIR broke a required binding (a bug)
    └── UnavailableError     (503, transient)   a dependency (database, receiver) is down

Each class carries a stable code, the HTTP status and the FHIR issue type, so that the one
mapping to OperationOutcome (capnote.fhir.outcome) needs no per-class branches. Messages
never contain patient data: they name fields and rules, not what a patient's record holds.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, ClassVar

if TYPE_CHECKING:
    from capnote.findings import Finding


class CapnoteError(Exception):
    """Base of every error capnote raises on purpose."""

    code: ClassVar[str] = "internal"
    http_status: ClassVar[int] = 500
    issue_type: ClassVar[str] = "exception"

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.message = message


class InputError(CapnoteError):
    """The payload breaks the contract or a blocking rule; the findings say where."""

    code = "input-invalid"
    http_status = 422
    issue_type = "invalid"

    def __init__(self, message: str, findings: Sequence[Finding]) -> None:
        super().__init__(message)
        self.findings = tuple(findings)


class SearchError(InputError):
    """A FHIR search with a parameter capnote does not support, or a value it cannot take:
    400, as FHIR R4 search answers a search it cannot run."""

    code = "search-invalid"
    http_status = 400


class NotFoundError(CapnoteError):
    """The record asked for does not exist."""

    code = "not-found"
    http_status = 404
    issue_type = "not-found"


class ConflictError(CapnoteError):
    """The identifier is taken by different content."""

    code = "conflict"
    http_status = 409
    issue_type = "conflict"


class PreconditionError(CapnoteError):
    """If-Match names a version that is no longer the latest."""

    code = "version-conflict"
    http_status = 412
    issue_type = "conflict"


class PreconditionRequiredError(CapnoteError):
    """An amend or a void came without If-Match: without it the last writer would win
    silently over a change the sender never saw."""

    code = "if-match-required"
    http_status = 428
    issue_type = "required"


class AuthenticationError(CapnoteError):
    """No bearer token, or one that is unknown or revoked."""

    code = "unauthenticated"
    http_status = 401
    issue_type = "login"


class ForbiddenError(CapnoteError):
    """The token's role does not allow this."""

    code = "forbidden"
    http_status = 403
    issue_type = "forbidden"


class PayloadError(CapnoteError):
    """A body capnote will not read: too large (413) or not JSON (415)."""

    code = "payload-refused"
    issue_type = "too-costly"

    def __init__(self, message: str, http_status: int, issue_type: str) -> None:
        super().__init__(message)
        self.http_status = http_status  # type: ignore[misc]
        self.issue_type = issue_type  # type: ignore[misc]


class PolicyError(CapnoteError):
    """The site policy cannot be read or breaks the policy schema."""

    code = "policy-invalid"
    http_status = 500
    issue_type = "invalid"


class UsageError(CapnoteError):
    """The command line names an input or output capnote cannot use (exit 2)."""

    code = "usage"
    http_status = 400
    issue_type = "invalid"


class ConfigurationError(CapnoteError):
    """A setting names something capnote cannot use: a database URL of an unsupported kind,
    a folder that is missing or read-only, a server that cannot be reached (exit 2)."""

    code = "configuration"
    http_status = 500
    issue_type = "invalid"


class EmissionError(CapnoteError):
    """A Bundle about to leave breaks a required binding: a bug in capnote, never sent."""

    code = "emission-invalid"


class UnavailableError(CapnoteError):
    """A dependency is down; the caller may retry."""

    code = "unavailable"
    http_status = 503
    issue_type = "transient"
