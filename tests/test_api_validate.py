"""$validate over a real `capnote serve` process on 127.0.0.1 (one for the module): the
standard Parameters body, mode and profile, the 404 for an unknown type, the body limit
and a malformed body (FHIR R4 resource-operation-validate.html, http.html)."""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import Any

import httpx
import pytest

from tests.conftest import ROOT
from tests.fhir_conformance.make_cases import EXAMPLES
from tests.fhir_r4_check import r4_problems
from tests.test_http_server import server, token

GLUCOSE = json.loads((EXAMPLES / "observation-example-f001-glucose.json").read_text())


@pytest.fixture(scope="module")
def http(tmp_path_factory: pytest.TempPathFactory) -> Iterator[httpx.Client]:
    workdir = tmp_path_factory.mktemp("validate")
    url = f"sqlite:///{workdir / 'capnote.sqlite3'}"
    headers = {
        "authorization": f"Bearer {token(url, 'analyst')}",
        "content-type": "application/fhir+json",
    }
    with (
        server(url, workdir) as base,
        httpx.Client(base_url=base, headers=headers, timeout=30) as client,
    ):
        yield client


def validate(http: httpx.Client, kind: str, body: Any, **params: str) -> httpx.Response:
    raw = body if isinstance(body, bytes) else json.dumps(body).encode()
    return http.post(f"/fhir/{kind}/$validate", content=raw, params=params)


def errors(answer: httpx.Response) -> list[dict[str, Any]]:
    assert answer.status_code == 200, answer.text
    outcome = answer.json()
    assert r4_problems(outcome) == []  # the answer itself is valid R4
    return [i for i in outcome["issue"] if i["severity"] in ("error", "fatal")]


def parameters(resource: Any, **values: str) -> dict[str, Any]:
    params: list[dict[str, Any]] = [{"name": "resource", "resource": resource}]
    for name, value in values.items():
        params.append({"name": name, "valueCode" if name == "mode" else "valueUri": value})
    return {"resourceType": "Parameters", "parameter": params}


def test_a_specification_example_has_no_errors_as_body_or_parameter(http: httpx.Client) -> None:
    assert errors(validate(http, "Observation", GLUCOSE)) == []
    assert errors(validate(http, "Observation", parameters(GLUCOSE))) == []


def test_a_coerced_json_type_is_an_error_with_its_fhirpath(http: httpx.Client) -> None:
    # FHIR R4 json.html: decimal is a JSON number, boolean a JSON boolean.
    bad = {**GLUCOSE, "valueQuantity": {**GLUCOSE["valueQuantity"], "value": "6.3"}}
    found = errors(validate(http, "Observation", parameters(bad)))
    assert [i["expression"] for i in found] == [["Observation.valueQuantity.value"]]
    assert "JSON number" in found[0]["diagnostics"]


def test_mode_is_honoured(http: httpx.Client) -> None:
    # The FHIR API is read-only, so no content would be accepted as a create.
    for answer in (
        validate(http, "Observation", GLUCOSE, mode="create"),
        validate(http, "Observation", parameters(GLUCOSE, mode="create")),
    ):
        found = errors(answer)
        assert [i["code"] for i in found] == ["not-supported"]
        assert found[0]["expression"] == ["mode"]
    wrong = validate(http, "Observation", GLUCOSE, mode="insert")
    assert wrong.status_code == 422
    issue = wrong.json()["issue"][0]
    assert issue["expression"] == ["mode"]
    assert "create | update | delete" in issue["diagnostics"]


def test_profile_is_honoured(http: httpx.Client) -> None:
    core = "http://hl7.org/fhir/StructureDefinition/Observation"
    assert errors(validate(http, "Observation", GLUCOSE, profile=core)) == []
    assert errors(validate(http, "Observation", parameters(GLUCOSE, profile=core))) == []
    unknown = errors(validate(http, "Observation", GLUCOSE, profile="http://example.org/sd/x"))
    assert [i["details"]["coding"][0]["code"] for i in unknown] == ["fhir-profile-unknown"]
    other = errors(
        validate(
            http,
            "Observation",
            GLUCOSE,
            profile="http://hl7.org/fhir/StructureDefinition/Procedure",
        )
    )
    assert [i["details"]["coding"][0]["code"] for i in other] == ["fhir-profile-type"]


def test_the_system_level_operation_takes_any_type(http: httpx.Client) -> None:
    # POST [base]/$validate (resource-operation-validate.html: system level too).
    answer = http.post("/fhir/$validate", content=json.dumps(parameters(GLUCOSE)))
    assert errors(answer) == []
    bad = http.post(
        "/fhir/$validate", content=json.dumps({"resourceType": "Patient", "gender": "m"})
    )
    assert [i["expression"] for i in errors(bad)] == [["Patient.gender"]]


def test_an_unknown_parameter_is_refused(http: httpx.Client) -> None:
    body = parameters(GLUCOSE)
    body["parameter"].append({"name": "strict", "valueBoolean": True})
    answer = validate(http, "Observation", body)
    assert answer.status_code == 422
    assert "resource, mode, profile" in answer.json()["issue"][0]["diagnostics"]


def test_an_unknown_type_is_404_naming_it(http: httpx.Client) -> None:
    answer = validate(http, "Foo", {"resourceType": "Foo"})
    assert answer.status_code == 404
    assert "'Foo' is not a FHIR R4 resource type" in answer.json()["issue"][0]["diagnostics"]


def test_a_malformed_body_is_no_search_error(http: httpx.Client) -> None:
    answer = validate(http, "Observation", b'{"resourceType": "Observation",')
    assert answer.status_code == 422
    issue = answer.json()["issue"][0]
    assert issue["details"]["coding"][0]["code"] == "json-invalid"
    assert "search" not in issue["diagnostics"]


def test_a_body_over_the_limit_says_the_limit(http: httpx.Client) -> None:
    big = {**GLUCOSE, "note": [{"text": "x" * (1024 * 1024)}]}
    answer = validate(http, "Observation", big)
    assert answer.status_code == 413
    assert "the limit is 1048576 bytes" in answer.json()["issue"][0]["diagnostics"]


# capnote's FHIR package over the same server (issue 15, section 6).
PROFILE = "https://capnote.org/fhir/StructureDefinition/capnote-iop"


def emitted_iop() -> dict[str, Any]:
    bundle = json.loads((ROOT / "examples/bundles/right-routine.bundle.json").read_text())
    return next(
        e["resource"]
        for e in bundle["entry"]
        if e["resource"]["resourceType"] == "Observation"
        and e["resource"]["code"]["coding"][0]["code"] == "79892-6"
    )


@pytest.mark.parametrize(
    ("kind", "count"), [("StructureDefinition", 14), ("CodeSystem", 1), ("ValueSet", 4)]
)
def test_the_package_is_served(http: httpx.Client, kind: str, count: int) -> None:
    with httpx.Client(base_url=str(http.base_url), timeout=30) as public:  # no token
        found = public.get(f"/fhir/{kind}")
        assert found.status_code == 200
        bundle = found.json()
        assert r4_problems(bundle) == []
        assert bundle["total"] == len(bundle["entry"]) == count
        first = bundle["entry"][0]["resource"]
        read = public.get(f"/fhir/{kind}/{first['id']}")
        assert read.json() == first
        by_url = public.get(f"/fhir/{kind}", params={"url": first["url"]}).json()
        assert [e["resource"]["id"] for e in by_url["entry"]] == [first["id"]]
        assert public.get(f"/fhir/{kind}/no-such").status_code == 404
        refused = public.get(f"/fhir/{kind}", params={"name": "x"})
        assert refused.status_code == 422
        assert refused.json()["issue"][0]["expression"] == ["name"]


def test_validate_takes_one_of_capnote_profiles(http: httpx.Client) -> None:
    iop = emitted_iop()
    assert errors(validate(http, "Observation", iop, profile=PROFILE)) == []
    assert errors(validate(http, "Observation", parameters(iop, profile=PROFILE))) == []
    wrong_unit = {**iop, "valueQuantity": {**iop["valueQuantity"], "code": "kPa"}}
    found = errors(validate(http, "Observation", wrong_unit, profile=PROFILE))
    assert [i["expression"] for i in found] == [["Observation.valueQuantity.code"]]
    assert PROFILE in found[0]["diagnostics"]
    other = errors(
        validate(http, "Procedure", {**iop, "resourceType": "Procedure"}, profile=PROFILE)
    )
    assert "fhir-profile-type" in [i["details"]["coding"][0]["code"] for i in other]
