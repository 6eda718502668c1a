"""A resource follows the thing it records, not its position in the note (issue 14, §2).

Removing, inserting or reordering readings and laser series must leave every other
resource as it was (same stable UUID, same value, same status), withdraw exactly what was
removed, and mark only what changed: R4 ObservationStatus 'corrected' for a measurement
whose value was put right, 'amended' for a value worked out again from it."""

from __future__ import annotations

import copy
import json
from typing import Any

from tests.conftest import EXAMPLES, Api
from tests.fhir_r4_check import r4_problems

SPIKE = json.loads((EXAMPLES / "notes" / "right-iop-spike.json").read_text())


def _store(api: Api, note: dict[str, Any]) -> str:
    r = api.client.post("/notes", content=json.dumps(note), headers=api.headers("submitter"))
    assert r.status_code == 201, r.text
    key: str = r.json()["id"]
    return key


def _amend(api: Api, key: str, note: dict[str, Any], version: int) -> dict[str, Any]:
    r = api.client.put(
        f"/notes/{key}",
        content=json.dumps({"reason": "corrected", "note": note}),
        headers=api.headers("clinician", **{"if-match": f'W/"{version}"'}),
    )
    assert r.status_code == 200, r.text
    bundle: dict[str, Any] = r.json()["bundle"]
    assert r4_problems(bundle) == []
    return bundle


def _readings(bundle: dict[str, Any]) -> dict[str, tuple[str, float, str]]:
    """Each post-laser IOP Observation by fullUrl: (time, mmHg, status)."""
    before = SPIKE["before"]["iop"]["value_mmhg"]
    out = {}
    for e in bundle["entry"]:
        r = e["resource"]
        if r["resourceType"] == "Observation" and r["code"].get("text", "").startswith(
            "Intraocular pressure"
        ):
            out[e["fullUrl"]] = (r["effectiveDateTime"], r["valueQuantity"]["value"], r["status"])
    # The pre-laser reading is not one of the post-laser list.
    return {k: v for k, v in out.items() if v[0] != SPIKE["started_at"] or v[1] != before}


def _by_time(readings: dict[str, tuple[str, float, str]]) -> dict[str, tuple[str, float, str]]:
    return {t: (url, v, s) for url, (t, v, s) in readings.items()}


def test_removing_the_first_reading_withdraws_that_reading_only(api: Api) -> None:
    key = _store(api, SPIKE)
    first = _readings(
        api.client.get(f"/notes/{key}", headers=api.headers("auditor")).json()["bundle"]
    )
    changed = copy.deepcopy(SPIKE)
    removed = changed["result"]["iop_after"].pop(0)  # the 22 mmHg reading at 11:15
    after = _by_time(_readings(_amend(api, key, changed, 1)))
    before = _by_time(first)
    # The 11:15 resource is the one withdrawn, still saying 22 mmHg at 11:15.
    gone = after[removed["measured_at"]]
    assert gone == (before[removed["measured_at"]][0], 22, "entered-in-error")
    # The 13:10 reading keeps its resource, its value and its status.
    for reading in changed["result"]["iop_after"]:
        t = reading["measured_at"]
        assert after[t] == (before[t][0], reading["value_mmhg"], "final")


def test_reordered_and_inserted_readings_keep_their_resources(api: Api) -> None:
    key = _store(api, SPIKE)
    before = _by_time(
        _readings(api.client.get(f"/notes/{key}", headers=api.headers("auditor")).json()["bundle"])
    )
    changed = copy.deepcopy(SPIKE)
    readings = changed["result"]["iop_after"]
    readings.reverse()
    readings.insert(
        1, {"value_mmhg": 25, "method": "applanation", "measured_at": "2026-11-30T12:00:00+00:00"}
    )
    after = _by_time(_readings(_amend(api, key, changed, 1)))
    assert after.pop("2026-11-30T12:00:00+00:00")[1:] == (25, "final")  # new: final
    assert after == before  # every earlier reading: same resource, value and status
    assert not any(s == "entered-in-error" for _u, _v, s in after.values())


def test_a_corrected_value_is_marked_corrected_and_what_follows_from_it_amended(api: Api) -> None:
    key = _store(api, SPIKE)
    changed = copy.deepcopy(SPIKE)
    changed["result"]["iop_after"][1]["value_mmhg"] = 31  # the 13:10 peak was 31, not 29
    bundle = _amend(api, key, changed, 1)
    after = _by_time(_readings(bundle))
    assert after["2026-11-30T13:10:00+00:00"][1:] == (31, "corrected")
    assert after["2026-11-30T11:15:00+00:00"][1:] == (22, "final")
    own = {
        r["code"]["coding"][0]["code"]: r["status"]
        for e in bundle["entry"]
        if (r := e["resource"])["resourceType"] == "Observation"
        and r["code"]["coding"][0]["system"].startswith("https://capnote.org")
    }
    assert own["iop-change"] == "amended"  # the rise, worked out again from the reading
    assert own["total-energy"] == "final"  # nothing about the laser changed


def test_series_are_known_by_their_energy_not_their_order(api: Api) -> None:
    note = copy.deepcopy(SPIKE)
    note["laser"]["series"] = [{"energy_mj": 1.6, "pulses": 18}, {"energy_mj": 2.0, "pulses": 10}]
    note["laser"].pop("reported_total_energy_mj", None)
    key = _store(api, note)
    v1 = api.client.get(f"/notes/{key}", headers=api.headers("auditor")).json()["bundle"]
    changed = copy.deepcopy(note)
    changed["laser"]["series"] = [
        {"energy_mj": 2.0, "pulses": 10},
        {"energy_mj": 1.6, "pulses": 20},
    ]
    v2 = _amend(api, key, changed, 1)

    def series(bundle: dict[str, Any]) -> dict[str, tuple[list[float], str]]:
        return {
            e["fullUrl"]: ([c["valueQuantity"]["value"] for c in r["component"]], r["status"])
            for e in bundle["entry"]
            if (r := e["resource"])["resourceType"] == "Observation"
            and r["code"]["coding"][0]["code"] == "laser-series"
        }

    first, second = series(v1), series(v2)
    assert set(first) == set(second)  # reordered: the same two resources, none withdrawn
    by_energy_1 = {values[0]: url for url, (values, _s) in first.items()}
    by_energy_2 = {values[0]: (url, values, s) for url, (values, s) in second.items()}
    assert by_energy_2[2.0] == (by_energy_1[2.0], [2.0, 10], "final")  # untouched
    assert by_energy_2[1.6] == (by_energy_1[1.6], [1.6, 20], "corrected")  # pulses put right


def test_the_read_api_serves_a_reading_under_the_same_id_after_an_amendment(api: Api) -> None:
    key = _store(api, SPIKE)
    changed = copy.deepcopy(SPIKE)
    changed["result"]["iop_after"].pop(0)
    _amend(api, key, changed, 1)
    h = api.headers("auditor")
    rid = f"{key}-iop-after-20261130t1310"
    current = api.client.get(f"/fhir/Observation/{rid}", headers=h).json()
    first = api.client.get(f"/fhir/Observation/{rid}/_history/1", headers=h).json()
    assert current["valueQuantity"]["value"] == first["valueQuantity"]["value"] == 29
    assert current["effectiveDateTime"] == first["effectiveDateTime"]
    gone = api.client.get(f"/fhir/Observation/{key}-iop-after-20261130t1115", headers=h).json()
    assert (gone["status"], gone["valueQuantity"]["value"]) == ("entered-in-error", 22)


def test_every_role_is_distinct_and_fits_a_read_api_id() -> None:
    from capnote.fhir.identity import prophylaxis_roles, reading_roles, treatment_roles
    from capnote.fhir.readmodel import ROLE_MAX, parse_id
    from capnote.note import ClinicDrop, PressureTreatment, TimedIopReading

    at = "2026-11-30T23:59:59-11:00"  # the next day in UTC: roles are in UTC
    reading = {"method": "rebound", "measured_at": at}
    drop = {"agent": "Apraclonidine  " + "x" * 180, "timing": "both"}
    treatment = {"agent": "acetazolamide", "dose": 500, "dose_unit": "mg", "route": "oral"}
    readings = [
        TimedIopReading.model_validate_json(json.dumps({**reading, "value_mmhg": 20 + i}))
        for i in range(20)
    ]
    drops = [ClinicDrop.model_validate_json(json.dumps(drop)) for _ in range(10)]
    given = [
        PressureTreatment.model_validate_json(json.dumps({**treatment, "given_at": at}))
        for _ in range(10)
    ]
    roles = [
        *reading_roles(readings),
        *(f"{r}-post" for r in prophylaxis_roles(drops)),
        *treatment_roles(given),
    ]
    assert len(set(roles)) == len(roles) == 40
    assert roles[0] == "iop-after-20261201t1059"
    key = "00000000-0000-5000-8000-000000000000"
    assert all(len(r) <= ROLE_MAX and parse_id(f"{key}-{r}") == (key, r) for r in roles)
