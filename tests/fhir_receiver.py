"""A receiving FHIR server for delivery tests, run on 127.0.0.1 by the tests themselves.

It implements the parts of FHIR R4 that delivery relies on (Bundle transaction, urn:uuid
reference resolution, conditional create with ifNoneExist: no match 201, one match 200,
several 412; conditional update by identifier; all-or-nothing; conditional references
``Patient?identifier=system|value`` resolved inside the transaction, which fails when they
match no or several resources; literal references checked to exist, as a server with
referential integrity does; a ``patient=`` search) and can be told to fail:
answer 500 before doing anything, do the work and answer 500 (the answer is lost), do the
work and answer too late for the client's timeout, answer 429 with Retry-After, or 400;
and, through Dropper, a proxy in front of it, drop the connection before or after the work.
"""

from __future__ import annotations

import asyncio
import copy
import socket
import threading
import time
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any
from urllib.parse import unquote

import orjson
import uvicorn
from fastapi import FastAPI, Request
from fastapi.responses import Response

FHIR = "application/fhir+json"


class Store:
    """Resources by type and id, with every version kept."""

    def __init__(self) -> None:
        self.resources: dict[str, dict[str, list[dict[str, Any]]]] = {}
        self.lock = threading.Lock()
        self.faults: list[str] = []
        self.transactions = 0
        self.applied = 0
        # The base URL the receiver serves (set by running()): literal references under it
        # name its own resources.
        self.base = ""

    def put(self, resource: dict[str, Any], rid: str | None = None) -> str:
        """Hold a resource the hospital record already has (a Patient, say); its id."""
        rid = rid or uuid.uuid4().hex
        stored = {**resource, "id": rid, "meta": {"versionId": "1"}}
        self.resources.setdefault(resource["resourceType"], {})[rid] = [stored]
        return rid

    def linked(self, kind: str, patient: str) -> list[dict[str, Any]]:
        """Current resources of kind whose subject (or patient) is the literal reference
        patient ("Patient/<id>"): what a patient= search finds."""
        out = []
        for versions in self.resources.get(kind, {}).values():
            current = versions[-1]
            for field in ("subject", "patient"):
                if (current.get(field) or {}).get("reference") == patient:
                    out.append(current)
                    break
        return out

    def matches(self, kind: str, query: str) -> list[str]:
        """Ids of current resources of kind whose identifier matches identifier=system|value."""
        term = query.removeprefix("identifier=")
        system, _, value = term.partition("|")
        system, value = (unquote(part).replace("\\|", "|") for part in (system, value))
        found = []
        for rid, versions in self.resources.get(kind, {}).items():
            for ident in versions[-1].get("identifier", []):
                if ident.get("system") == system and ident.get("value") == value:
                    found.append(rid)
                    break
        return found

    def count(self, kind: str) -> int:
        return len(self.resources.get(kind, {}))


def _outcome(status: int, text: str) -> Response:
    body = {
        "resourceType": "OperationOutcome",
        "issue": [{"severity": "error", "code": "processing", "diagnostics": text}],
    }
    return Response(orjson.dumps(body), status, media_type=FHIR)


def _resolve(node: Any, ids: dict[str, str]) -> Any:
    if isinstance(node, dict):
        out = {k: _resolve(v, ids) for k, v in node.items()}
        ref = out.get("reference")
        if isinstance(ref, str) and ref in ids:
            out["reference"] = ids[ref]
        return out
    if isinstance(node, list):
        return [_resolve(v, ids) for v in node]
    return node


def _references(node: Any) -> Iterator[str]:
    if isinstance(node, dict):
        ref = node.get("reference")
        if isinstance(ref, str):
            yield ref
        for value in node.values():
            yield from _references(value)
    elif isinstance(node, list):
        for value in node:
            yield from _references(value)


def _link(shadow: Store, bundle: dict[str, Any], ids: dict[str, str]) -> tuple[int, str] | None:
    """Resolve every conditional and literal reference of the transaction into ids, or say
    why the transaction fails. FHIR R4 http.html, transaction, "Conditional References":
    the server finds the one match; "If there are no matches, or multiple matches, the
    transaction fails"."""
    for entry in bundle.get("entry", []):
        for ref in _references(entry.get("resource", {})):
            if ref in ids or ref.startswith(("urn:", "#")):
                continue
            local = ref.removeprefix(shadow.base + "/") if shadow.base else ref
            if "?" in local:
                kind, query = local.split("?", 1)
                found = shadow.matches(kind, query)
                if len(found) != 1:
                    many = "several resources" if found else "no resource"
                    return 412 if found else 404, f"conditional reference matches {many}"
                ids[ref] = f"{kind}/{found[0]}"
            elif local.count("/") == 1:
                kind, rid = local.split("/")
                if rid not in shadow.resources.get(kind, {}):
                    return 404, "a reference names a resource this server does not hold"
                ids[ref] = local
            else:
                return 400, "a reference to another server"
    return None


def apply(store: Store, bundle: dict[str, Any]) -> tuple[int, dict[str, Any] | str]:
    """Run a transaction on a copy and keep it only when every entry succeeds."""
    if bundle.get("resourceType") != "Bundle" or bundle.get("type") != "transaction":
        return 400, "not a transaction Bundle"
    staged = copy.deepcopy(store.resources)
    shadow = Store()
    shadow.resources = staged
    shadow.base = store.base
    ids: dict[str, str] = {}
    plan: list[tuple[str, str, str, bool]] = []  # kind, id, status, is_new_version
    for entry in bundle.get("entry", []):
        request, resource = entry.get("request", {}), entry.get("resource", {})
        kind = resource.get("resourceType", "")
        if request.get("method") == "POST":
            found = shadow.matches(kind, request.get("ifNoneExist", ""))
            if len(found) > 1:
                return 412, "several matches for ifNoneExist"
            if found:
                ids[entry["fullUrl"]] = f"{kind}/{found[0]}"
                plan.append((kind, found[0], "200 OK", False))
                continue
            rid = uuid.uuid4().hex
            ids[entry["fullUrl"]] = f"{kind}/{rid}"
            plan.append((kind, rid, "201 Created", True))
        elif request.get("method") == "PUT" and "?" in request.get("url", ""):
            found = shadow.matches(kind, request["url"].split("?", 1)[1])
            if len(found) > 1:
                return 412, "several matches for the conditional update"
            rid = found[0] if found else uuid.uuid4().hex
            ids[entry["fullUrl"]] = f"{kind}/{rid}"
            plan.append((kind, rid, "200 OK" if found else "201 Created", True))
        elif request.get("method") == "PUT" and request.get("url", "").count("/") == 1:
            # Update as create with the client's id (R4 http.html, "Update as Create"): the
            # id in the URL must be the resource's; the same content again makes no version.
            url_kind, rid = request["url"].split("/")
            if url_kind != kind or resource.get("id") != rid:
                return 400, "the update's URL does not name the resource"
            ids[entry["fullUrl"]] = f"{kind}/{rid}"
            plan.append(
                (
                    kind,
                    rid,
                    "200 OK" if rid in staged.get(kind, {}) else "201 Created",
                    rid not in staged.get(kind, {}),
                )
            )
        else:
            return 400, "unsupported request in transaction"
    failed = _link(shadow, bundle, ids)
    if failed is not None:
        return failed
    answers = []
    for entry, (kind, rid, status, write) in zip(bundle.get("entry", []), plan, strict=True):
        if write:
            resource = _resolve(entry["resource"], ids)
            resource["id"] = rid
            versions = staged.setdefault(kind, {}).setdefault(rid, [])
            resource["meta"] = {"versionId": str(len(versions) + 1)}
            versions.append(resource)
        answers.append({"response": {"status": status, "location": f"{kind}/{rid}"}})
    store.resources = staged
    store.applied += 1
    return 200, {"resourceType": "Bundle", "type": "transaction-response", "entry": answers}


def receiver_app(store: Store, late_s: float = 3.0) -> FastAPI:
    """The receiver's ASGI app; faults are taken one per transaction from store.faults."""
    app = FastAPI()

    @app.post("/fhir")
    async def transaction(request: Request) -> Response:
        if request.headers.get("authorization") != "Bearer receiver-secret":
            return _outcome(401, "no or wrong token")
        bundle = orjson.loads(await request.body())
        with store.lock:
            store.transactions += 1
            fault = store.faults.pop(0) if store.faults else ""
            if fault == "500-before":
                return _outcome(500, "injected failure before processing")
            if fault == "429":
                response = _outcome(429, "slow down")
                response.headers["Retry-After"] = "1"
                return response
            if fault == "400":
                return _outcome(400, "injected refusal")
            status, body = apply(store, bundle)
        if fault == "500-after":
            return _outcome(500, "injected failure after processing")
        if fault == "late":
            time.sleep(late_s)  # past the client's timeout: the work is done, the answer lost
        if isinstance(body, str):
            return _outcome(status, body)
        return Response(orjson.dumps(body), status, media_type=FHIR)

    @app.get("/fhir/{kind}")
    async def search(kind: str, patient: str) -> Response:
        # patient=Patient/<id> or a bare id (R4 search, reference parameters).
        literal = patient if "/" in patient else f"Patient/{patient}"
        with store.lock:
            found = store.linked(kind, literal)
        body = {
            "resourceType": "Bundle",
            "type": "searchset",
            "total": len(found),
            "entry": [{"resource": r, "search": {"mode": "match"}} for r in found],
        }
        return Response(orjson.dumps(body), 200, media_type=FHIR)

    return app


@contextmanager
def running(store: Store, late_s: float = 3.0) -> Iterator[str]:
    """Serve the receiver on a free port of 127.0.0.1; yields its transaction URL."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    server = uvicorn.Server(
        uvicorn.Config(
            receiver_app(store, late_s), host="127.0.0.1", port=port, log_level="warning"
        )
    )
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + 20
    while not server.started:
        if time.monotonic() > deadline:
            raise RuntimeError("receiver did not start")
        time.sleep(0.05)
    store.base = f"http://127.0.0.1:{port}/fhir"
    try:
        yield store.base
    finally:
        server.should_exit = True
        thread.join(timeout=20)


class Dropper:
    """A TCP proxy in front of the receiver that drops connections on command, as a failing
    network or load balancer does: "drop-before" closes the connection once the request has
    arrived, without passing it on (nothing is applied); "drop-after" passes it on, lets the
    receiver apply it, then closes without sending the answer (the work is done, the client
    never hears). Other requests pass through. One fault is used per request, in order."""

    def __init__(self, target_port: int) -> None:
        self.target_port = target_port
        self.faults: list[str] = []
        self.dropped = 0
        self.loop = asyncio.new_event_loop()
        self.port = 0

    async def _read_message(self, reader: asyncio.StreamReader) -> bytes:
        """One HTTP/1.1 message with a Content-Length body (as httpx and uvicorn send)."""
        head = await reader.readuntil(b"\r\n\r\n")
        length = 0
        for line in head.split(b"\r\n")[1:]:
            name, _, value = line.partition(b":")
            if name.strip().lower() == b"content-length":
                length = int(value)
        return head + (await reader.readexactly(length) if length else b"")

    async def _handle(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        upstream_reader, upstream_writer = await asyncio.open_connection(
            "127.0.0.1", self.target_port
        )
        try:
            while True:
                try:
                    request = await self._read_message(reader)
                except (asyncio.IncompleteReadError, ConnectionError):
                    return
                fault = self.faults.pop(0) if self.faults else ""
                if fault == "drop-before":
                    self.dropped += 1
                    return
                upstream_writer.write(request)
                await upstream_writer.drain()
                answer = await self._read_message(upstream_reader)
                if fault == "drop-after":
                    self.dropped += 1
                    return
                writer.write(answer)
                await writer.drain()
        finally:
            writer.close()
            upstream_writer.close()

    def _serve(self, ready: threading.Event) -> None:
        asyncio.set_event_loop(self.loop)
        server = self.loop.run_until_complete(asyncio.start_server(self._handle, "127.0.0.1", 0))
        self.port = server.sockets[0].getsockname()[1]
        ready.set()
        self.loop.run_forever()
        server.close()
        self.loop.run_until_complete(server.wait_closed())
        self.loop.close()

    @contextmanager
    def running(self) -> Iterator[str]:
        """Serve on a free port of 127.0.0.1; yields the transaction URL through the proxy."""
        ready = threading.Event()
        thread = threading.Thread(target=self._serve, args=(ready,), daemon=True)
        thread.start()
        ready.wait(10)
        try:
            yield f"http://127.0.0.1:{self.port}/fhir"
        finally:
            self.loop.call_soon_threadsafe(self.loop.stop)
            thread.join(timeout=10)
