"""A bounded HTTP/1.1 load generator: asyncio streams, keep-alive, one process.

Run by bench/run.py as a separate process so that the server and the client never share an
interpreter (they do share the machine's cores; the table says so). It is written on bare
asyncio streams rather than httpx because httpx spends about a millisecond of CPU per request,
which on a 2-core machine would take that time from the server being measured.

Input: a JSON job on stdin (see ``Job``). Output: one JSON object on stdout with the count,
the status codes, requests/s and latency percentiles. Every run stops by itself: after
``requests`` requests or ``seconds`` seconds, whichever comes first.
"""

from __future__ import annotations

import asyncio
import json
import sys
import time
from dataclasses import dataclass, field
from typing import Any


@dataclass
class Job:
    """What to send, where, how many at once and for how long."""

    host: str
    port: int
    connections: int
    requests: int
    seconds: float
    # Each request is (method, path, body); bodies are sent as given, one per request, so a
    # POST can carry a distinct note every time. The list is cycled when it is shorter.
    items: list[tuple[str, str, str]]
    headers: dict[str, str] = field(default_factory=dict)
    # Requests per connection sent before the clock starts (connection set-up, first-query
    # caches in the server) and not counted.
    warmup: int = 3
    # When set, this text in a body is replaced by a number unique to the request (with
    # ``tag`` before it), so that every POST stores a new note.
    vary: str | None = None
    tag: str = ""


@dataclass
class Tally:
    """What the connections saw, shared by all of them."""

    latencies: list[float] = field(default_factory=list)
    statuses: dict[int, int] = field(default_factory=dict)
    errors: int = 0
    next_item: int = 0


def _encode(job: Job, method: str, path: str, body: str) -> bytes:
    payload = body.encode()
    lines = [f"{method} {path} HTTP/1.1", f"Host: {job.host}:{job.port}"]
    lines += [f"{k}: {v}" for k, v in job.headers.items()]
    if method in ("POST", "PUT"):
        lines.append(f"Content-Length: {len(payload)}")
    return ("\r\n".join(lines) + "\r\n\r\n").encode() + payload


async def _exchange(
    reader: asyncio.StreamReader, writer: asyncio.StreamWriter, request: bytes
) -> int:
    """Send one request and read its whole answer; the status code."""
    writer.write(request)
    head = await reader.readuntil(b"\r\n\r\n")
    status = int(head[9:12])
    length = 0
    for line in head.split(b"\r\n")[1:]:
        name, _, value = line.partition(b":")
        lowered = name.strip().lower()
        if lowered == b"content-length":
            length = int(value)
        elif lowered == b"transfer-encoding":
            # Every route measured here answers with a fixed length; anything else would
            # need a chunked reader, and is a mistake in the job.
            raise RuntimeError("chunked answers are not supported")
    if length:
        await reader.readexactly(length)
    return status


async def _connection(
    job: Job,
    requests: list[bytes],
    total: int,
    tally: Tally,
    start: asyncio.Event,
    stop_at: list[float],
) -> None:
    reader, writer = await asyncio.open_connection(job.host, job.port)
    try:
        for _ in range(job.warmup):
            # Taken before the await: another connection must never send the same note.
            index = tally.next_item
            tally.next_item += 1
            await _exchange(reader, writer, requests[index % len(requests)])
        await start.wait()
        while True:
            index = tally.next_item
            if index >= total:
                return
            if time.perf_counter() >= stop_at[0]:
                return
            tally.next_item += 1
            began = time.perf_counter()
            try:
                status = await _exchange(reader, writer, requests[index % len(requests)])
            except (OSError, asyncio.IncompleteReadError, RuntimeError):
                tally.errors += 1
                writer.close()
                reader, writer = await asyncio.open_connection(job.host, job.port)
                continue
            tally.latencies.append(time.perf_counter() - began)
            tally.statuses[status] = tally.statuses.get(status, 0) + 1
    finally:
        writer.close()


def percentile(sorted_values: list[float], fraction: float) -> float:
    """Nearest-rank percentile of an ascending list (0 for an empty one)."""
    if not sorted_values:
        return 0.0
    rank = max(0, min(len(sorted_values) - 1, round(fraction * len(sorted_values)) - 1))
    return sorted_values[rank]


async def run(job: Job) -> dict[str, Any]:
    """Drive the job; the summary."""
    total = job.requests + job.warmup * job.connections
    if job.vary is None:
        requests = [_encode(job, m, p, b) for m, p, b in job.items]
    else:
        # Built before the clock starts: the client's own work must not be measured.
        vary = job.vary
        requests = []
        for i in range(total):
            m, p, b = job.items[i % len(job.items)]
            requests.append(_encode(job, m, p, b.replace(vary, f"{job.tag}{i:07d}")))
    tally = Tally()
    start = asyncio.Event()
    stop_at = [float("inf")]
    tasks = [
        asyncio.create_task(_connection(job, requests, total, tally, start, stop_at))
        for _ in range(job.connections)
    ]
    # Every connection finishes its warm-up before the clock starts.
    while tally.next_item < job.warmup * job.connections:
        await asyncio.sleep(0.005)
        if any(t.done() for t in tasks):
            break
    began = time.perf_counter()
    stop_at[0] = began + job.seconds
    start.set()
    await asyncio.gather(*tasks)
    elapsed = time.perf_counter() - began
    done = sorted(tally.latencies)
    return {
        "requests": len(done),
        "seconds": elapsed,
        "rps": len(done) / elapsed if elapsed else 0.0,
        "p50_ms": percentile(done, 0.50) * 1000,
        "p99_ms": percentile(done, 0.99) * 1000,
        "statuses": {str(k): v for k, v in sorted(tally.statuses.items())},
        "errors": tally.errors,
    }


def main() -> None:
    """Read a job from stdin, print the summary on stdout."""
    spec = json.load(sys.stdin)
    spec["items"] = [tuple(item) for item in spec["items"]]
    print(json.dumps(asyncio.run(run(Job(**spec)))))


if __name__ == "__main__":
    main()
