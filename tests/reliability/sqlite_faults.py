"""Fault runs on SQLite (issue 16, section 6): `capnote serve` on a real SQLite file under
bounded load from this process, with

- kill: the server killed with SIGKILL twice in the middle of writing, and started again;
- full: the file on a small tmpfs (mounted here, as root) filled to the last byte while
  notes arrive, then freed again.

- full-pg: the same full disk under PostgreSQL, its data directory on the tmpfs.

Afterwards every acknowledged note must be stored exactly once with its content, nothing
half-written may exist, `PRAGMA integrity_check` must say ok, and every refusal during
the fault must have been a 503 with Retry-After. Prints a table of figures per run.

    python -m tests.reliability.sqlite_faults --notes 600        # the full runs
    python -m tests.reliability.sqlite_faults --notes 150        # CI's short runs (pytest)
    python -m tests.reliability.sqlite_faults --only full-pg     # PostgreSQL's full disk
"""

from __future__ import annotations

import argparse
import contextlib
import os
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

from tests.reliability.fault_run import (
    CAPNOTE,
    Figures,
    Server,
    check_store,
    free_port,
    send,
    table,
)


def _token(url: str, work: Path) -> str:
    return subprocess.run(
        [*CAPNOTE, "token", "new", "--role", "submitter", "--label", "fault"],
        capture_output=True,
        text=True,
        env={**os.environ, "CAPNOTE_DATABASE_URL": url},
        cwd=work,
        check=True,
        timeout=60,
    ).stdout.split()[-1]


def _integrity(path: Path) -> str:
    with contextlib.closing(sqlite3.connect(path)) as connection:
        return str(connection.execute("PRAGMA integrity_check").fetchone()[0])


def _load(
    notes: int,
    concurrency: int,
    url: str,
    work: Path,
    faults: Callable[[Server, Figures, float], None],
) -> Figures:
    figures = Figures()
    token = _token(url, work)
    server = Server(url, free_port(), work)
    server.start()
    try:
        deadline = time.monotonic() + max(120, notes / 3)
        injector = threading.Thread(target=faults, args=(server, figures, deadline), daemon=True)
        injector.start()
        with ThreadPoolExecutor(max_workers=concurrency) as pool:
            list(pool.map(lambda i: send(i, [server], token, figures, deadline), range(notes)))
        injector.join(timeout=60)
        figures.crashes = int(server.process is None or server.process.poll() is not None)
    finally:
        server.stop()
    check_store(url, figures)
    return figures


def _wait_for(figures: Figures, count: float, deadline: float) -> None:
    while len(figures.acknowledged) < count and time.monotonic() < deadline:
        time.sleep(0.02)


def run_kill(notes: int, concurrency: int) -> tuple[Figures, str]:
    """SIGKILL twice while notes are written; PRAGMA integrity_check afterwards."""
    work = Path(tempfile.mkdtemp(prefix="capnote-sqlite-kill-"))
    path = work / "notes.sqlite3"

    def faults(server: Server, figures: Figures, deadline: float) -> None:
        for share in (0.3, 0.6):
            _wait_for(figures, notes * share, deadline)
            server.kill()
            figures.faults.append(f"server killed with SIGKILL at {len(figures.acknowledged)}")
            time.sleep(0.5)
            server.start()
            figures.faults.append("server started again")

    figures = _load(notes, concurrency, f"sqlite:///{path}", work, faults)
    return figures, _integrity(path)


@contextlib.contextmanager
def small_tmpfs(size: str) -> Iterator[Path]:
    """A tmpfs of this size mounted on a fresh folder (root only), unmounted afterwards."""
    folder = Path(tempfile.mkdtemp(prefix="capnote-full-"))
    subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(folder)], check=True)
    try:
        yield folder
    finally:
        subprocess.run(["umount", "-l", str(folder)], check=False)
        folder.rmdir()


def _fill(folder: Path) -> Path:
    """Write a file until the file system has no byte left."""
    filler = folder / "filler"
    with contextlib.suppress(OSError), filler.open("wb", buffering=0) as out:
        for block in (b"\0" * 65536, b"\0"):  # then the last bytes, one at a time
            with contextlib.suppress(OSError):
                while out.write(block):
                    pass
    return filler


def run_full(notes: int, concurrency: int) -> tuple[Figures, str]:
    """The disk fills while notes arrive, for 3 s, then space comes back."""
    work = Path(tempfile.mkdtemp(prefix="capnote-sqlite-full-"))
    # Room for the WAL's growth between restarting checkpoints (16,000 frames, 64 MB; see
    # capnote.store.sqlite): the disk fills when the filler says so, not by itself.
    with small_tmpfs("160m") as disk:
        path = disk / "notes.sqlite3"

        def faults(_server: Server, figures: Figures, deadline: float) -> None:
            _wait_for(figures, notes * 0.3, deadline)
            filler = _fill(disk)
            figures.faults.append(f"disk full at {len(figures.acknowledged)} acknowledged")
            time.sleep(3)
            filler.unlink()
            figures.faults.append("space freed after 3 s")

        figures = _load(notes, concurrency, f"sqlite:///{path}", work, faults)
        return figures, _integrity(path)


def run_full_pg(notes: int, concurrency: int) -> tuple[Figures, str]:
    """The same full disk under PostgreSQL: its data directory on the small tmpfs.

    PostgreSQL stops a backend (or, for its write-ahead log, the whole server) when a write
    finds no space; capnote answers 503 with Retry-After meanwhile, and PostgreSQL's own
    crash recovery brings it back once space is freed. "integrity" is whether every table
    could be read back in full afterwards."""
    from tests.pg_cluster import PgCluster

    work = Path(tempfile.mkdtemp(prefix="capnote-pg-full-"))
    with small_tmpfs("200m") as disk:
        os.chmod(disk, 0o777)  # the cluster's files belong to the postgres user
        cluster = PgCluster(base_dir=disk, settings={"synchronous_commit": "on"})
        cluster.start()
        try:
            url = cluster.tcp_url

            def faults(_server: Server, figures: Figures, deadline: float) -> None:
                _wait_for(figures, notes * 0.3, deadline)
                filler = _fill(disk)
                figures.faults.append(f"disk full at {len(figures.acknowledged)} acknowledged")
                time.sleep(3)
                filler.unlink()
                figures.faults.append("space freed after 3 s")

            figures = _load(notes, concurrency, url, work, faults)
            return figures, _pg_readable(url)
        finally:
            cluster.stop()


def _pg_readable(url: str) -> str:
    """ok when every capnote table reads back in full (a torn page would raise)."""
    from sqlalchemy import create_engine, text

    engine = create_engine(url)
    try:
        with engine.connect() as connection:
            for table_name in ("note_version", "fhir_index", "audit_entry", "api_token"):
                connection.execute(text(f"select * from {table_name}")).all()
    except Exception as exc:
        return f"unreadable: {type(exc).__name__}"
    finally:
        engine.dispose()
    return "ok"


def failed(figures: Figures, integrity: str, faults: int) -> bool:
    """Whether the run broke a promise."""
    return bool(
        figures.lost
        or figures.duplicated
        or figures.answers_5xx
        or figures.half_written
        or figures.wrong_content
        or figures.retry_after_missing
        or figures.crashes
        or len(figures.acknowledged) != figures.sent
        or len(figures.faults) != faults
        or integrity != "ok"
    )


def main() -> int:
    """Run both (the full disk only as root) and print their figures."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--notes", type=int, default=600)
    parser.add_argument("--concurrency", type=int, default=8)
    parser.add_argument("--only", choices=("kill", "full", "full-pg"))
    args = parser.parse_args()
    bad = False
    if args.only in (None, "kill"):
        figures, integrity = run_kill(args.notes, args.concurrency)
        print("## SIGKILL during writes\n")
        print(table(figures))
        print(f"PRAGMA integrity_check: {integrity}\n")
        bad |= failed(figures, integrity, 4)
    if args.only in (None, "full"):
        if os.geteuid() != 0:
            print("## full disk: skipped, mounting a tmpfs needs root")
        else:
            figures, integrity = run_full(args.notes, args.concurrency)
            print("## full disk\n")
            print(table(figures))
            print(f"PRAGMA integrity_check: {integrity}\n")
            bad |= failed(figures, integrity, 2) or figures.answers_503 == 0
    if args.only == "full-pg":
        if os.geteuid() != 0:
            print("## full disk on PostgreSQL: skipped, mounting a tmpfs needs root")
        else:
            figures, integrity = run_full_pg(args.notes, args.concurrency)
            print("## full disk on PostgreSQL\n")
            print(table(figures))
            print(f"tables read back: {integrity}\n")
            bad |= failed(figures, integrity, 2) or figures.answers_503 == 0
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
