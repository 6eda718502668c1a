"""Codes for the site's region, a display on every coding, and a readable narrative on every
resource (issue 15, section 4)."""

from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

import pytest

from capnote.assess import Assessor
from capnote.fhir import profiles
from capnote.fhir.common import DEFAULT_RECORD, Emitted, Version
from capnote.fhir.profile_check import check_profile
from capnote.fhir.regions import CPT, ICD10CM
from capnote.fhir.validate import validate_resource
from capnote.policy import load_policy
from capnote.policy.model import Policy
from capnote.rules import Context, check_payload
from tests.conftest import NOW, VALID, routine
from tests.fhir_r4_check import r4_problems

SNOMED = "http://snomed.info/sct"
UCUM = "http://unitsofmeasure.org"


def in_region(region: str, **more: Any) -> Assessor:
    policy = load_policy()
    record = policy.record.model_copy(update={"region": region, **more})
    return Assessor(policy.model_copy(update={"record": record}))


def bundle_of(assessor: Assessor, data: dict[str, Any] | Path) -> dict[str, Any]:
    payload = data.read_bytes() if isinstance(data, Path) else json.dumps(data)
    result = assessor.assess(payload, NOW)
    assert result.bundle is not None, result.findings
    return result.bundle


def procedure_of(bundle: dict[str, Any]) -> dict[str, Any]:
    [proc] = [
        e["resource"] for e in bundle["entry"] if e["resource"]["resourceType"] == "Procedure"
    ]
    return proc


def codings(node: Any) -> list[dict[str, Any]]:
    if isinstance(node, dict):
        own = [node] if "system" in node and "code" in node else []
        return own + [c for v in node.values() for c in codings(v)]
    if isinstance(node, list):
        return [c for v in node for c in codings(v)]
    return []


def systems(concept: dict[str, Any]) -> dict[str, str]:
    return {c["system"]: c["code"] for c in concept["coding"]}


def test_the_demo_clinic_in_england_is_the_default(policy: Policy) -> None:
    # The demo clinic is in England (policy calendar GB/ENG), so its record is coded so.
    assert policy.record.region == "england"
    assert policy.calendar.holiday_subdivision == "ENG"
    # The code's fallback (emit without a policy) says what the shipped policy says.
    assert policy.record == DEFAULT_RECORD


@pytest.mark.parametrize(
    ("eye", "icd10cm"),
    [
        # coding.md: ICD-10-CM H26.49x "other secondary cataract" by eye (H26.491 right,
        # H26.492 left; the codes confirmed in public code lists).
        ("right", ("H26.491", "Other secondary cataract, right eye")),
        ("left", ("H26.492", "Other secondary cataract, left eye")),
    ],
)
def test_united_states_codes_icd10cm_and_cpt(eye: str, icd10cm: tuple[str, str]) -> None:
    data = routine()
    data["eye"] = eye
    proc = procedure_of(bundle_of(in_region("united-states"), data))
    [diagnosis] = [c for c in proc["reasonCode"][0]["coding"] if c["system"] == ICD10CM]
    assert (diagnosis["code"], diagnosis["display"]) == icd10cm
    # clinical-practice.md: CPT 66821, laser discission of secondary membranous cataract
    # [pub: AAO coding article 2018]; the system URI from FHIR's "Using CPT with FHIR".
    code = systems(proc["code"])
    assert code[CPT] == "66821"
    # SNOMED CT everywhere: coding.md [confirmed] 9137006.
    assert code[SNOMED] == "9137006"


def test_england_emits_no_us_codes() -> None:
    # ICD-10-CM and CPT are United States code systems; coding.md and clinical-practice.md
    # confirm no ICD-10 (WHO) or OPCS-4 code for PCO or the laser, so England carries SNOMED
    # CT (9137006, coding.md [confirmed]) and capnote's own codes, never a guessed code.
    bundle = bundle_of(in_region("england"), routine())
    used = {c["system"] for c in codings(bundle)}
    assert ICD10CM not in used
    assert CPT not in used
    assert systems(procedure_of(bundle)["code"])[SNOMED] == "9137006"


def test_cpt_global_period_is_the_sites() -> None:
    # Sources disagree (90 or 0 days: clinical-practice.md), so capnote states one only when
    # the site's policy does.
    def said(assessor: Assessor) -> list[str]:
        proc = procedure_of(bundle_of(assessor, routine()))
        return [n["text"] for n in proc.get("note", []) if "global period" in n["text"]]

    assert said(in_region("united-states")) == []
    assert said(in_region("united-states", cpt_global_period_days=90)) == [
        "CPT 66821 global period: 90 days (site policy)."
    ]
    assert said(in_region("england", cpt_global_period_days=90)) == []


@pytest.mark.parametrize("region", ["england", "united-states"])
@pytest.mark.parametrize("path", VALID, ids=lambda p: p.name)
def test_every_coding_has_a_display_and_every_resource_a_narrative(region: str, path: Path) -> None:
    bundle = bundle_of(in_region(region), path)
    # UCUM codes sit in Quantities, which carry unit (what people read) instead of display.
    missing = [c for c in codings(bundle) if c["system"] != UCUM and not c.get("display")]
    assert missing == []
    for entry in bundle["entry"]:
        text = entry["resource"].get("text")
        assert text is not None, entry["resource"]["resourceType"]
        assert text["div"].startswith('<div xmlns="http://www.w3.org/1999/xhtml"><p>')
    assert r4_problems(bundle) == []  # google-fhir-r4 and the core invariants (txt-1, ...)
    assert [f.message for f in validate_resource(bundle) if f.blocking] == []
    for entry in bundle["entry"]:  # and capnote's published profiles, in either region
        url = profiles.profile_for(entry["resource"])
        assert url is not None
        sd = profiles.profile(url)
        assert sd is not None
        assert check_profile(entry["resource"], sd) == [], url


def test_procedure_narrative_names_complications_drugs_and_the_detachment_warning() -> None:
    path = next(p for p in VALID if p.name == "right-iop-spike.json")
    div = procedure_of(bundle_of(in_region("england"), path))["text"]["div"]
    assert "Complications: IOP spike." in div
    assert "Drugs given in clinic: apraclonidine 1% before and after the laser" in div
    assert "acetazolamide 500 mg oral for a raised IOP" in div
    assert "Drops to take home: prednisolone acetate 1% 4 times a day for 7 days" in div
    assert "Retinal detachment warning: given to the patient." in div


def test_narrative_says_when_the_detachment_warning_was_not_given() -> None:
    data = routine()
    data["plan"]["rd_warning_given"] = False
    div = procedure_of(bundle_of(in_region("england"), data))["text"]["div"]
    assert "NOT recorded as given" in div
    assert "Complications: none recorded." in div


@pytest.mark.parametrize(("eye", "structure"), [("right", "18944008"), ("left", "8966001")])
def test_eye_drops_name_the_eye_as_dosage_site(eye: str, structure: str) -> None:
    # coding.md [confirmed]: right eye structure 18944008, left 8966001 (SNOMED CT).
    path = next(p for p in VALID if p.name == "right-iop-spike.json")
    data = json.loads(path.read_text())
    data["eye"] = eye
    bundle = bundle_of(in_region("england"), data)
    dosages = []
    for entry in bundle["entry"]:
        r = entry["resource"]
        if r["resourceType"] == "MedicationAdministration":
            dosages.append(r["dosage"])
        elif r["resourceType"] == "MedicationRequest":
            dosages += r["dosageInstruction"]
    drops = [d for d in dosages if "drop" in d["text"]]
    assert drops  # prophylaxis and take-home drops
    for dosage in drops:
        assert systems(dosage["site"]) == {SNOMED: structure}
    # A drug taken by mouth has no site on the eye.
    oral = [d for d in dosages if " oral " in d["text"]]
    assert oral
    assert all("site" not in d for d in oral)


def _version(assessor: Assessor, data: dict[str, Any], version: Version) -> Emitted:
    note, findings = check_payload(json.dumps(data), Context(assessor.policy, NOW))
    assert note is not None
    result = assessor.complete(note, findings, version=version)
    assert result.bundle is not None
    return Emitted(result.bundle, result.roles)


def test_a_voided_record_says_so_in_every_narrative() -> None:
    # The status is a modifier element: a reader of text.div alone must see the withdrawal.
    assessor = in_region("england")
    v1 = _version(assessor, routine(), Version(1))
    v2 = _version(assessor, routine(), Version(2, voided=True, previous=v1))
    for entry in v2.bundle["entry"]:
        resource = entry["resource"]
        div = resource["text"]["div"]
        if resource["resourceType"] == "Procedure":
            assert "ENTERED IN ERROR" in div
        else:
            assert f"Status: {resource['status']}" in div
            assert resource["status"] in {"entered-in-error", "revoked", "cancelled"}


def test_an_amendment_keeps_unchanged_statuses_whatever_the_narrative() -> None:
    # A version stored before Observations had a narrative must not make every Observation
    # of the amendment look changed (bundle.restatused compares without status and text).
    assessor = in_region("england")
    data = routine()
    data["status"] = "final"
    v1 = _version(assessor, data, Version(1))
    for entry in v1.bundle["entry"]:
        if entry["resource"]["resourceType"] == "Observation":
            del entry["resource"]["text"]
    changed = copy.deepcopy(data)
    changed["result"]["opening"]["horizontal_mm"] = 4.0
    v2 = _version(assessor, changed, Version(2, amends_final=True, previous=v1))
    statuses = {
        e["resource"]["status"]
        for e in v2.bundle["entry"]
        if e["resource"]["resourceType"] == "Observation"
    }
    assert "final" in statuses  # the untouched ones (IOP, acuity, series) stay final
    assert "amended" in statuses or "corrected" in statuses  # the opening changed
