"""Forwarding to a FHIR server over real HTTP on 127.0.0.1: every Bundle arrives exactly once
however the receiver fails, on both databases."""

from __future__ import annotations

import asyncio
import json
from collections import Counter
from collections.abc import Iterator
from datetime import datetime, timedelta
from typing import Any

import pytest
from sqlalchemy import text

from capnote.delivery import DeliveryWorker, Receiver
from capnote.notes import Principal
from capnote.store.database import make_engine
from tests.conftest import NOW, SyncNotes, new_token, routine, sync_notes
from tests.fhir_receiver import Dropper, Store, running

WHO = Principal("delivery test", "submitter")


class Clock:
    """A clock the test moves on, so back-off delays pass at once."""

    def __init__(self) -> None:
        self.now = NOW

    def __call__(self) -> datetime:
        return self.now


@pytest.fixture
def setup(database_url: str) -> Iterator[tuple[SyncNotes, str, Clock]]:
    clock = Clock()
    service = sync_notes(database_url, clock, forward=True)
    yield service, database_url, clock
    service.close()


def notes(n: int) -> list[bytes]:
    out = []
    for i in range(n):
        data = routine()
        data["note_id"]["value"] = f"LN-DELIVER-{i:03d}"
        out.append(json.dumps(data).encode())
    return out


def drain(service: SyncNotes, worker: DeliveryWorker, clock: Clock, rounds: int = 40) -> None:
    for _ in range(rounds):
        service.run(worker.run_once())
        clock.now += timedelta(minutes=30)  # every back-off has passed


def states(service: SyncNotes) -> Counter[str]:
    return Counter(e.state for e in service.run(service.store.outbox(None, 1000)))


def identifiers(store: Store) -> Counter[str]:
    seen: Counter[str] = Counter()
    for kind, resources in store.resources.items():
        for versions in resources.values():
            for ident in versions[-1].get("identifier", []):
                seen[f"{kind}|{ident['system']}|{ident['value']}"] += 1
    return seen


def worker_for(
    service: SyncNotes, url: str, clock: Clock, timeout_s: float = 1.0
) -> DeliveryWorker:
    """A worker on the service's store (its own HTTP client: closed by aclose)."""
    return DeliveryWorker(
        service.store,
        Receiver(url, token="receiver-secret", timeout_s=timeout_s),
        clock,
        base_delay_s=0.01,
    )


def test_every_bundle_arrives_exactly_once_despite_failures(setup: Any) -> None:
    service, _url, clock = setup
    for body in notes(6):
        service.submit(body, WHO)
    receiver = Store()
    receiver.faults = ["500-before", "500-after", "late", "429", "500-after", "late"]
    with running(receiver, late_s=2.0) as url:
        worker = worker_for(service, url, clock)
        drain(service, worker, clock)
        service.run(worker.aclose())
    assert states(service) == Counter({"delivered": 6})
    assert receiver.count("Procedure") == 6
    assert all(n == 1 for n in identifiers(receiver).values())  # nothing twice
    assert receiver.transactions > 6  # the failures really happened and were retried


def test_dropped_connections_deliver_every_bundle_exactly_once(setup: Any) -> None:
    # The connection cut with the request unsent, and cut after the receiver applied it
    # (the answer lost): ifNoneExist makes the resend harmless (FHIR R4 3.1.0.8.1,
    # conditional create: a match answers 200 and creates nothing).
    service, _url, clock = setup
    for body in notes(4):
        service.submit(body, WHO)
    receiver = Store()
    with running(receiver) as url:
        port = int(url.split(":")[2].split("/")[0])
        dropper = Dropper(port)
        dropper.faults = ["drop-before", "drop-after", "drop-after", "", "drop-before"]
        with dropper.running() as proxied:
            worker = worker_for(service, proxied, clock)
            drain(service, worker, clock)
            service.run(worker.aclose())
    assert dropper.dropped == 4
    assert states(service) == Counter({"delivered": 4})
    assert receiver.count("Procedure") == 4
    assert all(n == 1 for n in identifiers(receiver).values())  # nothing twice
    assert receiver.applied == 6  # 8 requests, 2 cut before the receiver; 2 answers lost


def test_a_refusal_is_parked_with_the_receivers_answer(setup: Any) -> None:
    service, _url, clock = setup
    service.submit(notes(1)[0], WHO)
    receiver = Store()
    receiver.faults = ["400"]
    with running(receiver) as url:
        worker = worker_for(service, url, clock)
        drain(service, worker, clock, rounds=3)
        service.run(worker.aclose())
    [entry] = service.run(service.store.outbox(None, 10))
    assert entry.state == "failed"
    assert entry.last_status == 400
    assert json.loads(entry.last_error or "")["resourceType"] == "OperationOutcome"
    assert receiver.count("Procedure") == 0


def test_an_amendment_updates_what_the_receiver_holds(setup: Any) -> None:
    service, _url, clock = setup
    _, stored = service.submit(notes(1)[0], WHO)
    receiver = Store()
    with running(receiver) as url:
        worker = worker_for(service, url, clock)
        drain(service, worker, clock, rounds=2)
        changed = json.loads(notes(1)[0])
        changed["result"]["opening"]["horizontal_mm"] = 4.0
        body = json.dumps({"reason": "re-measured", "note": changed}).encode()
        service.amend(stored.key, body, WHO, 1)
        drain(service, worker, clock, rounds=2)
        service.run(worker.aclose())
    assert states(service) == Counter({"delivered": 2})
    assert receiver.count("Procedure") == 1
    [versions] = receiver.resources["Procedure"].values()
    assert len(versions) == 2  # created, then updated in place


def test_two_workers_never_deliver_one_entry_twice(setup: Any) -> None:
    service, _url, clock = setup
    for body in notes(10):
        service.submit(body, WHO)
    receiver = Store()
    with running(receiver) as url:
        workers = [worker_for(service, url, clock, timeout_s=10) for _ in range(2)]

        async def both() -> None:
            await asyncio.gather(*(w.run_once(limit=10) for w in workers))
            for w in workers:
                await w.aclose()

        service.run(both())
    assert states(service) == Counter({"delivered": 10})
    assert receiver.transactions == 10


def test_each_note_version_has_exactly_one_outbox_entry(setup: Any) -> None:
    service, url, _clock = setup
    for body in notes(3):
        service.submit(body, WHO)
    engine = make_engine(url)  # the tables themselves, as a database administrator sees them
    with engine.connect() as connection:
        orphans = connection.execute(
            text(
                "select count(*) from note_version v left join outbox_entry o "
                "on o.note_key = v.note_key and o.version = v.version where o.id is null"
            )
        ).scalar()
        entries = connection.execute(text("select count(*) from outbox_entry")).scalar()
    engine.dispose()
    assert (orphans, entries) == (0, 3)


def test_the_service_forwards_and_shows_the_delivery(database_url: str) -> None:
    import time

    from fastapi.testclient import TestClient

    from capnote.app import create_app
    from capnote.config import Settings

    receiver = Store()
    with running(receiver) as url:
        settings = Settings(
            database_url=database_url,
            forward_url=url,
            forward_token="receiver-secret",
            forward_timeout_s=5,
        )
        app = create_app(settings)  # the real clock: the worker delivers at once
        token, _ = new_token(database_url, "submitter", "forward test")
        headers = {"authorization": f"Bearer {token}", "content-type": "application/json"}
        with TestClient(app) as client:
            key = client.post("/notes", content=notes(1)[0], headers=headers).json()["id"]
            deadline = time.monotonic() + 20
            while time.monotonic() < deadline:
                state = client.get(f"/notes/{key}/delivery", headers=headers).json()
                if state["deliveries"] and state["deliveries"][0]["state"] == "delivered":
                    break
                time.sleep(0.2)
    assert state["forwarding"] is True
    assert state["deliveries"][0]["state"] == "delivered"
    assert receiver.count("Procedure") == 1


def test_operator_commands_deliver_list_retry_park(setup: Any, database_url: str) -> None:
    import os
    import subprocess
    import sys

    from tests.conftest import ROOT

    service, _url, _clock = setup
    service.submit(notes(1)[0], WHO)
    receiver = Store()
    receiver.faults = ["400"]
    with running(receiver) as url:
        env = {
            **os.environ,
            "CAPNOTE_DATABASE_URL": database_url,
            "CAPNOTE_FORWARD_URL": url,
            "CAPNOTE_FORWARD_TOKEN": "receiver-secret",
        }

        def capnote(*args: str) -> subprocess.CompletedProcess[str]:
            return subprocess.run(
                [sys.executable, "-c", "from capnote.cli import main; main()", *args],
                capture_output=True,
                text=True,
                env=env,
                cwd=ROOT,
                timeout=60,
                check=False,
            )

        assert "1 entries tried" in capnote("deliver", "--once").stdout
        listed = capnote("outbox", "list", "--state", "failed").stdout.split()
        assert listed[3] == "failed"
        assert capnote("outbox", "retry", listed[0]).returncode == 0
        assert "1 entries tried" in capnote("deliver", "--once").stdout
        assert capnote("outbox", "list", "--state", "delivered").stdout.split()[3] == "delivered"
        assert capnote("outbox", "park", listed[0]).returncode == 1  # delivered: nothing to park
    assert receiver.count("Procedure") == 1


@pytest.mark.parametrize(
    ("header", "expected"),
    [
        ("120", 120.0),
        (" 7 ", 7.0),
        ("²", None),  # str.isdigit() says yes; float() refuses
        ("¹²", None),
        ("soon", None),
        ("Fri, 04 Dec 2026 12:01:00 GMT", 60.0),
        ("Fri, 04 Dec 2026 11:00:00 GMT", 0.0),  # a time already past: no wait
    ],
)
def test_retry_after_is_read_exactly(header: str, expected: float | None) -> None:
    import httpx

    from capnote.delivery import retry_after

    now = datetime(2026, 12, 4, 12, 0, tzinfo=NOW.tzinfo)
    # Header bytes as the receiver sends them; httpx reads a byte 0xB2 as "²".
    answer = httpx.Response(503, headers={"retry-after": header.encode("latin-1")})
    assert retry_after(answer, now) == expected


@pytest.mark.parametrize("asked", [300_000_000_000.0, float("inf"), 10 * 365 * 86400.0])
def test_a_receivers_wait_is_capped(asked: float) -> None:
    """A Retry-After of a thousand years (or one that overflows timedelta) waits the cap."""
    store: Any = object()  # backoff never touches the store
    worker = DeliveryWorker(store, Receiver(base_url="http://127.0.0.1:9/fhir"), max_asked_s=3600.0)
    assert worker.backoff(1, asked) == timedelta(seconds=3600)
    assert worker.backoff(1, 90.0) == timedelta(seconds=90)


def test_a_review_completes_the_review_request_at_the_receiver(setup: Any) -> None:
    from capnote.reviews import ReviewService
    from tests.test_api_reviews import review

    service, _url, clock = setup
    reviews = ReviewService(service.store, service.service.assessor, clock, forward=True)
    _, stored = service.submit(json.dumps(routine()).encode(), WHO)
    receiver = Store()
    with running(receiver) as url:
        worker = worker_for(service, url, clock)
        drain(service, worker, clock, rounds=2)

        def review_request() -> dict[str, Any]:
            [found] = [
                versions[-1]
                for versions in receiver.resources["ServiceRequest"].values()
                if versions[-1]["code"]["coding"][0]["code"] == "capsulotomy-review"
            ]
            return found

        assert review_request()["status"] == "active"
        created, done = service.run(reviews.submit(json.dumps(review()).encode(), WHO))
        assert created
        drain(service, worker, clock, rounds=2)
        # The hospital record now holds the review request completed, and the review's
        # resources beside it, each once.
        assert review_request()["status"] == "completed"
        delivered = service.run(reviews.delivery(done.key))
        service.run(worker.aclose())
    assert [d["state"] for d in delivered["deliveries"]] == ["delivered"]
    assert receiver.count("Condition") == 2  # RD and CME recorded absent: refuted
    verified = {
        versions[-1]["verificationStatus"]["coding"][0]["code"]
        for versions in receiver.resources["Condition"].values()
    }
    assert verified == {"refuted"}
    # The session, its version that completes the review request, and the review.
    assert states(service) == Counter({"delivered": 3})
    assert receiver.count("Procedure") == 1
    assert stored.key == done.session_key
