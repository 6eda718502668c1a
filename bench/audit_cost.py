"""CPU per authenticated read with and without the audit trail of reads (issue 14, §7).

    python bench/audit_cost.py [--reads 3000]

The whole app in-process on a fresh SQLite file (httpx's ASGI transport, no sockets), one
stored note, GET /fhir/Procedure/<id> with a clinician token, one request at a time; the
figure is the process's CPU time per read after 50 to warm up, first with every read
recorded (the service as shipped), then with the recording switched off in this process
only, in turn, three rounds each. CPU time, not the wall clock, because the machine is
shared. It also counts the audit entries written, which must equal the reads recorded.
"""

from __future__ import annotations

import argparse
import asyncio
import statistics
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path

import httpx

import capnote.api.access_audit as middleware
from capnote.app import create_app
from capnote.config import Settings
from capnote.store.database import migrate, open_store

NOTE = Path(__file__).resolve().parents[1] / "examples" / "notes" / "right-routine.json"
WARM = 50


async def _reads(client: httpx.AsyncClient, path: str, token: str, n: int) -> float:
    headers = {"authorization": f"Bearer {token}"}
    for _ in range(WARM):
        await client.get(path, headers=headers)
    cpu = time.process_time()
    for _ in range(n):
        r = await client.get(path, headers=headers)
        assert r.status_code == 200
    return (time.process_time() - cpu) / n * 1e3


async def run(reads: int) -> None:
    with tempfile.TemporaryDirectory() as folder:
        url = f"sqlite:///{folder}/audit-cost.sqlite3"
        migrate(url)
        store = open_store(url)
        token, _ = await store.new_token(
            "clinician", "bench", datetime.now(UTC), staff=("urn:x", "1")
        )
        await store.aclose()
        app = create_app(Settings(database_url=url))
        transport = httpx.ASGITransport(app=app)
        shipped = middleware.audited
        async with (
            app.router.lifespan_context(app),
            httpx.AsyncClient(transport=transport, base_url="http://127.0.0.1") as client,
        ):
            stored = await client.post(
                "/notes",
                content=NOTE.read_bytes(),
                headers={"authorization": f"Bearer {token}", "content-type": "application/json"},
            )
            path = f"/fhir/Procedure/{stored.json()['id']}"
            on, off = [], []
            for _round in range(3):
                on.append(await _reads(client, path, token, reads))
                middleware.audited = lambda *_a: None  # type: ignore[assignment]
                off.append(await _reads(client, path, token, reads))
                middleware.audited = shipped
            entries = await app.state.audit_trail.store.audit_search(limit=1)
        with_audit, without = statistics.median(on), statistics.median(off)
        print(f"{reads} reads x 3 rounds, SQLite, in-process")
        print(f"  recorded:     {with_audit:.3f} ms CPU per read (rounds {_shown(on)})")
        print(f"  not recorded: {without:.3f} ms CPU per read (rounds {_shown(off)})")
        print(f"  ratio {with_audit / without:.2f}; audit entries in the store: {entries[0]}")


def _shown(values: list[float]) -> str:
    return ", ".join(f"{x:.3f}" for x in values)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reads", type=int, default=3000)
    asyncio.run(run(parser.parse_args().reads))


if __name__ == "__main__":
    main()
