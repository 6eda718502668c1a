"""Delivery of stored Bundles to the hospital's FHIR server, from the outbox.

Every entry carries ifNoneExist (or is a conditional update), so delivering one twice after
a crash or a lost answer is harmless: the receiver matches what it already holds. Network
errors, 429 and 5xx are retried with exponential back-off and jitter (Retry-After wins when
longer); any other 4xx parks the entry with the receiver's OperationOutcome for a person.
"""

from __future__ import annotations

import logging
import random
import threading
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from email.utils import parsedate_to_datetime

import httpx
import orjson
from sqlalchemy import Engine
from sqlmodel import Session

from service.store import outbox

log = logging.getLogger("capnote.delivery")
FHIR_JSON = "application/fhir+json"


@dataclass(frozen=True, slots=True)
class Receiver:
    """Where Bundles go, and how capnote proves who it is there."""

    base_url: str
    token: str | None = None
    token_url: str | None = None
    client_id: str | None = None
    client_secret: str | None = None
    timeout_s: float = 30.0


class Credentials:
    """A bearer token: the configured one, or one fetched by OAuth2 client credentials."""

    def __init__(self, receiver: Receiver, client: httpx.Client) -> None:
        self.receiver = receiver
        self.client = client
        self._token: str | None = receiver.token
        self._expires = 0.0

    def header(self) -> dict[str, str]:
        """The Authorization header, fetching or renewing an OAuth2 token when needed."""
        r = self.receiver
        if r.token_url and (self._token is None or time.monotonic() >= self._expires):
            answer = self.client.post(
                r.token_url,
                data={"grant_type": "client_credentials"},
                auth=(r.client_id or "", r.client_secret or ""),
                timeout=r.timeout_s,
            )
            answer.raise_for_status()
            body = answer.json()
            self._token = str(body["access_token"])
            # Renew a little early so a token never expires in flight.
            self._expires = time.monotonic() + float(body.get("expires_in", 300)) * 0.9
        return {"Authorization": f"Bearer {self._token}"} if self._token else {}

    def forget(self) -> None:
        """Drop a token the receiver refused, so the next attempt fetches a new one."""
        if self.receiver.token_url:
            self._token = None


def retry_after(answer: httpx.Response, now: datetime) -> float | None:
    """Seconds the receiver asked us to wait, if it said."""
    value = answer.headers.get("retry-after")
    if value is None:
        return None
    if value.strip().isdigit():
        return float(value)
    try:
        return max(0.0, (parsedate_to_datetime(value) - now).total_seconds())
    except (TypeError, ValueError):
        return None


def all_entries_succeeded(answer: httpx.Response) -> bool:
    """A transaction-response whose every entry answered 2xx."""
    try:
        body = answer.json()
    except ValueError:
        return False
    entries = body.get("entry", []) if isinstance(body, dict) else []
    return (
        isinstance(body, dict)
        and body.get("type") == "transaction-response"
        and all(str(e.get("response", {}).get("status", "")).startswith("2") for e in entries)
    )


class DeliveryWorker:
    """Claims due outbox entries and posts their Bundles as FHIR transactions."""

    def __init__(
        self,
        engine: Engine,
        receiver: Receiver,
        clock: Callable[[], datetime] = lambda: datetime.now(UTC),
        client: httpx.Client | None = None,
        *,
        max_attempts: int = 12,
        base_delay_s: float = 1.0,
        max_delay_s: float = 600.0,
        lease: timedelta = timedelta(seconds=120),
        rng: random.Random | None = None,
    ) -> None:
        self.engine = engine
        self.receiver = receiver
        self.clock = clock
        self._own_client = client is None
        self.client = client or httpx.Client()
        self.credentials = Credentials(receiver, self.client)
        self.worker_id = f"worker-{uuid.uuid4().hex[:12]}"
        self.max_attempts = max_attempts
        self.base_delay_s = base_delay_s
        self.max_delay_s = max_delay_s
        self.lease = lease
        self.rng = rng or random.Random()  # noqa: S311 - jitter, not security

    def backoff(self, attempts: int, asked: float | None) -> timedelta:
        """Exponential back-off with jitter; the receiver's Retry-After when it is longer."""
        delay = min(self.max_delay_s, self.base_delay_s * 2 ** max(0, attempts - 1))
        delay *= 0.5 + self.rng.random() / 2
        return timedelta(seconds=max(delay, asked or 0.0))

    def run_once(self, limit: int = 20) -> int:
        """Deliver what is due now; the number of entries tried."""
        with Session(self.engine) as session:
            entries = outbox.claim(session, self.worker_id, self.clock(), self.lease, limit)
            for entry in entries:
                assert entry.id is not None
                self._deliver(session, entry.id, entry.attempts, outbox.bundle_of(session, entry))
        return len(entries)

    def _deliver(self, session: Session, entry_id: int, attempts: int, bundle: bytes) -> None:
        now = self.clock()
        try:
            headers = {"Content-Type": FHIR_JSON, "Accept": FHIR_JSON, **self.credentials.header()}
            answer = self.client.post(
                self.receiver.base_url,
                content=bundle,
                headers=headers,
                timeout=self.receiver.timeout_s,
            )
        except httpx.HTTPError as exc:
            self._again(session, entry_id, attempts, None, f"network: {type(exc).__name__}", None)
            return
        status = answer.status_code
        if 200 <= status < 300 and all_entries_succeeded(answer):
            outbox.delivered(session, entry_id, self.worker_id, status, now)
            return
        if status == 401:
            self.credentials.forget()
        if status == 429 or status >= 500:
            self._again(
                session, entry_id, attempts, status, answer.text[:2000], retry_after(answer, now)
            )
            return
        # A 4xx (or a 2xx that is no successful transaction-response) will not mend by itself.
        outbox.park(session, entry_id, self.worker_id, status, answer.text[:4000])
        log.warning("delivery parked: outbox entry %s answered %s", entry_id, status)

    def _again(
        self,
        session: Session,
        entry_id: int,
        attempts: int,
        status: int | None,
        error: str,
        asked: float | None,
    ) -> None:
        if attempts >= self.max_attempts:
            outbox.park(
                session,
                entry_id,
                self.worker_id,
                status,
                f"gave up after {attempts} attempts; last: {error}",
            )
            return
        at = self.clock() + self.backoff(attempts, asked)
        outbox.retry_later(session, entry_id, self.worker_id, status, error, at)

    def close(self) -> None:
        """Close the HTTP client this worker made (a caller's own client stays open)."""
        if self._own_client:
            self.client.close()

    def run_forever(self, stop: threading.Event, idle_s: float = 1.0) -> None:
        """Deliver until stop is set; never dies on a passing error."""
        while not stop.is_set():
            try:
                busy = self.run_once()
            except Exception:  # a database outage: wait and try again
                log.warning("delivery loop error", exc_info=False)
                busy = 0
            if not busy:
                stop.wait(idle_s)


def outcome_text(entry_error: str | None) -> object:
    """The receiver's stored answer, as JSON when it was JSON."""
    if not entry_error:
        return None
    try:
        return orjson.loads(entry_error)
    except orjson.JSONDecodeError:
        return entry_error
