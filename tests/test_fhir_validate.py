"""capnote.fhir.validate on hostile and identifying input: a finding, never a crash, and no
patient data echoed."""

from __future__ import annotations

from typing import Any

from capnote.fhir.conformance import MAX_DEPTH
from capnote.fhir.validate import validate_resource


def observation(**extra: Any) -> dict[str, Any]:
    return {"resourceType": "Observation", "status": "final", "code": {"text": "x"}, **extra}


def test_deep_nesting_is_a_finding_not_a_crash() -> None:
    nested: dict[str, Any] = {"url": "http://example.org/x", "valueString": "a"}
    for _ in range(900):  # deeper than Python's recursion limit would allow a naive walk
        nested = {"url": "http://example.org/x", "extension": [nested]}
    found = validate_resource(observation(extension=[nested]))
    assert [f.code for f in found] == ["fhir-too-deep"]
    assert f"{MAX_DEPTH} levels" in found[0].rule


def test_free_text_and_dates_are_not_echoed() -> None:
    # A patient's name or birth date in the wrong shape: the finding says where and which
    # rule, not what the record holds.
    patient = {"resourceType": "Patient", "birthDate": "1950-02-30", "name": [{"text": 7}]}
    found = validate_resource(patient)
    assert {f.location for f in found} == {"Patient.birthDate", "Patient.name[0].text"}
    for finding in found:
        assert "1950" not in finding.message
        assert finding.value in (None, "a JSON number")


def test_every_resource_type_of_r4_is_checked() -> None:
    # Not only the types capnote emits: a Patient's gender is a required binding too.
    found = validate_resource({"resourceType": "Patient", "gender": "m"})
    assert [(f.code, f.location) for f in found] == [
        ("fhir-code-not-in-value-set", "Patient.gender")
    ]
