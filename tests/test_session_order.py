"""An eye's session numbers and cumulative energy follow session time, never arrival order:
a session recorded late, amended or voided corrects every later session of that eye with a
new version (a system reason, forwarded like any other), on SQLite and PostgreSQL."""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import Any

import pytest

from capnote.notes import SYSTEM, Principal, StoredNote
from tests.conftest import Api, SyncNotes, routine, sync_notes

WHO = Principal("order test", "submitter")
PATIENT = routine()["patient"]


def session(day: str, number: str, pulses: int = 18, eye: str = "right") -> dict[str, Any]:
    """The routine note moved to another day: 1.6 mJ x pulses on the given eye."""
    text = json.dumps(routine()).replace("2026-11-27", day)
    note: dict[str, Any] = json.loads(text)
    note["note_id"]["value"] = f"LN-ORDER-{number}"
    note["eye"] = eye
    note["laser"]["series"] = [{"energy_mj": 1.6, "pulses": pulses}]
    note["laser"].pop("reported_total_energy_mj", None)
    return note


def totals(stored: StoredNote) -> dict[str, Any]:
    cumulative: dict[str, Any] = stored.view()["derived"]["cumulative"]
    return cumulative


@pytest.fixture
def notes(database_url: str) -> Iterator[SyncNotes]:
    service = sync_notes(database_url, forward=True)
    yield service
    service.close()


def send(notes: SyncNotes, note: dict[str, Any]) -> StoredNote:
    created, stored = notes.submit(json.dumps(note).encode(), WHO)
    assert created
    return stored


def test_a_late_arrival_recounts_the_later_session(notes: SyncNotes) -> None:
    later = send(notes, session("2026-11-30", "B", pulses=20))  # arrives first: 32 mJ
    assert totals(later) == {
        "session_number": 1,
        "cumulative_energy_mj": 32.0,
        "days_since_last_session": None,
    }
    earlier = send(notes, session("2026-11-20", "A", pulses=10))  # 16 mJ, ten days before
    assert totals(earlier)["session_number"] == 1
    now = notes.get(later.key)
    assert now.version == 2
    assert totals(now) == {
        "session_number": 2,
        "cumulative_energy_mj": 48.0,
        "days_since_last_session": 10,
    }
    assert now.status == "final"  # a signed note stays signed
    assert now.reason is not None
    assert f"note {earlier.key}" in now.reason
    assert now.recorded_by == SYSTEM.label
    assert totals(notes.get(later.key, 1))["session_number"] == 1
    # The correction is forwarded like any version: one outbox entry per stored version.
    entries = notes.run(notes.store.outbox_of_note(later.key))
    assert [(e.version, e.state) for e in entries] == [(1, "pending"), (2, "pending")]
    # Its Bundle amends what the receiver holds: the cumulative Observation says so.
    bundle = json.loads(now.bundle_json)
    [obs] = [
        e["resource"]
        for e in bundle["entry"]
        if e["resource"]["resourceType"] == "Observation"
        and e["resource"]["code"]["coding"][0]["code"] == "cumulative-energy"
    ]
    assert obs["valueQuantity"]["value"] == 48.0
    assert obs["status"] == "amended"


def test_arrival_order_never_changes_the_totals(notes: SyncNotes) -> None:
    days = [("2026-11-10", 5), ("2026-11-17", 10), ("2026-11-24", 15)]
    results = []
    for order in ((0, 1, 2), (2, 0, 1), (1, 2, 0)):
        tag = "".join(map(str, order))
        keys = {}
        for i in order:  # a patient of its own per order
            note = session(days[i][0], f"{i}-{tag}", days[i][1])
            note["patient"]["value"] = f"ORDER-{tag}"
            keys[i] = send(notes, note).key
        results.append([totals(notes.get(keys[i])) for i in range(3)])
    expected = [
        {"session_number": 1, "cumulative_energy_mj": 8.0, "days_since_last_session": None},
        {"session_number": 2, "cumulative_energy_mj": 24.0, "days_since_last_session": 7},
        {"session_number": 3, "cumulative_energy_mj": 48.0, "days_since_last_session": 7},
    ]
    assert results == [expected, expected, expected]


def test_amending_an_earlier_sessions_energy_or_time_recounts(notes: SyncNotes) -> None:
    first = send(notes, session("2026-11-20", "A", pulses=10))  # 16 mJ
    second = send(notes, session("2026-11-27", "B", pulses=10))  # 16 mJ, 32 in all
    third = send(notes, session("2026-11-29", "C", pulses=10))  # 48 in all
    assert totals(notes.get(third.key))["cumulative_energy_mj"] == 48.0
    more = session("2026-11-20", "A", pulses=20)  # the first used 32 mJ, not 16
    amended = notes.amend(
        first.key, json.dumps({"reason": "pulse count", "note": more}).encode(), WHO, 1
    )
    assert amended.version == 2
    assert totals(notes.get(second.key))["cumulative_energy_mj"] == 48.0
    assert totals(notes.get(third.key))["cumulative_energy_mj"] == 64.0
    # Moving the first session after the third reorders all three.
    moved = session("2026-11-30", "A", pulses=20)
    notes.amend(first.key, json.dumps({"reason": "date", "note": moved}).encode(), WHO, 2)
    assert totals(notes.get(second.key)) == {
        "session_number": 1,
        "cumulative_energy_mj": 16.0,
        "days_since_last_session": None,
    }
    assert totals(notes.get(third.key))["session_number"] == 2
    assert totals(notes.get(first.key)) == {
        "session_number": 3,
        "cumulative_energy_mj": 64.0,
        "days_since_last_session": 1,
    }
    # An amendment that moves no total writes no correction.
    before = notes.get(third.key).version
    same = session("2026-11-30", "A", pulses=20)
    same["plan"]["rd_warning_given"] = True
    same["result"]["opening"]["horizontal_mm"] = 4.0
    notes.amend(first.key, json.dumps({"reason": "opening", "note": same}).encode(), WHO, 3)
    assert notes.get(third.key).version == before


def test_voiding_an_earlier_session_recounts_and_the_other_eye_is_untouched(
    notes: SyncNotes,
) -> None:
    first = send(notes, session("2026-11-20", "A", pulses=10))
    second = send(notes, session("2026-11-27", "B", pulses=10))
    left = send(notes, session("2026-11-28", "L", pulses=10, eye="left"))
    assert totals(notes.get(second.key))["session_number"] == 2
    notes.void(first.key, json.dumps({"reason": "wrong patient"}).encode(), WHO, 1)
    now = notes.get(second.key)
    assert totals(now) == {
        "session_number": 1,
        "cumulative_energy_mj": 16.0,
        "days_since_last_session": None,
    }
    assert now.reason is not None
    assert "voided" in now.reason
    assert notes.get(left.key).version == 1
    assert totals(notes.get(left.key))["session_number"] == 1


def test_an_amendment_cannot_move_a_note_to_another_eye(api: Api) -> None:
    note = session("2026-11-20", "A")
    r = api.client.post("/notes", content=json.dumps(note), headers=api.headers("submitter"))
    key = r.json()["id"]
    note["eye"] = "left"
    r = api.client.put(
        f"/notes/{key}",
        content=json.dumps({"reason": "eye", "note": note}),
        headers=api.headers("submitter", **{"If-Match": 'W/"1"'}),
    )
    assert r.status_code == 422
    issue = r.json()["issue"][0]
    assert issue["expression"] == ["note.eye"]
    assert "void this note" in issue["diagnostics"]


def test_the_fhir_api_shows_the_corrected_total(api: Api) -> None:
    later = api.client.post(
        "/notes",
        content=json.dumps(session("2026-11-30", "B", pulses=20)),
        headers=api.headers("submitter"),
    ).json()
    api.client.post(
        "/notes",
        content=json.dumps(session("2026-11-20", "A", pulses=10)),
        headers=api.headers("submitter"),
    )
    [ref] = [
        ref
        for ref, entry in zip(later["resources"], later["bundle"]["entry"], strict=True)
        if entry["resource"].get("code", {}).get("coding", [{}])[0].get("code")
        == "cumulative-energy"
    ]
    r = api.client.get(f"/fhir/{ref}", headers=api.headers("analyst"))
    assert r.status_code == 200
    assert r.json()["valueQuantity"]["value"] == 48.0
    assert r.json()["meta"]["versionId"] == "2"
