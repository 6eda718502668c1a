"""Delivery of stored Bundles to the hospital's FHIR server, from the outbox.

Every entry carries ifNoneExist (or is a conditional update), so delivering one twice after
a crash or a lost answer is harmless: the receiver matches what it already holds. Network
errors, 429 and 5xx are retried with exponential back-off and jitter (Retry-After wins when
longer); any other 4xx parks the entry with the receiver's OperationOutcome for a person.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import random
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from email.utils import parsedate_to_datetime

import httpx

from capnote.store.base import AuditRow, Store
from capnote.store.codec import unpack_bundle

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

    def __init__(self, receiver: Receiver, client: httpx.AsyncClient) -> None:
        self.receiver = receiver
        self.client = client
        self._token: str | None = receiver.token
        self._expires = 0.0

    async def header(self) -> dict[str, str]:
        """The Authorization header, fetching or renewing an OAuth2 token when needed."""
        r = self.receiver
        if r.token_url and (self._token is None or time.monotonic() >= self._expires):
            answer = await self.client.post(
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
    text = value.strip()
    # ASCII digits only: str.isdigit() also takes "²", which float() then refuses.
    if text.isascii() and text.isdigit():
        return float(text)
    try:
        return max(0.0, (parsedate_to_datetime(text) - now).total_seconds())
    except (TypeError, ValueError, OverflowError):
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


# Who the audit trail names for a delivery.
DELIVERY = "capnote (delivery)"


class DeliveryWorker:
    """Claims due outbox entries and posts their Bundles as FHIR transactions."""

    def __init__(
        self,
        store: Store,
        receiver: Receiver,
        clock: Callable[[], datetime] = lambda: datetime.now(UTC),
        client: httpx.AsyncClient | None = None,
        *,
        max_attempts: int = 12,
        base_delay_s: float = 1.0,
        max_delay_s: float = 600.0,
        max_asked_s: float = 3600.0,
        lease: timedelta = timedelta(seconds=120),
        rng: random.Random | None = None,
    ) -> None:
        self.store = store
        self.receiver = receiver
        self.clock = clock
        self._own_client = client is None
        self.client = client or httpx.AsyncClient()
        self.credentials = Credentials(receiver, self.client)
        self.worker_id = f"worker-{uuid.uuid4().hex[:12]}"
        self.max_attempts = max_attempts
        self.base_delay_s = base_delay_s
        self.max_delay_s = max_delay_s
        self.max_asked_s = max_asked_s
        self.lease = lease
        self.rng = rng or random.Random()  # noqa: S311 - jitter, not security

    def backoff(self, attempts: int, asked: float | None) -> timedelta:
        """Exponential back-off with jitter; the receiver's Retry-After when it is longer,
        up to max_asked_s (a receiver's typo must not defer a clinical record for years)."""
        delay = min(self.max_delay_s, self.base_delay_s * 2 ** max(0, attempts - 1))
        delay *= 0.5 + self.rng.random() / 2
        return timedelta(seconds=max(delay, min(asked or 0.0, self.max_asked_s)))

    async def run_once(self, limit: int = 20) -> int:
        """Deliver what is due now; the number of entries tried."""
        entries = await self.store.claim(self.worker_id, self.clock(), self.lease, limit)
        for entry in entries:
            bundle = unpack_bundle(await self.store.bundle_of(entry))
            outcome = await self._deliver(entry.id, entry.attempts, bundle)
            # Every delivery to the receiver is in the audit trail, whatever came of it.
            detail = f"outbox entry {entry.id}, attempt {entry.attempts}: {outcome}"
            row = AuditRow(
                self.clock(),
                DELIVERY,
                "system",
                "deliver",
                None,
                None,
                detail,
                "ok" if outcome == "delivered" else outcome,
            )
            await self.store.record(row, entry.note_key, entry.version)
        return len(entries)

    async def _deliver(self, entry_id: int, attempts: int, bundle: bytes) -> str:
        """Post one Bundle; what came of it: delivered, or why not (for the audit trail)."""
        now = self.clock()
        try:
            credentials = await self.credentials.header()
            headers = {"Content-Type": FHIR_JSON, "Accept": FHIR_JSON, **credentials}
            answer = await self.client.post(
                self.receiver.base_url,
                content=bundle,
                headers=headers,
                timeout=self.receiver.timeout_s,
            )
        except httpx.HTTPError as exc:
            await self._again(entry_id, attempts, None, f"network: {type(exc).__name__}", None)
            return "retry-network"
        status = answer.status_code
        if 200 <= status < 300 and all_entries_succeeded(answer):
            await self.store.delivered(entry_id, self.worker_id, status, now)
            return "delivered"
        if status == 401:
            self.credentials.forget()
        if status == 429 or status >= 500:
            await self._again(
                entry_id, attempts, status, answer.text[:2000], retry_after(answer, now)
            )
            return f"retry-{status}"
        # A 4xx (or a 2xx that is no successful transaction-response) will not mend by itself.
        await self.store.park(entry_id, self.worker_id, status, answer.text[:4000])
        log.warning("delivery parked: outbox entry %s answered %s", entry_id, status)
        return f"parked-{status}"

    async def _again(
        self,
        entry_id: int,
        attempts: int,
        status: int | None,
        error: str,
        asked: float | None,
    ) -> None:
        if attempts >= self.max_attempts:
            await self.store.park(
                entry_id,
                self.worker_id,
                status,
                f"gave up after {attempts} attempts; last: {error}",
            )
            return
        at = self.clock() + self.backoff(attempts, asked)
        await self.store.retry_later(entry_id, self.worker_id, status, error, at)

    async def aclose(self) -> None:
        """Close the HTTP client this worker made (a caller's own client stays open)."""
        if self._own_client:
            await self.client.aclose()

    async def run_forever(self, stop: asyncio.Event, idle_s: float = 1.0) -> None:
        """Deliver until stop is set; never dies on a passing error."""
        while not stop.is_set():
            try:
                busy = await self.run_once()
            except Exception:  # a database outage: wait and try again
                log.warning("delivery loop error", exc_info=False)
                busy = 0
            if not busy:
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(stop.wait(), idle_s)
