"""The record says what was observed, and the post-laser pressure pathway runs to discharge.

The three sessions of the clinical-truth issue, end to end through the Assessor (checks,
derived values, schedule, Bundle). Thresholds and their sources:
- severe IOP rise >= 10 mmHg: Chawla et al., ESCRS 2014; Unal et al., J Cataract Refract
  Surg 2006;
- IOP >= 30 mmHg needs action before discharge: common practice (the default policy's
  iop_high_mmhg);
- usual pulse energy <= 3 mJ: from memory;
- more than 50 mJ in glaucoma: Parajuli et al., Clin Ophthalmol 2019;13:945; Jabbar et al.,
  PJMHS 2022;
- prophylaxis in glaucoma: Ophthalmology Journal (Via Medica);
- best-corrected Snellen acuity LOINC 79880-1 (right eye): public eCQM value set
  (../shared/reference/coding.md).
"""

from __future__ import annotations

import json
from typing import Any

import pytest

from capnote.assess import Assessment, Assessor
from capnote.errors import PolicyError
from capnote.policy import load_policy
from tests.conftest import NOW, Api

DAY = "2026-11-25"  # a Wednesday, an open clinic day in the default calendar


def at(clock: str) -> str:
    return f"{DAY}T{clock}:00+00:00"


def uncomplicated() -> dict[str, Any]:
    """Scenario 1: right eye, PCO eight months after uneventful surgery, every item recorded."""
    return {
        "note_id": {"system": "https://clinic.example/sid/note", "value": "T-1"},
        "patient": {"system": "https://clinic.example/sid/mrn", "value": "P-1"},
        "performer": {
            "identifier": {"system": "https://clinic.example/sid/staff", "value": "S-1"},
            "name": "Dr Test",
        },
        "location": {"name": "Test room"},
        "started_at": at("10:00"),
        "ended_at": at("10:10"),
        "consent": {"given": True},
        "eye": "right",
        "before": {
            "iop": {"value_mmhg": 16, "method": "applanation", "measured_at": at("09:40")},
            "pupil_dilated": True,
            "iol": {"optic_diameter_mm": 6.0},
            "cataract_surgery_date": "2026-03-25",
            "risk_factors": {
                "glaucoma": "none",
                "high_myopia": False,
                "uveitis": False,
                "diabetic_macular_oedema": False,
                "retinal_detachment_this_eye": False,
                "retinal_detachment_fellow_eye": False,
                "lattice_degeneration": False,
                "vitreous_loss_at_cataract_surgery": False,
            },
        },
        "laser": {
            "series": [{"energy_mj": 1.8, "pulses": 22}, {"energy_mj": 2.2, "pulses": 6}],
            "focus": {"method": "posterior-offset", "distance_mm": 0.15},
            "pattern": "cruciate",
            "contact_lens": {"used": True},
        },
        "result": {
            "outcome": "complete",
            "opening": {"horizontal_mm": 4.0},
            "iop_after": [{"value_mmhg": 19, "method": "applanation", "measured_at": at("11:10")}],
        },
        "plan": {"rd_warning_given": True},
        "status": "final",
    }


def spike(glaucoma: str | None = "moderate", status: str = "final") -> dict[str, Any]:
    """Scenario 2 (3 with glaucoma None): 60 pulses at 4 mJ, no prophylaxis, IOP 18 -> 30 at
    60 min, oral acetazolamide, 22 at 2 h, discharged."""
    note = uncomplicated()
    note["note_id"]["value"] = "T-2"
    if glaucoma is None:
        note["before"]["risk_factors"].pop("glaucoma")
    else:
        note["before"]["risk_factors"]["glaucoma"] = glaucoma
    note["status"] = status
    note["before"]["iop"]["value_mmhg"] = 18
    note["laser"]["series"] = [{"energy_mj": 4.0, "pulses": 60}]
    note["result"]["iop_after"] = [
        {"value_mmhg": 30, "method": "applanation", "measured_at": at("11:10")},
        {"value_mmhg": 22, "method": "applanation", "measured_at": at("12:10")},
    ]
    note["result"]["pressure_treatment"] = [
        {
            "agent": "acetazolamide",
            "dose": 500,
            "dose_unit": "mg",
            "route": "oral",
            "given_at": at("11:15"),
        }
    ]
    note["result"]["discharge"] = {"at": at("12:20"), "cleared_by": "Dr Test"}
    return note


def run(assessor: Assessor, note: dict[str, Any]) -> Assessment:
    return assessor.assess(json.dumps(note), NOW)


def codes_of(a: Assessment, severity: str) -> set[str]:
    return {f.code for f in a.findings if f.severity.value == severity}


def resources(a: Assessment, kind: str) -> list[dict[str, Any]]:
    assert a.bundle is not None
    return [e["resource"] for e in a.bundle["entry"] if e["resource"]["resourceType"] == kind]


def test_uncomplicated_session_has_no_warnings_and_a_routine_review(assessor: Assessor) -> None:
    a = run(assessor, uncomplicated())
    assert a.accepted
    # Total 22 x 1.8 + 6 x 2.2 = 52.8 mJ: inside the published series (Verma & Ahuja 2020,
    # mean 58.6 +/- 34.6 mJ), so at most information, never a warning.
    assert codes_of(a, "warning") == set()
    assert a.derived is not None
    assert a.derived.risk.level == "routine"
    review = next(d for d in a.due if d.kind == "review")
    assert review.reasons == ("routine review after capsulotomy",)
    assert not any(d.kind == "next-day-iop" for d in a.due)


def test_uncomplicated_record_holds_nothing_that_was_not_entered(assessor: Assessor) -> None:
    a = run(assessor, uncomplicated())
    text = json.dumps(a.bundle)
    # One diameter was measured: no vertical diameter is invented; the area says it assumes
    # a round opening.
    assert "opening-diameter-vertical" not in text
    area = next(
        o for o in resources(a, "Observation") if o["code"]["coding"][0]["code"] == "opening-area"
    )
    assert "round opening" in area["note"][0]["text"]
    # No acuity was entered: no acuity Observation, no best-corrected code.
    assert "79880-1" not in text
    assert "visual-acuity" not in text
    # Nothing about the IOL's position or centring was entered.
    assert "sulcus" not in text
    assert "centred" not in text
    assert '"bag"' not in text


def test_acuity_without_correction_is_not_sent_as_best_corrected(assessor: Assessor) -> None:
    note = uncomplicated()
    note["before"]["visual_acuity"] = {"notation": "snellen-metric", "value": "6/12"}
    a = run(assessor, note)
    text = json.dumps(a.bundle)
    assert "79880-1" not in text
    assert "correction not recorded" in text
    assert "acuity-correction-not-recorded" in codes_of(a, "information") | codes_of(a, "warning")
    note["before"]["visual_acuity"]["correction"] = "best-corrected"
    assert "79880-1" in json.dumps(run(assessor, note).bundle)


def test_spike_pathway_with_glaucoma(assessor: Assessor) -> None:
    a = run(assessor, spike())
    assert a.accepted
    warnings = codes_of(a, "warning")
    assert {
        "pulse-energy-above-usual",
        "glaucoma-total-energy",
        "glaucoma-no-prophylaxis",
        "iop-rise-severe",
        "iop-high",
    } <= warnings
    # The 2 h reading (22 mmHg, rise 4) is below the action level: the pathway is closed.
    assert "iop-action-unresolved" not in warnings
    assert all(f.source for f in a.findings if f.severity.value == "warning")
    recheck = next(d for d in a.due if d.kind == "iop-recheck")
    assert recheck.done_by_reading == 1  # the 2 h reading, not the 30 mmHg one
    assert any(d.kind == "next-day-iop" for d in a.due)
    given = resources(a, "MedicationAdministration")
    treatment = [m for m in given if m["medicationCodeableConcept"]["text"] == "acetazolamide"]
    assert len(treatment) == 1
    dose = treatment[0]["dosage"]
    assert dose["dose"] == {
        "value": 500,
        "unit": "mg",
        "system": "http://unitsofmeasure.org",
        "code": "mg",
    }
    assert dose["route"]["text"] == "oral"
    assert treatment[0]["effectiveDateTime"].startswith("2026-11-25T11:15")
    # The treatment answers the 30 mmHg reading.
    reading = treatment[0]["reasonReference"][0]["reference"]
    observed = {
        e["fullUrl"]: e["resource"]
        for e in a.bundle["entry"]  # type: ignore[index]
    }
    assert observed[reading]["valueQuantity"]["value"] == 30
    (procedure,) = resources(a, "Procedure")
    notes = " ".join(n["text"] for n in procedure["note"])
    assert "cleared by Dr Test" in notes
    assert "IOP at discharge 22 mmHg" in notes


def test_a_reading_needing_action_stays_open_until_a_safe_reading(assessor: Assessor) -> None:
    note = spike()
    note["result"]["iop_after"] = note["result"]["iop_after"][:1]
    note["result"]["discharge"] = None
    a = run(assessor, note)
    unresolved = [f for f in a.findings if f.code == "iop-action-unresolved"]
    assert [f.location for f in unresolved] == ["result.iop_after[0].value_mmhg"]
    recheck = next(d for d in a.due if d.kind == "iop-recheck")
    assert recheck.done_by_reading is None  # a reading that needs action does not count
    # A recorded reason at discharge closes it (e.g. sent on to the emergency service).
    note["result"]["discharge"] = {
        "at": at("11:40"),
        "cleared_by": "Dr Test",
        "reason": "sent to the eye emergency service",
    }
    assert "iop-action-unresolved" not in codes_of(run(assessor, note), "warning")


@pytest.mark.parametrize("status", ["final", "draft"])
def test_glaucoma_not_recorded(assessor: Assessor, status: str) -> None:
    a = run(assessor, spike(glaucoma=None, status=status))
    codes = codes_of(a, "warning") | codes_of(a, "error")
    # The glaucoma checks did not run, and nothing pretends they did.
    assert "glaucoma-total-energy" not in codes
    assert "glaucoma-no-prophylaxis" not in codes
    if status == "final":
        assert not a.accepted
        assert "glaucoma-status-required-to-sign" in codes_of(a, "error")
    else:
        assert a.accepted
        (finding,) = [f for f in a.findings if f.code == "glaucoma-not-recorded"]
        assert "glaucoma energy and prophylaxis checks were not applied" in finding.message


def test_unrecorded_risk_factors_are_named_not_assumed_absent(assessor: Assessor) -> None:
    note = uncomplicated()
    note["before"]["risk_factors"] = {"glaucoma": "none", "high_myopia": False}
    a = run(assessor, note)
    (finding,) = [f for f in a.findings if f.code == "risk-factors-not-recorded"]
    assert "uveitis" in finding.message
    assert "high myopia" not in finding.message


def test_not_centred_only_when_recorded(assessor: Assessor) -> None:
    note = uncomplicated()
    assert "opening-off-centre" not in codes_of(run(assessor, note), "warning")
    note["result"]["opening"]["centred"] = False
    assert "opening-off-centre" in codes_of(run(assessor, note), "warning")


def test_session_details_are_recorded_only_as_entered(assessor: Assessor) -> None:
    note = uncomplicated()
    note["indication"] = {"opacification": "pearl", "symptoms": ["glare", "reduced-vision"]}
    note["laser"]["mode"] = "burst"
    note["laser"]["pulses_per_burst"] = 2
    note["laser"]["contact_lens"] = {"used": True, "lens": "site lens A", "magnification": 1.5}
    note["before"]["topical_anaesthetic"] = "proxymetacaine 0.5%"
    note["assistant"] = "Nurse Test"
    note["consent"]["kind"] = "written"
    note["result"]["complications"] = [{"kind": "anterior-uveitis"}]
    a = run(assessor, note)
    assert a.accepted
    (procedure,) = resources(a, "Procedure")
    reasons = [c.get("text") or c["coding"][0]["code"] for c in procedure["reasonCode"]]
    assert "opacification-pearl" in reasons
    assert "symptom: glare" in reasons
    text = procedure["note"][0]["text"]
    assert "2 pulses per burst" in text
    assert "Nurse Test" in text
    assert "written" in text
    assert procedure["complication"][0]["coding"][0]["code"] == "anterior-uveitis"
    # Magnification 1.5 on the bare 16-degree cone (common practice): 2 asin(1.5 sin 8 deg)
    # = 24.1 degrees, close to the trade's 24 degrees with a lens.
    assert a.derived is not None
    assert a.derived.focal_spot.cone_angle_deg == pytest.approx(24.1, abs=0.1)


def test_burst_mode_needs_its_count(assessor: Assessor) -> None:
    note = uncomplicated()
    note["laser"]["mode"] = "burst"
    a = run(assessor, note)
    assert ("missing-field", "laser.pulses_per_burst") in {(f.code, f.location) for f in a.findings}


def test_focus_offset_in_micrometres_is_stored_in_millimetres(assessor: Assessor) -> None:
    # Lasers display the posterior offset in um; 100-200 um protects the IOL (CRST Europe
    # clinical article), inside the usual 0.1-0.5 mm (common practice).
    note = uncomplicated()
    note["laser"]["focus"] = {"method": "posterior-offset", "distance_um": 150}
    a = run(assessor, note)
    assert a.accepted
    assert a.note is not None
    assert a.note.laser.focus is not None
    assert a.note.laser.focus.distance_mm == 0.15
    assert "distance_um" not in a.note.model_dump_json(exclude_none=True)  # one stored unit
    assert "focus-outside-usual" not in codes_of(a, "warning")
    # 800 um is outside the usual offsets: the warning names the stored field.
    note["laser"]["focus"] = {"method": "posterior-offset", "distance_um": 800}
    (f,) = [f for f in run(assessor, note).findings if f.code == "focus-outside-usual"]
    assert f.location == "laser.focus.distance_mm"
    # Both units at once is refused at the micrometre field.
    note["laser"]["focus"] = {"method": "posterior-offset", "distance_mm": 0.15, "distance_um": 150}
    a = run(assessor, note)
    assert not a.accepted
    assert ("field-not-allowed", "laser.focus.distance_um") in {
        (f.code, f.location) for f in a.findings
    }


def test_lens_magnification_and_burst_count_limits_come_from_the_policy(
    assessor: Assessor, tmp_path: Any
) -> None:
    # Defaults (from memory): lenses magnify the laser spot 1 to 3 times; bursts of 2 or 3.
    note = uncomplicated()
    note["laser"]["contact_lens"] = {"used": True, "lens": "site lens A", "magnification": 3.5}
    note["laser"]["mode"] = "burst"
    note["laser"]["pulses_per_burst"] = 4
    found = {(f.code, f.location): f for f in run(assessor, note).findings}
    magnification = found["out-of-range", "laser.contact_lens.magnification"]
    assert magnification.allowed == ">= 1 and <= 3 times"
    assert found["out-of-range", "laser.pulses_per_burst"].allowed == ">= 2 and <= 3 pulses"
    # A site with a four-pulse laser and a 4x lens sets its own limits.
    site = tmp_path / "site.toml"
    site.write_text("[limits.pulses_per_burst]\nmax = 4\n[limits.lens_magnification]\nmax = 4\n")
    local = Assessor(load_policy(site))
    assert not {f.location for f in run(local, note).findings if f.severity.value == "error"} & {
        "laser.pulses_per_burst",
        "laser.contact_lens.magnification",
    }


def test_a_site_lens_outside_the_magnification_limits_is_refused_at_start(tmp_path: Any) -> None:
    site = tmp_path / "site.toml"
    site.write_text('[[contact_lenses]]\nname = "lens B"\nmagnification = 7\nsource = "site"\n')
    with pytest.raises(PolicyError, match=r"lens B.*outside limits\.lens_magnification"):
        load_policy(site)


def test_each_risk_reason_says_what_it_changes_and_why(assessor: Assessor) -> None:
    note = uncomplicated()
    note["before"]["risk_factors"]["high_myopia"] = True
    a = run(assessor, note)
    assert a.derived is not None
    (reason,) = a.derived.risk.reasons
    assert reason.code == "high-myopia"
    # default.toml [risk_reasons]: the raised review window is 5-10 days, routine 21-42.
    assert reason.changes == "review at 5-10 days instead of 21-42 days"
    assert "AAO Preferred Practice Pattern" in reason.source
    review = next(d for d in a.due if d.kind == "review")
    assert (review.target.date() - a.note.ended_at.date()).days == 7  # type: ignore[union-attr]


# -- the three scenarios over HTTP, on SQLite and PostgreSQL -------------------------------


def _post(api: Api, note: dict[str, Any]) -> Any:
    return api.client.post("/notes", content=json.dumps(note), headers=api.headers("clinician"))


def test_scenario_1_over_the_api_stores_only_what_was_entered(api: Api) -> None:
    r = _post(api, uncomplicated())
    assert r.status_code == 201
    body = r.json()
    assert [f for f in body["findings"] if f["severity"] in ("error", "warning")] == []
    assert body["derived"]["risk"] == {"level": "routine", "reasons": []}
    # Stored as sent: nothing the sender did not give (no IOL position, no centring).
    stored = api.client.get(f"/notes/{body['id']}", headers=api.headers("analyst")).json()
    assert stored["note"]["before"]["iol"] == {"optic_diameter_mm": 6.0}
    assert "centred" not in stored["note"]["result"]["opening"]


def test_scenario_2_over_the_api_books_the_next_day_check(api: Api) -> None:
    r = _post(api, spike())
    assert r.status_code == 201
    body = r.json()
    warnings = {f["code"] for f in body["findings"] if f["severity"] == "warning"}
    assert {"glaucoma-total-energy", "glaucoma-no-prophylaxis", "iop-rise-severe"} <= warnings
    assert "iop-action-unresolved" not in warnings
    kinds = {d["kind"]: d for d in body["due"]}
    assert kinds["iop-recheck"]["done_by_reading"] == 1  # the 2 h reading, not the 30
    assert "next-day-iop" in kinds
    reasons = {r["code"]: r for r in body["derived"]["risk"]["reasons"]}
    assert "next-day IOP check" in reasons["iop-high"]["changes"]


def test_scenario_3_over_the_api_refuses_to_sign_until_glaucoma_is_recorded(api: Api) -> None:
    refused = _post(api, spike(glaucoma=None))
    assert refused.status_code == 422
    assert refused.headers["content-type"].startswith("application/fhir+json")
    (issue,) = [
        i
        for i in refused.json()["issue"]
        if i["details"]["coding"][0]["code"] == "glaucoma-status-required-to-sign"
    ]
    assert issue["expression"] == ["before.risk_factors.glaucoma"]
    draft = _post(api, spike(glaucoma=None, status="draft"))
    assert draft.status_code == 201
    codes = {f["code"] for f in draft.json()["findings"]}
    assert "glaucoma-not-recorded" in codes
    assert not {"glaucoma-total-energy", "glaucoma-no-prophylaxis"} & codes
    signed = api.client.put(
        f"/notes/{draft.json()['id']}",
        content=json.dumps({"note": spike()}),
        headers=api.headers("clinician", **{"If-Match": 'W/"1"'}),
    )
    assert signed.status_code == 200
    assert signed.json()["status"] == "final"


def test_a_lens_name_without_a_lens_used_is_refused(assessor: Assessor) -> None:
    # A record that names a lens nobody used says something untrue: refused at its field.
    note = uncomplicated()
    note["laser"]["contact_lens"] = {"used": False, "lens": "site lens A", "magnification": 1.5}
    found = {
        (f.code, f.location) for f in run(assessor, note).findings if f.severity.value == "error"
    }
    assert found >= {
        ("field-not-allowed", "laser.contact_lens.lens"),
        ("field-not-allowed", "laser.contact_lens.magnification"),
    }


def test_what_a_risk_reason_changes_follows_the_sites_windows(tmp_path: Any) -> None:
    site = tmp_path / "site.toml"
    site.write_text("[schedule.review_raised]\nearliest = 3\ntarget = 4\nlatest = 6\n")
    local = Assessor(load_policy(site))
    note = uncomplicated()
    note["before"]["risk_factors"]["uveitis"] = True
    a = run(local, note)
    assert a.derived is not None
    assert a.derived.risk.reasons[0].changes == "review at 3-6 days instead of 21-42 days"
    bad = tmp_path / "bad.toml"
    bad.write_text('[risk_reasons.uveitis]\nchanges = "review at {soon}"\n')
    with pytest.raises(PolicyError, match=r"risk_reasons\.uveitis\.changes"):
        load_policy(bad)
