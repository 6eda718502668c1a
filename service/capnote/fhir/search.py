"""FHIR R4 search parameters read into criteria: what a search asks for, checked, and nothing
the server does not apply.

The rules come from FHIR R4, "Search" (http://hl7.org/fhir/R4/search.html): a parameter the
server does not support is refused unless the client sent ``Prefer: handling=lenient``
(2.1.1.1.1, "Handling errors"), and then the self link shows only what was applied; a
comma separates values that are ORed, a repeated parameter ANDs (2.1.1.1.4); ``\\,``
``\\|`` ``\\$`` and ``\\\\`` escape (2.1.1.1.5); date prefixes eq ne gt lt ge le sa eb ap
compare the range a value's precision implies with the resource's range (2.1.1.5.5,
2.1.1.5.9); tokens are ``code``, ``system|code`` and ``|code`` (2.1.1.5.13; ``system|`` is refused);
``_count``, ``_sort``, ``_total`` and ``_summary=count`` shape the result (3.1.1.5).

This module knows nothing of SQL or HTTP: the store turns Criteria into a statement, the
route passes the parameters and the Prefer header in.
"""

from __future__ import annotations

import base64
import binascii
import re
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta

from capnote.errors import SearchError
from capnote.fhir.readmodel import READABLE, parse_id
from capnote.findings import error_finding

# The date parameter of each type (R4 names) and the element it reads.
DATE_PARAM = {
    "Procedure": "date",
    "Observation": "date",
    "ServiceRequest": "occurrence",
    "MedicationAdministration": "effective-time",
    "MedicationRequest": "authoredon",
}
# The code system of each type's status (R4 value sets event-status, observation-status,
# request-status, medication-admin-status, medicationrequest-status).
STATUS_SYSTEM = {
    "Procedure": "http://hl7.org/fhir/event-status",
    "Observation": "http://hl7.org/fhir/observation-status",
    "ServiceRequest": "http://hl7.org/fhir/request-status",
    "MedicationAdministration": "http://terminology.hl7.org/CodeSystem/medication-admin-status",
    "MedicationRequest": "http://hl7.org/fhir/CodeSystem/medicationrequest-status",
}
EYE_TYPES = ("Procedure", "Observation")
EYES = ("right", "left")
MAX_COUNT = 200
# Bounds on one search: each distinct shape is a statement compiled and kept, so the
# number of parameters and of ORed values is limited (far above what a client needs).
MAX_PARAMS = 30
MAX_VALUES = 50
DEFAULT_COUNT = 50
# Parameters whose values identify a patient or a record: left out of the links of a POST
# search, whose client sent them in the body to keep them out of URLs.
IDENTIFYING = frozenset(
    {"patient", "patient:identifier", "subject", "subject:identifier", "identifier"}
)
_RULE = "FHIR R4 search (http://hl7.org/fhir/R4/search.html)"
_DATE = re.compile(
    r"(eq|ne|gt|lt|ge|le|sa|eb|ap)?"
    r"(\d{4})(?:-(\d{2})(?:-(\d{2})(?:T(\d{2}):(\d{2})(?::(\d{2})(\.\d{1,6})?)?"
    r"(Z|[+-]\d{2}:\d{2})?)?)?)?"
)
_ROLE = re.compile(r"[a-z0-9][a-z0-9-]{0,39}")


def filter_params(kind: str) -> tuple[str, ...]:
    """The filtering parameters of a type, as the CapabilityStatement lists them."""
    names = ["_id", "_lastUpdated", "identifier", "patient", "patient:identifier", "subject"]
    names += ["subject:identifier", "status", "status:not", "code", DATE_PARAM[kind]]
    if kind in EYE_TYPES:
        names.append("eye")
    return tuple(names)


RESULT_PARAMS = ("_count", "_sort", "_total", "_summary", "_format", "_cursor")


def supported(kind: str) -> tuple[str, ...]:
    """Every parameter a search of this type takes."""
    return (*filter_params(kind), *RESULT_PARAMS)


@dataclass(frozen=True, slots=True)
class DateTest:
    """One date value with its prefix: the search range [low, high] (its precision's)."""

    prefix: str
    low: datetime
    high: datetime


@dataclass(frozen=True, slots=True)
class Token:
    """One token value: system None means any system, "" no system."""

    system: str | None
    code: str


@dataclass(frozen=True, slots=True)
class Cursor:
    """Where the next page starts: after this row in the search's order."""

    sort_at: datetime
    note_key: str
    role: str

    def text(self) -> str:
        """The opaque form a next link carries."""
        raw = f"{self.sort_at.isoformat()}|{self.note_key}|{self.role}".encode()
        return base64.urlsafe_b64encode(raw).decode().rstrip("=")


@dataclass(slots=True)
class Criteria:
    """A search of one type, every clause ANDed, each clause's values ORed."""

    kind: str
    patients: list[list[tuple[str, str]]] = field(default_factory=list)
    ids: list[list[tuple[str, str]]] = field(default_factory=list)
    tokens: list[tuple[str, list[Token]]] = field(default_factory=list)
    statuses: list[tuple[bool, list[str]]] = field(default_factory=list)  # (negated, codes)
    eyes: list[list[str]] = field(default_factory=list)
    dates: list[list[DateTest]] = field(default_factory=list)
    updated: list[list[DateTest]] = field(default_factory=list)
    count: int = DEFAULT_COUNT
    count_only: bool = False
    total: bool = True
    descending: bool = False
    cursor: Cursor | None = None
    applied: list[tuple[str, str]] = field(default_factory=list)
    ignored: list[str] = field(default_factory=list)


def _error(
    location: str, message: str, allowed: str | None = None, value: str | None = None
) -> SearchError:
    """A refused search. value is given only for parameters that cannot identify anyone
    (counts, dates, sort orders), never for patient or identifier values."""
    shown = None if value is None else _shown(value)
    finding = error_finding(
        "search-invalid", location, message, _RULE, value=shown, allowed=allowed
    )
    return SearchError(message, [finding])


def _shown(name: str) -> str:
    """A parameter name as an error names it: printable and short."""
    text = "".join(c if c.isprintable() else "?" for c in name)
    return text[:40] + ("..." if len(text) > 40 else "")


def split_escaped(text: str, separator: str) -> list[str]:
    """text split at every separator not escaped by a backslash, escapes kept."""
    parts, current, i = [], [], 0
    while i < len(text):
        char = text[i]
        if char == "\\" and i + 1 < len(text):
            current.append(text[i : i + 2])
            i += 2
            continue
        if char == separator:
            parts.append("".join(current))
            current = []
        else:
            current.append(char)
        i += 1
    parts.append("".join(current))
    return parts


def unescape(text: str) -> str:
    """A value with FHIR's escapes (\\, \\| \\$ \\\\) undone; another backslash stays."""
    return re.sub(r"\\([,|$\\])", r"\1", text)


def parse_date(raw: str, name: str, now: datetime) -> DateTest:
    """A prefixed date, date-time or partial date (2026, 2026-11) as its range in UTC.

    A value without a time zone is taken as UTC, the server's zone for searches."""
    match = _DATE.fullmatch(raw)
    if match is None:
        raise _error(
            name,
            f"{name} must be [prefix]YYYY, YYYY-MM, YYYY-MM-DD or a date-time",
            "prefixes eq ne gt lt ge le sa eb ap; e.g. ge2026-11, lt2026-12-01T09:00:00Z",
            raw,
        )
    prefix = match[1] or "eq"
    year, month, day, hour, _minute, second, fraction, zone = match.groups()[1:]
    try:
        if month is None:
            low = datetime(int(year), 1, 1, tzinfo=UTC)
            high = datetime(int(year) + 1, 1, 1, tzinfo=UTC) if int(year) < 9999 else None
        elif day is None:
            low = datetime(int(year), int(month), 1, tzinfo=UTC)
            nxt = (int(year) + int(month) // 12, int(month) % 12 + 1)
            high = datetime(nxt[0], nxt[1], 1, tzinfo=UTC) if nxt[0] <= 9999 else None
        elif hour is None:
            low = datetime(int(year), int(month), int(day), tzinfo=UTC)
            high = low + timedelta(days=1)
        else:
            if zone is None:
                raise _error(
                    name, f"a date-time in {name} needs a time zone (Z or +hh:mm)", value=raw
                )
            text = raw[len(match[1] or "") :].replace("Z", "+00:00")
            low = datetime.fromisoformat(text).astimezone(UTC)
            # The range a value's precision implies: a minute, a second, a microsecond.
            precision = timedelta(minutes=1) if second is None else timedelta(seconds=1)
            if fraction:
                precision = timedelta(microseconds=1)
            high = low + precision
    except (ValueError, OverflowError) as exc:
        raise _error(name, f"{name} is not a date that exists", value=raw) from exc
    top = (high or datetime.max.replace(tzinfo=UTC)) - timedelta(microseconds=1)
    if prefix == "ap":
        # "approximately": the range widened by a tenth of its distance from now (R4 leaves
        # the amount to the server; 10% is what the specification suggests as an example).
        gap = abs(now - low) / 10
        earliest, latest = datetime.min.replace(tzinfo=UTC), datetime.max.replace(tzinfo=UTC)
        low = low - gap if low - earliest > gap else earliest
        top = top + gap if latest - top > gap else latest
    return DateTest(prefix, low, top)


def _token(raw: str, name: str) -> Token:
    """code, system|code or |code. "system|" (any code of a system) is refused: the token
    rows are found by code, and a search by system alone would read them all."""
    parts = split_escaped(raw, "|")
    if len(parts) == 1:
        return Token(None, unescape(parts[0]))
    system, code = unescape(parts[0]), unescape("|".join(parts[1:]))
    if not code:
        raise _error(
            name, f"{name} needs a code: system| alone is not supported", "code, system|code, |code"
        )
    return Token(system, code)


def _patient_ref(raw: str, name: str, system: str | None) -> tuple[str, str] | None:
    """A patient reference ([Patient/]id) as the identifier it stands for; None when it
    names another type of resource (which no capnote resource has as its subject)."""
    value = unescape(raw)
    if "://" in value:
        raise _error(name, f"{name} takes a relative reference (Patient/[id]) or an id here")
    kind, sep, ident = value.rpartition("/")
    if sep and kind != "Patient":
        if name == "patient":
            raise _error(name, "patient takes a Patient reference", "Patient/[id] or [id]")
        return None
    if not ident:
        raise _error(name, f"{name} is empty")
    if system is None:
        raise _error(
            name,
            f"capnote's resources name their patient by identifier only, and no identifier "
            f"system is set up as the site's Patient id; search {name}:identifier=system|value",
            "set CAPNOTE_PATIENT_ID_SYSTEM to use patient references",
        )
    return system, ident


def _identifier(raw: str, name: str) -> tuple[str, str]:
    token = _token(raw, name)
    if not token.system or not token.code:
        raise _error(name, f"{name} must be system|value", "system|value, both non-empty")
    return token.system, token.code


def _count(raw: str) -> int:
    if not raw.isascii() or not raw.isdigit():
        raise _error("_count", "_count must be a whole number", f"0 to {MAX_COUNT}", raw)
    return min(int(raw), MAX_COUNT)


def _cursor(raw: str) -> Cursor:
    try:
        text = base64.urlsafe_b64decode(raw + "=" * (-len(raw) % 4)).decode()
        at, key, role = text.split("|")
        moment = datetime.fromisoformat(at)
        if moment.tzinfo is None or parse_id(key) is None or not _ROLE.fullmatch(role):
            raise ValueError(role)
    except (ValueError, binascii.Error, UnicodeDecodeError) as exc:
        raise _error("_cursor", "_cursor is not one this server gave in a next link") from exc
    return Cursor(moment.astimezone(UTC), key, role)


def parse_search(
    kind: str,
    pairs: list[tuple[str, str]],
    *,
    lenient: bool,
    patient_id_system: str | None,
    now: datetime,
) -> Criteria:
    """The criteria of a search of kind from its (name, value) parameters, in order.

    SearchError for an unsupported parameter (unless lenient: then it is left out and
    named in ignored) and for a value a supported one cannot take."""
    if kind not in READABLE:
        raise _error("", f"capnote does not search {_shown(kind)}", ", ".join(READABLE))
    found = Criteria(kind)
    allowed = supported(kind)
    date_name = DATE_PARAM[kind]
    if len(pairs) > MAX_PARAMS:
        raise _error("", f"a search takes at most {MAX_PARAMS} parameters", f"<= {MAX_PARAMS}")
    for name, raw in pairs:
        if name not in allowed:
            if lenient:
                found.ignored.append(_shown(name))
                continue
            raise _error(
                _shown(name),
                f"capnote does not support the search parameter {_shown(name)} on {kind}",
                ", ".join(allowed),
            )
        applied = _one(found, name, raw, date_name, patient_id_system, now)
        if applied:
            found.applied.append((name, raw if name != "_count" else str(found.count)))
    return found


def _one(
    found: Criteria,
    name: str,
    raw: str,
    date_name: str,
    patient_id_system: str | None,
    now: datetime,
) -> bool:
    """Apply one parameter to found; False for one that shapes nothing (_format)."""
    values = split_escaped(raw, ",")
    if len(values) > MAX_VALUES:
        raise _error(name, f"{name} takes at most {MAX_VALUES} values", f"<= {MAX_VALUES}")
    kind = found.kind
    if name not in ("_count", "_cursor", "_format") and any(v == "" for v in values):
        raise _error(name, f"{name} has an empty value")
    if name in ("patient:identifier", "subject:identifier"):
        found.patients.append([_identifier(v, name) for v in values])
    elif name in ("patient", "subject"):
        refs = [_patient_ref(v, name, patient_id_system) for v in values]
        found.patients.append([r for r in refs if r is not None])
    elif name == "_id":
        ids = [parse_id(unescape(v)) for v in values]
        found.ids.append([i for i in ids if i is not None])
    elif name in ("identifier", "code"):
        found.tokens.append((name, [_token(v, name) for v in values]))
    elif name in ("status", "status:not"):
        codes = []
        for token in (_token(v, name) for v in values):
            # A status has one system; a value naming another matches nothing.
            if token.code is not None and token.system in (None, STATUS_SYSTEM[kind]):
                codes.append(token.code)
        found.statuses.append((name == "status:not", codes))
    elif name == "eye":
        eyes = [unescape(v) for v in values]
        if any(e not in EYES for e in eyes):
            raise _error("eye", "eye must be right or left", "right, left", raw)
        found.eyes.append(eyes)
    elif name == date_name:
        found.dates.append([parse_date(v, name, now) for v in values])
    elif name == "_lastUpdated":
        found.updated.append([parse_date(v, name, now) for v in values])
    elif name == "_count":
        found.count = _count(raw)
        found.count_only = found.count_only or found.count == 0
    elif name == "_summary":
        if raw != "count":
            raise _error("_summary", "capnote supports only _summary=count", "count", raw)
        found.count_only = True
    elif name == "_total":
        if raw not in ("none", "estimate", "accurate"):
            raise _error("_total", "_total must be one of these", "none, estimate, accurate", raw)
        found.total = raw != "none"
    elif name == "_sort":
        if raw not in (date_name, f"-{date_name}"):
            raise _error(
                "_sort", f"{kind} sorts by {date_name} only", f"{date_name}, -{date_name}", raw
            )
        found.descending = raw.startswith("-")
    elif name == "_cursor":
        found.cursor = _cursor(raw)
        return False
    elif name == "_format":
        return False  # JSON is all there is; anything else was answered 406 before this
    return True
