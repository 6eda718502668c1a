"""FHIR searches and the HTTP rules over a real network: one `capnote serve` process per
engine (a real SQLite file, a real PostgreSQL), notes posted as an EHR would post them.

The expected behaviour is FHIR R4's: search (http://hl7.org/fhir/R4/search.html) for
parameters, prefixes, partial dates, OR and AND, escaping, _count, _summary, _total, _sort,
POST _search and "Handling errors"; the RESTful API (http://hl7.org/fhir/R4/http.html) for
Last-Modified, HEAD, 405, 406 and Prefer: return. HTTP semantics from RFC 9110 (HEAD 9.3.2,
405 and Allow 15.5.6 and 10.2.1, 406 15.5.7, Last-Modified 8.8.2)."""

from __future__ import annotations

import copy
import os
import re
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from email.utils import parsedate_to_datetime
from typing import Any
from urllib.parse import parse_qsl, urlencode, urlsplit

import httpx
import pytest

from tests.conftest import routine
from tests.fhir_r4_check import r4_problems
from tests.test_http_server import server, token

MRN = "https://harbourside-eye.example/fhir/sid/mrn"
NOTE_SYSTEM = "https://harbourside-eye.example/fhir/sid/laser-note"
LOINC_IOP_RIGHT = "http://loinc.org|79892-6"  # LOINC 79892-6: IOP right eye
TYPES = (
    "Procedure",
    "Observation",
    "ServiceRequest",
    "MedicationAdministration",
    "MedicationRequest",
)
DATE_PARAM = {
    "Procedure": "date",
    "Observation": "date",
    "ServiceRequest": "occurrence",
    "MedicationAdministration": "effective-time",
    "MedicationRequest": "authoredon",
}
_MOMENT = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}[+-]\d{2}:\d{2}$")


def shifted(node: Any, by: timedelta) -> Any:
    """A copy of a note with every date-time moved by the same amount (dates stay)."""
    if isinstance(node, dict):
        return {k: shifted(v, by) for k, v in node.items()}
    if isinstance(node, list):
        return [shifted(v, by) for v in node]
    if isinstance(node, str) and _MOMENT.match(node):
        return (datetime.fromisoformat(node) + by).isoformat()
    return node


def note(number: str, patient: str, eye: str, start: str) -> dict[str, Any]:
    """The routine demo note as another session: its identifier, patient, eye and start."""
    base = routine()
    moved = shifted(
        base, datetime.fromisoformat(start) - datetime.fromisoformat(base["started_at"])
    )
    moved = copy.deepcopy(moved)
    moved["note_id"]["value"] = number
    moved["patient"]["value"] = patient
    moved["eye"] = eye
    return moved


# The sessions of the search tests: (label, identifier, patient, eye, start).
SESSIONS = (
    ("oct05", "LN-S-1", "P-T1", "right", "2026-10-05T10:05:00+00:00"),
    ("nov02a", "LN-S-2", "P-T1", "right", "2026-11-02T10:05:00+00:00"),
    ("nov02b", "LN-S-3", "P-T1", "left", "2026-11-02T14:05:00+00:00"),
    ("nov16", "LN,S|4$", "P-T1", "right", "2026-11-16T10:05:00+00:00"),  # needs escaping
    ("nov09", "LN-S-5", "P-T2", "right", "2026-11-09T10:05:00+00:00"),
)


class Fhir:
    """A running server with a reader's and a submitter's token, and what was posted."""

    def __init__(self, base: str, read: str, write: str) -> None:
        self.base = base
        self.client = httpx.Client(base_url=base, timeout=30)
        self.read = {"authorization": f"Bearer {read}"}
        self.write = {"authorization": f"Bearer {write}", "content-type": "application/json"}
        self.keys: dict[str, str] = {}

    def get(self, url: str, params: Any = None, **headers: str) -> httpx.Response:
        return self.client.get(url, params=params, headers={**self.read, **headers})

    def search(self, kind: str, params: Any = None, **headers: str) -> dict[str, Any]:
        r = self.get(f"/fhir/{kind}", params, **headers)
        assert r.status_code == 200, r.text
        bundle: dict[str, Any] = r.json()
        return bundle

    def post_note(self, body: dict[str, Any], **headers: str) -> httpx.Response:
        return self.client.post("/notes", json=body, headers={**self.write, **headers})


@pytest.fixture(scope="module", params=["sqlite", "postgres"])
def fhir(
    request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[Fhir]:
    workdir = tmp_path_factory.mktemp(f"search-{request.param}")
    if request.param == "sqlite":
        url = f"sqlite:///{workdir / 'capnote.sqlite3'}"
    else:
        url = request.getfixturevalue("postgres_cluster").fresh_database("capnote_search")
    os.environ["CAPNOTE_PATIENT_ID_SYSTEM"] = MRN  # read by the server process at start
    try:
        with server(url, workdir) as base:
            api = Fhir(base, token(url, "analyst"), token(url, "submitter"))
            for label, number, patient, eye, start in SESSIONS:
                r = api.post_note(note(number, patient, eye, start))
                assert r.status_code == 201, r.text
                api.keys[label] = r.json()["id"]
            yield api
            api.client.close()
    finally:
        del os.environ["CAPNOTE_PATIENT_ID_SYSTEM"]


def labels(api: Fhir, bundle: dict[str, Any]) -> set[str]:
    """The sessions (labels) whose resources a searchset holds."""
    by_key = {key: label for label, key in api.keys.items()}
    return {by_key[e["resource"]["id"][:36]] for e in matches(bundle)}


def matches(bundle: dict[str, Any]) -> list[dict[str, Any]]:
    return [e for e in bundle.get("entry", []) if e["search"]["mode"] == "match"]


def of_patients(params: dict[str, str] | list[tuple[str, str]]) -> list[tuple[str, str]]:
    """Search parameters limited to the patients of these tests (other modules' notes
    never share this server, but the limit makes each expectation explicit)."""
    pairs = list(params.items()) if isinstance(params, dict) else list(params)
    return [("patient", "P-T1,P-T2"), *pairs]


def self_query(bundle: dict[str, Any]) -> list[tuple[str, str]]:
    link = next(link for link in bundle["link"] if link["relation"] == "self")
    return parse_qsl(urlsplit(link["url"]).query)


# --- parameters the server does not apply ---------------------------------------------------


@pytest.mark.parametrize(
    "name",
    ["occurence", "bodysite", "status:text", "subject:missing", "_elements", "_page", "performer"],
)
def test_a_parameter_not_applied_is_refused_with_the_supported_ones(fhir: Fhir, name: str) -> None:
    r = fhir.get("/fhir/Procedure", {name: "x"})
    assert r.status_code == 400
    [issue] = r.json()["issue"]
    assert r4_problems(r.json()) == []
    assert issue["expression"] == [name]
    assert name in issue["diagnostics"]
    for supported in ("patient", "patient:identifier", "_lastUpdated", "date", "_count"):
        assert supported in issue["diagnostics"]


def test_prefer_handling_strict_is_the_default_and_lenient_ignores(fhir: Fhir) -> None:
    strict = fhir.get("/fhir/Procedure", {"occurence": "ge2030-01-01"}, prefer="handling=strict")
    assert strict.status_code == 400
    everything = fhir.search("Procedure", of_patients({}))
    asked = of_patients([("occurence", "ge2030-01-01"), ("date", "ge2026-11-01")])
    lenient = fhir.search("Procedure", asked, prefer="handling=lenient")
    # Only what was applied is in the self link; what was left out is said in an outcome.
    assert self_query(lenient) == of_patients([("date", "ge2026-11-01")])
    assert labels(fhir, lenient) == {"nov02a", "nov02b", "nov16", "nov09"}
    assert everything["total"] == 5
    [said] = [e for e in lenient["entry"] if e["search"]["mode"] == "outcome"]
    assert "occurence" in said["resource"]["issue"][0]["diagnostics"]
    assert r4_problems(lenient) == []


# --- patient, subject, identifier, _id, _lastUpdated, status -------------------------------


@pytest.mark.parametrize(
    ("params", "expected"),
    [
        ({"patient": "Patient/P-T1"}, {"oct05", "nov02a", "nov02b", "nov16"}),
        ({"patient": "P-T1"}, {"oct05", "nov02a", "nov02b", "nov16"}),
        ({"subject": "Patient/P-T2"}, {"nov09"}),
        ({"patient:identifier": f"{MRN}|P-T2"}, {"nov09"}),
        ({"subject:identifier": f"{MRN}|P-T2"}, {"nov09"}),
        ({"patient:identifier": "https://elsewhere.example/mrn|P-T2"}, set()),
        ({"patient": "P-T1,P-T2"}, {"oct05", "nov02a", "nov02b", "nov16", "nov09"}),
        ([("patient", "P-T1"), ("patient", "P-T2")], set()),  # repeated: AND
        ({"subject": "Group/P-T1"}, set()),  # no capnote resource has a Group as subject
        ({"identifier": f"{NOTE_SYSTEM}|LN-S-2"}, {"nov02a"}),
        ({"identifier": f"{NOTE_SYSTEM}|LN-S-2,{NOTE_SYSTEM}|LN-S-5"}, {"nov02a", "nov09"}),
        ({"identifier": "LN-S-5"}, {"nov09"}),  # a value alone: any system
        ({"identifier": "|LN-S-5"}, set()),  # "|value": an identifier without a system
        # FHIR escaping: the identifier value is "LN,S|4$"
        ({"identifier": f"{NOTE_SYSTEM}|LN\\,S\\|4\\$"}, {"nov16"}),
        ({"identifier": f"{NOTE_SYSTEM}|LN,S|4$"}, set()),
        ({"status": "completed"}, {"oct05", "nov02a", "nov02b", "nov16", "nov09"}),
        (
            {"status": "http://hl7.org/fhir/event-status|completed"},
            {"oct05", "nov02a"} | {"nov02b", "nov16", "nov09"},
        ),
        ({"status": "http://hl7.org/fhir/request-status|completed"}, set()),
        ({"status:not": "completed"}, set()),
        ({"status": "in-progress"}, set()),
        ({"eye": "left"}, {"nov02b"}),
        ({"eye": "right,left"}, {"oct05", "nov02a", "nov02b", "nov16", "nov09"}),
        ({"_lastUpdated": "gt2100-01-01"}, set()),
        ({"_lastUpdated": "lt2000"}, set()),
    ],
)
def test_each_parameter_narrows_as_asked(
    fhir: Fhir, params: dict[str, str] | list[tuple[str, str]], expected: set[str]
) -> None:
    pairs = list(params.items()) if isinstance(params, dict) else params
    scoped = any(n.startswith(("patient", "subject")) for n, _ in pairs)
    bundle = fhir.search("Procedure", pairs if scoped else of_patients(pairs))
    assert labels(fhir, bundle) == expected
    assert bundle["total"] == len(expected)


def test_id_and_last_updated(fhir: Fhir) -> None:
    one = fhir.keys["nov02a"]
    assert labels(fhir, fhir.search("Procedure", {"_id": one})) == {"nov02a"}
    both = f"{one},{fhir.keys['nov09']}"
    assert labels(fhir, fhir.search("Procedure", {"_id": both})) == {"nov02a", "nov09"}
    assert fhir.search("Procedure", {"_id": "not-an-id"})["total"] == 0
    # Recorded moments ago: within today (UTC) and the day before, never in the future.
    yesterday = (datetime.now(UTC) - timedelta(days=1)).date().isoformat()
    recent = fhir.search("Procedure", of_patients({"_lastUpdated": f"ge{yesterday}"}))
    assert recent["total"] == 5


def test_a_patient_reference_to_another_type_or_server_is_refused(fhir: Fhir) -> None:
    for value in ("Practitioner/1", "https://ehr.example/fhir/Patient/P-T1"):
        r = fhir.get("/fhir/Procedure", {"patient": value})
        assert r.status_code == 400
        assert r.json()["issue"][0]["expression"] == ["patient"]
        assert value not in r.text  # a reference can identify a patient: never echoed


# --- dates: every prefix, partial dates, OR and AND ----------------------------------------


@pytest.mark.parametrize(
    ("value", "expected"),
    [
        # The Procedure's performed period is 10:05 to 10:15 (14:05 to 14:15 for nov02b).
        ("2026", {"oct05", "nov02a", "nov02b", "nov16", "nov09"}),
        ("2026-11", {"nov02a", "nov02b", "nov16", "nov09"}),
        ("eq2026-10-05", {"oct05"}),
        ("ne2026-11", {"oct05"}),
        ("gt2026-11-02", {"nov09", "nov16"}),
        ("lt2026-11-02", {"oct05"}),
        ("ge2026-11-02", {"nov02a", "nov02b", "nov09", "nov16"}),
        ("le2026-11-02", {"oct05", "nov02a", "nov02b"}),
        ("sa2026-11-02", {"nov09", "nov16"}),
        ("eb2026-11-09", {"oct05", "nov02a", "nov02b"}),
        ("ge2026-11-02T12:00:00Z", {"nov02b", "nov09", "nov16"}),
        ("lt2026-11-02T14:05:00+00:00", {"oct05", "nov02a"}),
        # A minute cannot contain a ten-minute period (eq means "contains" in R4) ...
        ("eq2026-11-02T10:05Z", set()),
        # "starts after" the minute 10:04: nov02a's period starts at 10:05.
        ("sa2026-11-02T10:04Z", {"nov02a", "nov02b", "nov09", "nov16"}),
        ("eb2026-11-02T10:15Z", {"oct05"}),  # nov02a ends at 10:15:00, inside that minute
        ("2026-10-05,2026-11-16", {"oct05", "nov16"}),
        ("2027", set()),
    ],
)
def test_procedure_dates(fhir: Fhir, value: str, expected: set[str]) -> None:
    bundle = fhir.search("Procedure", of_patients({"date": value}))
    assert labels(fhir, bundle) == expected


def test_repeated_dates_and(fhir: Fhir) -> None:
    pairs = of_patients([("date", "ge2026-11-01"), ("date", "lt2026-11-10")])
    assert labels(fhir, fhir.search("Procedure", pairs)) == {"nov02a", "nov02b", "nov09"}


def test_approximately(fhir: Fhir) -> None:
    # ap widens the value by a tenth of its distance from now (capnote's choice, which R4
    # leaves to the server): it takes the day itself, not sessions weeks away.
    found = labels(fhir, fhir.search("Procedure", of_patients({"date": "ap2026-11-09"})))
    assert "nov09" in found
    assert "oct05" not in found


@pytest.mark.parametrize(
    ("value", "name"),
    [
        ("2026-02-30", "date"),
        ("2026-13", "date"),
        ("26-11-02", "date"),
        ("ge2026-11-02T10:00", "date"),
    ],
)
def test_a_date_that_cannot_be_read_is_refused(fhir: Fhir, value: str, name: str) -> None:
    r = fhir.get("/fhir/Procedure", {name: value})
    assert r.status_code == 400
    assert r.json()["issue"][0]["expression"] == [name]


# --- the searches users asked for ------------------------------------------------------------


def test_the_iop_course_of_one_eye(fhir: Fhir) -> None:
    params = [
        ("patient", "Patient/P-T1"),
        ("code", LOINC_IOP_RIGHT),
        ("eye", "right"),
        ("date", "ge2026-10"),
        ("_sort", "date"),
    ]
    bundle = fhir.search("Observation", params)
    times = [e["resource"]["effectiveDateTime"] for e in matches(bundle)]
    # Before and after the laser in each of the three right-eye sessions of P-T1.
    assert len(times) == 6
    assert times == sorted(times)
    assert labels(fhir, bundle) == {"oct05", "nov02a", "nov16"}
    for entry in matches(bundle):
        codes = {(c["system"], c["code"]) for c in entry["resource"]["code"]["coding"]}
        assert ("http://loinc.org", "79892-6") in codes
    newest_first = fhir.search("Observation", [*params[:-1], ("_sort", "-date")])
    assert [e["resource"]["effectiveDateTime"] for e in matches(newest_first)] == times[::-1]
    left = fhir.search(
        "Observation", [("patient", "P-T1"), ("code", LOINC_IOP_RIGHT), ("eye", "left")]
    )
    assert left["total"] == 0
    # code alone: any system; "|code": a coding without a system (none here)
    any_system = fhir.search("Observation", of_patients({"code": "79892-6"}))
    assert any_system["total"] == 8  # two readings in each of the four right-eye sessions
    assert fhir.search("Observation", of_patients({"code": "|79892-6"}))["total"] == 0
    # "system|" (any code of a system) is refused rather than read as every token
    r = fhir.get("/fhir/Observation", {"code": "http://loinc.org|"})
    assert r.status_code == 400
    assert r.json()["issue"][0]["expression"] == ["code"]


def test_medications_by_patient(fhir: Fhir) -> None:
    given = fhir.search("MedicationAdministration", {"patient": "Patient/P-T1"})
    # apraclonidine before and after the laser (timing "both") in each of four sessions
    assert given["total"] == 8
    assert labels(fhir, given) == {"oct05", "nov02a", "nov02b", "nov16"}
    home = fhir.search("MedicationRequest", {"patient": "Patient/P-T2"})
    assert labels(fhir, home) == {"nov09"}
    assert home["total"] == 1
    assert r4_problems(given) == []
    assert r4_problems(home) == []


def test_every_declared_parameter_is_applied(fhir: Fhir) -> None:
    """The CapabilityStatement lists exactly what works: each declared parameter, given a
    value nothing has, finds nothing, where the same search without it finds something."""
    statement = fhir.client.get("/fhir/metadata").json()
    assert r4_problems(statement) == []
    nothing = {
        "_id": "00000000-0000-0000-0000-000000000000",
        "_lastUpdated": "gt2100-01-01",
        "identifier": "urn:x|none",
        "patient": "Patient/NOBODY",
        "patient:identifier": "urn:x|none",
        "subject": "Patient/NOBODY",
        "subject:identifier": "urn:x|none",
        "status": "unknown",
        "code": "urn:x|none",
    }
    for resource in statement["rest"][0]["resource"]:
        kind = resource["type"]
        if kind == "Bundle":
            assert "searchParam" not in resource
            continue
        if kind not in DATE_PARAM:  # Provenance, AuditEvent, the conformance resources
            continue
        unfiltered = fhir.search(kind, of_patients({}))
        assert unfiltered["total"] > 0
        assert r4_problems(unfiltered) == []
        declared = [p["name"] for p in resource["searchParam"]]
        assert DATE_PARAM[kind] in declared
        for name in declared:
            if name == "eye":
                halves = [
                    fhir.search(kind, of_patients({"eye": e}))["total"] for e in ("right", "left")
                ]
                assert sum(halves) == unfiltered["total"]
                assert all(halves)
                continue
            value = nothing.get(name, "gt2100-01-01")  # the rest are the date parameters
            params = (
                [(name, value)]
                if name.startswith(("patient", "subject"))
                else of_patients({name: value})
            )
            assert fhir.search(kind, params)["total"] == 0, (kind, name)


# --- the shape of the result: _count, _summary, _total, paging ------------------------------


def test_count_is_clamped_and_zero_counts(fhir: Fhir) -> None:
    big = fhir.search("Observation", of_patients({"_count": "100000"}))
    assert ("_count", "200") in self_query(big)
    assert len(matches(big)) == min(big["total"], 200)
    for shape in ({"_count": "0"}, {"_summary": "count"}):
        counted = fhir.search("Observation", of_patients(shape))
        assert counted["total"] == big["total"]
        assert "entry" not in counted
        assert [link["relation"] for link in counted["link"]] == ["self"]
    untotalled = fhir.search("Observation", of_patients({"_total": "none", "_count": "2"}))
    assert "total" not in untotalled
    assert len(matches(untotalled)) == 2
    assert fhir.get("/fhir/Observation", {"_count": "-1"}).status_code == 400


def follow(fhir: Fhir, bundle: dict[str, Any], posted: str | None = None) -> dict[str, Any] | None:
    link = next((link for link in bundle["link"] if link["relation"] == "next"), None)
    if link is None:
        return None
    if posted is None:
        r = fhir.client.get(link["url"], headers=fhir.read)
    else:
        headers = {**fhir.read, "content-type": "application/x-www-form-urlencoded"}
        r = fhir.client.post(link["url"], content=posted, headers=headers)
    assert r.status_code == 200, r.text
    page: dict[str, Any] = r.json()
    return page


def test_paging_is_stable_while_earlier_notes_are_written(fhir: Fhir) -> None:
    ten = [
        note(f"LN-P-{i}", "P-T3", "right", f"2026-11-{10 + i:02d}T09:00:00+00:00")
        for i in range(10)
    ]
    ten_keys = []
    for body in ten:
        r = fhir.post_note(body)
        assert r.status_code == 201
        ten_keys.append(r.json()["id"])
    first = fhir.search("Procedure", {"patient": "P-T3", "_count": "3"})
    assert first["total"] == 10
    seen = [e["resource"]["id"] for e in matches(first)]
    # Five earlier sessions of the same eye arrive between pages (their totals recount the
    # later sessions, which get new versions).
    for i in range(5):
        body = note(f"LN-P-early-{i}", "P-T3", "right", f"2026-10-{10 + i:02d}T09:00:00+00:00")
        assert fhir.post_note(body).status_code == 201
    page: dict[str, Any] | None = first
    while (page := follow(fhir, page)) is not None:
        seen += [e["resource"]["id"] for e in matches(page)]
        # A later page's self link names that page: the cursor it was reached with.
        assert any(name == "_cursor" for name, _value in self_query(page))
    assert len(seen) == len(set(seen)) == 10  # no repeats, no gaps
    assert seen == ten_keys  # in session order, each once
    assert fhir.search("Procedure", {"patient": "P-T3", "_summary": "count"})["total"] == 15
    # Newest first, page by page: every session once, in descending order.
    page = fhir.search("Procedure", {"patient": "P-T3", "_count": "4", "_sort": "-date"})
    starts = []
    while page is not None:
        starts += [e["resource"]["performedPeriod"]["start"] for e in matches(page)]
        page = follow(fhir, page)
    assert len(starts) == len(set(starts)) == 15
    assert starts == sorted(starts, reverse=True)


def test_post_search_keeps_identifiers_out_of_urls(fhir: Fhir) -> None:
    body = urlencode({"patient:identifier": f"{MRN}|P-T1", "_count": "2", "date": "ge2026-11"})
    headers = {**fhir.read, "content-type": "application/x-www-form-urlencoded"}
    r = fhir.client.post("/fhir/Procedure/_search", content=body, headers=headers)
    assert r.status_code == 200, r.text
    first = r.json()
    assert first["total"] == 3
    for link in first["link"]:
        assert "P-T1" not in link["url"]
        assert link["url"].startswith(f"{fhir.base}/fhir/Procedure/_search")
    second = follow(fhir, first, posted=body)
    assert second is not None
    assert labels(fhir, first) | labels(fhir, second) == {"nov02a", "nov02b", "nov16"}
    assert (
        fhir.client.post(
            "/fhir/Procedure/_search", json={"patient": "P-T1"}, headers=fhir.read
        ).status_code
        == 415
    )


# --- the HTTP rules ------------------------------------------------------------------------


def test_last_modified_on_every_read(fhir: Fhir) -> None:
    key = fhir.keys["nov09"]
    for url in (
        f"/fhir/Procedure/{key}",
        f"/fhir/Procedure/{key}/_history/1",
        f"/fhir/Procedure/{key}/_history",
        f"/fhir/Observation/{key}-iop-before",
    ):
        r = fhir.get(url)
        assert r.status_code == 200
        body = r.json()
        meta = (body["entry"][0]["resource"] if body["resourceType"] == "Bundle" else body)["meta"]
        recorded = datetime.fromisoformat(meta["lastUpdated"]).replace(microsecond=0)
        assert parsedate_to_datetime(r.headers["last-modified"]) == recorded
    r = fhir.client.get(f"/notes/{key}", headers=fhir.read)
    recorded = datetime.fromisoformat(r.json()["recorded_at"]).replace(microsecond=0)
    assert parsedate_to_datetime(r.headers["last-modified"]) == recorded


def test_head_is_get_without_a_body(fhir: Fhir) -> None:
    key = fhir.keys["nov09"]
    for url in (
        f"/fhir/Procedure/{key}",
        "/fhir/Procedure?patient=P-T2",
        "/fhir/metadata",
        f"/notes/{key}",
    ):
        got = fhir.client.get(url, headers=fhir.read)
        head = fhir.client.head(url, headers=fhir.read)
        assert head.status_code == got.status_code == 200
        assert head.content == b""
        for name in ("content-type", "content-length", "etag", "last-modified"):
            assert head.headers.get(name) == got.headers.get(name), (url, name)
    assert fhir.client.head("/fhir/Procedure/x", headers=fhir.read).status_code == 404


@pytest.mark.parametrize(
    ("method", "url", "allow"),
    [
        ("DELETE", "/fhir/Procedure/{key}", "GET, HEAD"),
        ("PUT", "/fhir/Procedure/{key}", "GET, HEAD"),
        ("POST", "/fhir/Procedure", "GET, HEAD"),
        ("GET", "/fhir/Procedure/$validate", None),  # a read of an id that cannot exist
        ("DELETE", "/notes/{key}", "GET, HEAD, PUT"),
        ("PATCH", "/notes", "GET, HEAD, POST"),
    ],
)
def test_405_names_the_methods_allowed(
    fhir: Fhir, method: str, url: str, allow: str | None
) -> None:
    r = fhir.client.request(method, url.format(key=fhir.keys["nov09"]), headers=fhir.read)
    if allow is None:
        assert r.status_code == 404
        return
    assert r.status_code == 405
    assert r.headers["allow"] == allow
    assert r.json()["resourceType"] == "OperationOutcome"


@pytest.mark.parametrize(
    ("params", "accept", "status"),
    [
        ({"_format": "xml"}, None, 406),
        ({"_format": "application/fhir+xml"}, None, 406),
        ({}, "application/fhir+xml", 406),
        ({}, "application/xml, text/xml", 406),
        ({}, "application/fhir+json;q=0, application/fhir+xml", 406),
        ({"_format": "json"}, None, 200),
        ({"_format": "application/fhir+json"}, "application/fhir+xml", 200),  # _format wins
        ({}, "application/fhir+xml, application/fhir+json;q=0.5", 200),
        ({}, "*/*", 200),
    ],
)
def test_json_only(fhir: Fhir, params: dict[str, str], accept: str | None, status: int) -> None:
    headers = {} if accept is None else {"accept": accept}
    key = fhir.keys["nov09"]
    for url in (f"/fhir/Procedure/{key}", "/fhir/Procedure", "/fhir/metadata"):
        r = fhir.get(url, params, **headers)
        assert r.status_code == status, (url, r.text)
        if status == 406:
            assert r.json()["resourceType"] == "OperationOutcome"


def test_prefer_return_on_create_and_amend(fhir: Fhir) -> None:
    created = fhir.post_note(
        note("LN-R-1", "P-T4", "left", "2026-11-20T09:00:00+00:00"), prefer="return=minimal"
    )
    assert created.status_code == 201
    assert created.content == b""
    assert created.headers["preference-applied"] == "return=minimal"
    assert created.headers["etag"] == 'W/"1"'
    location = created.headers["location"]
    # The same note again: 200, and as an OperationOutcome of its findings.
    again = fhir.post_note(
        note("LN-R-1", "P-T4", "left", "2026-11-20T09:00:00+00:00"),
        prefer="return=OperationOutcome",
    )
    assert again.status_code == 200
    assert again.headers["content-type"].startswith("application/fhir+json")
    assert again.json()["resourceType"] == "OperationOutcome"
    assert r4_problems(again.json()) == []
    default = fhir.client.get(location, headers=fhir.read).json()
    changed = note("LN-R-1", "P-T4", "left", "2026-11-20T09:00:00+00:00")
    changed["result"]["opening"]["horizontal_mm"] = 4.0
    amend = {"reason": "re-measured", "note": changed}
    amended = fhir.client.put(
        location,
        json=amend,
        headers={**fhir.write, "prefer": "return=representation", "if-match": 'W/"1"'},
    )
    assert amended.status_code == 200
    assert amended.headers["preference-applied"] == "return=representation"
    assert set(amended.json()) == set(default)  # the default answer: the whole version
    assert amended.json()["version"] == 2
    changed["result"]["opening"]["horizontal_mm"] = 4.2
    minimal = fhir.client.put(
        location,
        json=amend | {"note": changed},
        headers={**fhir.write, "prefer": "return=minimal", "if-match": 'W/"2"'},
    )
    assert (minimal.status_code, minimal.content, minimal.headers["etag"]) == (200, b"", 'W/"3"')
    # No preference: the answer is as it always was.
    plain = fhir.post_note(note("LN-R-2", "P-T4", "left", "2026-11-21T09:00:00+00:00"))
    assert plain.status_code == 201
    assert "bundle" in plain.json()
    assert "preference-applied" not in plain.headers


def test_search_results_pass_google_fhir_r4(fhir: Fhir) -> None:
    for kind in TYPES:
        bundle = fhir.search(kind, of_patients({"_count": "200"}))
        assert matches(bundle)
        assert r4_problems(bundle) == []
