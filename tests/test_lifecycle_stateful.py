"""The note lifecycle against a simple model of what must be stored (Hypothesis stateful):
no version lost, none duplicated, history in order, the latest always the one returned."""

from __future__ import annotations

import asyncio
import json
import tempfile
from collections.abc import Coroutine
from pathlib import Path
from typing import Any, TypeVar

from hypothesis import HealthCheck, settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, initialize, invariant, precondition, rule

from capnote.assess import Assessor
from capnote.errors import ConflictError, InputError, NotFoundError, PreconditionError
from capnote.notes import NoteService, Principal, StoredNote
from capnote.policy import load_policy
from capnote.store.database import migrate
from capnote.store.sqlite import SqliteStore
from tests.conftest import NOW, routine

WHO = Principal("stateful test", "submitter")
T = TypeVar("T")


def run(call: Coroutine[Any, Any, T]) -> T:
    """One service call, awaited (the service's methods are coroutines)."""
    return asyncio.run(call)


def opening_of(stored: StoredNote) -> float:
    opening: float = json.loads(stored.note_json)["result"]["opening"]["horizontal_mm"]
    return opening


NOTE_IDS = ["LN-S-1", "LN-S-2", "LN-S-3"]


def note_body(note_id: str, opening_mm: float, status: str) -> dict[str, Any]:
    data = routine()
    data["note_id"]["value"] = note_id
    data["result"]["opening"]["horizontal_mm"] = opening_mm
    data["status"] = status
    return data


class Lifecycle(RuleBasedStateMachine):
    """Each note in the model: the list of (opening, status) per stored version."""

    @initialize()
    def start(self) -> None:
        self.folder = tempfile.TemporaryDirectory()
        url = f"sqlite:///{Path(self.folder.name) / 'state.sqlite3'}"
        migrate(url)
        self.store = SqliteStore(url)
        self.service = NoteService(self.store, Assessor(load_policy()), lambda: NOW)
        self.model: dict[str, list[tuple[float, str]]] = {}
        self.keys: dict[str, str] = {}

    def teardown(self) -> None:
        self.store.close()
        self.folder.cleanup()

    @rule(
        note_id=st.sampled_from(NOTE_IDS),
        opening=st.sampled_from([3.5, 4.0, 4.5]),
        status=st.sampled_from(["draft", "final"]),
    )
    def create_or_resend(self, note_id: str, opening: float, status: str) -> None:
        body = json.dumps(note_body(note_id, opening, status)).encode()
        versions = self.model.get(note_id)
        try:
            created, stored = run(self.service.submit(body, WHO))
        except ConflictError:
            assert versions is not None
            assert (opening, status) not in versions
            return
        if versions is None:
            assert created
            self.model[note_id] = [(opening, status)]
            self.keys[note_id] = stored.key
        else:
            assert not created  # same content as a stored version: nothing new
            assert (opening, status) in versions
            assert stored.version == len(versions)  # and the record as it stands now

    @precondition(lambda self: bool(self.model))
    @rule(
        data=st.data(),
        opening=st.sampled_from([3.0, 5.0, 5.5]),
        status=st.sampled_from(["draft", "final"]),
        reason=st.sampled_from([None, "fix"]),
        stale=st.booleans(),
    )
    def amend(
        self,
        data: st.DataObject,
        opening: float,
        status: str,
        reason: str | None,
        stale: bool,
    ) -> None:
        note_id = data.draw(st.sampled_from(sorted(self.model)))
        versions = self.model[note_id]
        latest = len(versions)
        # If-Match is required on every change (the API answers 428 without it).
        if_match = latest - 1 if stale and latest > 1 else latest
        body = json.dumps({"reason": reason, "note": note_body(note_id, opening, status)}).encode()
        # What must happen, in the order the service decides it (issue 3's rules).
        current = versions[-1]
        if current[1] != "void" and current == (opening, status):
            expected = "same"  # a retry of what is stored: the record as it stands
        elif if_match != latest:
            expected = "stale"
        elif current[1] == "void":
            expected = "voided"
        elif current[1] == "final" and (reason is None or status == "draft"):
            expected = "refused"  # a signed note needs a reason and stays signed
        else:
            expected = "new"
        try:
            stored = run(self.service.amend(self.keys[note_id], body, WHO, if_match))
        except PreconditionError:
            assert expected == "stale"
            return
        except ConflictError:
            assert expected == "voided"
            return
        except InputError:
            assert expected == "refused"
            return
        if expected == "new":
            versions.append((opening, status))
        assert expected in ("same", "new")
        assert stored.version == len(versions)

    @precondition(lambda self: bool(self.model))
    @rule(data=st.data())
    def void(self, data: st.DataObject) -> None:
        note_id = data.draw(st.sampled_from(sorted(self.model)))
        versions = self.model[note_id]
        stored = run(
            self.service.void(
                self.keys[note_id],
                b'{"reason": "entered on the wrong patient"}',
                WHO,
                len(versions),
            )
        )
        if versions[-1][1] != "void":
            versions.append((versions[-1][0], "void"))
        assert stored.version == len(versions)
        assert stored.status == "void"

    @rule()
    def unknown_note(self) -> None:
        try:
            run(self.service.get("00000000-0000-0000-0000-000000000000"))
        except NotFoundError:
            return
        raise AssertionError("an unknown note was found")

    @invariant()
    def store_matches_model(self) -> None:
        for note_id, versions in self.model.items():
            key = self.keys[note_id]
            history = run(self.service.versions(key))
            assert [h["version"] for h in history] == list(range(1, len(versions) + 1))
            assert [h["status"] for h in history] == [v[1] for v in versions]
            latest = run(self.service.get(key))
            assert latest.version == len(versions)
            assert opening_of(latest) == versions[-1][0]
            for n, (opening, _status) in enumerate(versions, start=1):
                assert opening_of(run(self.service.get(key, n))) == opening


Lifecycle.TestCase.settings = settings(
    max_examples=25,
    stateful_step_count=12,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)
TestLifecycle = Lifecycle.TestCase
