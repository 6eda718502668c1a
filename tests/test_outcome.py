"""Findings and errors as OperationOutcome (FHIR R4), valid by the independent checker."""

from __future__ import annotations

import json

import pytest

from capnote.errors import ConflictError, InputError, NotFoundError, PolicyError, UnavailableError
from capnote.fhir.outcome import error_outcome, incident_outcome, outcome
from capnote.policy import Policy
from capnote.rules import Context, check_payload
from tests.conftest import EXAMPLES, NOW, routine
from tests.fhir_r4_check import r4_problems


def test_each_finding_names_field_value_rule_range_and_source(policy: Policy) -> None:
    _, found = check_payload(
        (EXAMPLES / "invalid" / "energy-beyond-device.json").read_text(), Context(policy, NOW)
    )
    report = outcome(found)
    assert r4_problems(report) == []
    [issue] = [i for i in report["issue"] if i["severity"] == "error"]
    assert issue["code"] == "value"
    assert issue["expression"] == ["laser.series[0].energy_mj"]
    assert issue["details"]["coding"][0]["code"] == "out-of-range"
    for words in ("value: 25", "allowed: > 0 and <= 10 mJ", "rule:", "source: from memory"):
        assert words in issue["diagnostics"]


def test_warnings_come_back_as_warnings(policy: Policy) -> None:
    data = routine()
    data["plan"]["rd_warning_given"] = False
    _, found = check_payload(json.dumps(data), Context(policy, NOW))
    report = outcome(found)
    assert [(i["severity"], i["code"]) for i in report["issue"]] == [("warning", "business-rule")]


def test_no_findings_is_one_information_issue() -> None:
    report = outcome([])
    assert r4_problems(report) == []
    assert report["issue"][0]["severity"] == "information"


@pytest.mark.parametrize(
    ("error", "code"),
    [
        (NotFoundError("no note LN-1"), "not-found"),
        (ConflictError("taken"), "conflict"),
        (PolicyError("bad file"), "invalid"),
        (UnavailableError("database down"), "transient"),
    ],
)
def test_errors_map_to_their_issue_type(error: Exception, code: str) -> None:
    report = error_outcome(error)  # type: ignore[arg-type]
    assert r4_problems(report) == []
    assert report["issue"][0]["code"] == code


def test_input_error_lists_its_findings(policy: Policy) -> None:
    _, found = check_payload("{}", Context(policy, NOW))
    report = error_outcome(InputError("note refused", found))
    assert len(report["issue"]) == len(found) > 5
    assert all(i["code"] == "required" for i in report["issue"])


def test_incident_outcome_says_nothing_but_the_id() -> None:
    incident, report = incident_outcome()
    assert r4_problems(report) == []
    assert report["issue"][0]["diagnostics"].endswith(f"(incident {incident})")
