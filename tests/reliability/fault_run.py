"""Fault run: two `capnote serve` processes on one PostgreSQL, bounded load from this process,
PostgreSQL stopped abruptly and started again, one server killed with SIGKILL and started
again. Afterwards every acknowledged note must be stored exactly once, with its content, and
nothing half-written may exist. Prints a table of figures.

    python -m tests.reliability.fault_run --notes 2000      # the full run
    python -m tests.reliability.fault_run --notes 200       # CI's short run (via pytest)
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import random
import signal
import subprocess
import sys
import tempfile
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import httpx
from sqlalchemy import create_engine, text

from tests.pg_cluster import PgCluster

ROOT = Path(__file__).resolve().parents[2]
CAPNOTE = [sys.executable, "-c", "from capnote.cli import main; main()"]
BASE_NOTE = json.loads((ROOT / "examples" / "notes" / "right-routine.json").read_text())


@dataclass
class Figures:
    """What the run counted."""

    sent: int = 0
    attempts: int = 0
    acknowledged: set[str] = field(default_factory=set)
    answers_503: int = 0
    answers_5xx: int = 0
    transport_errors: int = 0
    faults: list[str] = field(default_factory=list)
    found: int = 0
    lost: int = 0
    duplicated: int = 0
    half_written: int = 0
    wrong_content: int = 0
    retry_after_missing: int = 0
    bad_inputs: int = 0
    bad_input_5xx: int = 0
    crashes: int = 0
    lock: threading.Lock = field(default_factory=threading.Lock)


class Server:
    """One `capnote serve` process that can be killed and started again on its port."""

    def __init__(self, url: str, port: int, workdir: Path) -> None:
        self.url, self.port, self.workdir = url, port, workdir
        self.process: subprocess.Popen[bytes] | None = None

    def start(self) -> None:
        log = (self.workdir / f"server-{self.port}.log").open("ab")
        self.process = subprocess.Popen(
            [*CAPNOTE, "serve", "--host", "127.0.0.1", "--port", str(self.port)],
            cwd=self.workdir,
            stdout=log,
            stderr=subprocess.STDOUT,
            env={
                **os.environ,
                "CAPNOTE_DATABASE_URL": self.url,
                "PYTHONPATH": str(ROOT / "service"),
            },
        )
        log.close()
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            try:
                if httpx.get(f"{self.base}/healthz", timeout=1).status_code == 200:
                    return
            except httpx.TransportError:
                time.sleep(0.2)
        raise RuntimeError(f"server on {self.port} did not start")

    @property
    def base(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def kill(self) -> None:
        if self.process is not None:
            self.process.send_signal(signal.SIGKILL)
            self.process.wait(timeout=20)

    def stop(self) -> None:
        if self.process is not None and self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=20)
            except subprocess.TimeoutExpired:
                self.kill()


def free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


def note(i: int) -> bytes:
    data = json.loads(json.dumps(BASE_NOTE))
    data["note_id"]["value"] = f"LN-FAULT-{i:06d}"
    data["patient"]["value"] = f"HX9{i:06d}"
    return json.dumps(data).encode()


def send(i: int, servers: list[Server], token: str, figures: Figures, deadline: float) -> None:
    """Send one note until it is acknowledged, retrying on 503 and dropped connections."""
    body = note(i)
    headers = {"authorization": f"Bearer {token}", "content-type": "application/json"}
    with figures.lock:
        figures.sent += 1
    while time.monotonic() < deadline:
        server = random.choice(servers)
        with figures.lock:
            figures.attempts += 1
        try:
            r = httpx.post(f"{server.base}/notes", content=body, headers=headers, timeout=20)
        except httpx.TransportError:
            with figures.lock:
                figures.transport_errors += 1
            time.sleep(0.2)
            continue
        if r.status_code in (200, 201):
            with figures.lock:
                figures.acknowledged.add(f"LN-FAULT-{i:06d}")
            return
        with figures.lock:
            if r.status_code == 503:
                figures.answers_503 += 1
                if "retry-after" not in r.headers:
                    figures.retry_after_missing += 1
            elif r.status_code >= 500:
                figures.answers_5xx += 1
        time.sleep(0.2)


def run(notes: int, concurrency: int) -> Figures:
    figures = Figures()
    work = Path(tempfile.mkdtemp(prefix="capnote-fault-"))
    # synchronous_commit on: an acknowledged note must survive an immediate stop.
    cluster = PgCluster(settings={"synchronous_commit": "on"})
    cluster.start()
    servers: list[Server] = []
    try:
        url = cluster.tcp_url
        env = {**os.environ, "CAPNOTE_DATABASE_URL": url}
        token = subprocess.run(
            [*CAPNOTE, "token", "new", "--role", "submitter", "--label", "fault"],
            capture_output=True,
            text=True,
            env=env,
            cwd=work,
            check=True,
            timeout=60,
        ).stdout.split()[-1]
        servers = [Server(url, free_port(), work), Server(url, free_port(), work)]
        for s in servers:
            s.start()
        deadline = time.monotonic() + max(120, notes / 5)

        def faults() -> None:
            while len(figures.acknowledged) < notes * 0.3 and time.monotonic() < deadline:
                time.sleep(0.05)
            cluster.restart("immediate")  # pg_ctl stop -m immediate, then start
            figures.faults.append("PostgreSQL stopped with -m immediate and started again")
            while len(figures.acknowledged) < notes * 0.6 and time.monotonic() < deadline:
                time.sleep(0.05)
            servers[0].kill()
            figures.faults.append("server 1 killed with SIGKILL")
            time.sleep(1)
            servers[0].start()
            figures.faults.append("server 1 started again")

        injector = threading.Thread(target=faults, daemon=True)
        injector.start()
        with ThreadPoolExecutor(max_workers=concurrency) as pool:
            list(pool.map(lambda i: send(i, servers, token, figures, deadline), range(notes)))
        injector.join(timeout=60)
        bad_inputs(servers, token, figures, max(100, notes // 4))
        check_store(url, figures)
    finally:
        for s in servers:
            s.stop()
        cluster.stop()
    return figures


def hostile(i: int) -> bytes:
    """A bad input: random bytes, a truncated note, or a note with one field mangled."""
    rng = random.Random(i)
    base = note(100_000 + i)
    kind = i % 4
    if kind == 0:
        return bytes(rng.getrandbits(8) for _ in range(rng.randint(0, 400)))
    if kind == 1:
        return base[: rng.randint(0, len(base))]
    data = json.loads(base)
    target = rng.choice(["laser", "before", "result", "plan", "eye", "started_at"])
    data[target] = rng.choice([None, -1e308, "x" * 5000, [], {"a": [[[[1]]]]}, 10**40, True])
    return json.dumps(data).encode()


def bad_inputs(servers: list[Server], token: str, figures: Figures, count: int) -> None:
    """Bad inputs at both servers: each must get a 4xx, and no server may die."""
    headers = {"authorization": f"Bearer {token}", "content-type": "application/json"}
    for i in range(count):
        server = servers[i % len(servers)]
        try:
            r = httpx.post(f"{server.base}/notes", content=hostile(i), headers=headers, timeout=20)
        except httpx.TransportError:
            figures.bad_input_5xx += 1
            continue
        figures.bad_inputs += 1
        if r.status_code >= 500:
            figures.bad_input_5xx += 1
    figures.crashes = sum(1 for s in servers if s.process is None or s.process.poll() is not None)


def check_store(url: str, figures: Figures) -> None:
    engine = create_engine(url)
    with engine.connect() as connection:
        rows = connection.execute(
            text(
                "select sender_value, count(*), min(content_hash) from note_version "
                "where sender_value like 'LN-FAULT-%' group by sender_value"
            )
        ).all()
        orphans = connection.execute(
            text(
                "select count(*) from note_version v where not exists "
                "(select 1 from fhir_index r where r.note_key = v.note_key "
                "and r.version = v.version and r.resource_type = 'Procedure')"
            )
        ).scalar()
    engine.dispose()
    stored = {r[0]: (r[1], r[2]) for r in rows}
    figures.found = len(stored)
    figures.duplicated = sum(1 for n, _ in stored.values() if n != 1)
    figures.lost = sum(1 for key in figures.acknowledged if key not in stored)
    figures.half_written = int(orphans or 0)
    for key, (_count, digest) in stored.items():
        i = int(key.rsplit("-", 1)[1])
        from capnote.note import Note

        stored_json = Note.model_validate_json(note(i)).model_dump_json(exclude_none=True)
        expected = hashlib.sha256(stored_json.encode())
        if digest != expected.hexdigest():
            figures.wrong_content += 1


def table(f: Figures) -> str:
    rows = [
        ("notes sent", f.sent),
        ("requests sent (with retries)", f.attempts),
        ("faults injected", len(f.faults)),
        ("acknowledged notes (200/201)", len(f.acknowledged)),
        ("notes found afterwards", f.found),
        ("lost", f.lost),
        ("duplicated", f.duplicated),
        ("stored with other content", f.wrong_content),
        ("half-written", f.half_written),
        ("503 answers (outage, with Retry-After)", f.answers_503),
        ("503 without Retry-After", f.retry_after_missing),
        ("other 5xx answers", f.answers_5xx),
        ("dropped connections (retried)", f.transport_errors),
        ("bad inputs tried", f.bad_inputs),
        ("5xx to bad inputs", f.bad_input_5xx),
        ("server crashes", f.crashes),
    ]
    width = max(len(r[0]) for r in rows)
    lines = [f"| {'figure'.ljust(width)} | value |", f"|{'-' * (width + 2)}|-------|"]
    lines += [f"| {name.ljust(width)} | {value} |" for name, value in rows]
    lines += ["", "faults: " + "; ".join(f.faults)]
    return "\n".join(lines)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--notes", type=int, default=2000)
    parser.add_argument("--concurrency", type=int, default=8)
    args = parser.parse_args()
    figures = run(args.notes, args.concurrency)
    print(table(figures))
    bad = (
        figures.lost
        or figures.duplicated
        or figures.answers_5xx
        or figures.half_written
        or figures.wrong_content
        or figures.retry_after_missing
        or len(figures.acknowledged) != figures.sent
        or len(figures.faults) != 3
    )
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
