"""capnote's benchmark: one command, one table, every number from the same run.

    python bench/run.py            # the full run (about 10 minutes on 2 cores)
    python bench/run.py --smoke    # a few seconds per part: proves the benchmark works

It starts what it needs (capnote on SQLite and on a throwaway PostgreSQL cluster, the
ceiling app, the obvious app), drives bounded load from a separate process on 127.0.0.1
(bench/loadgen.py) and prints one Markdown table, then writes it to
bench/results/<date>-<machine>.md (a smoke run writes to a temporary folder unless --out).

Parts:
  1. POST /notes (check, derive, schedule, emit, store) at 1, 8 and 32 connections, on
     SQLite and PostgreSQL, with 1 and 2 uvicorn workers; the ceiling (a bare route that
     returns the raw body) and the obvious implementation (bench/obvious_app.py) beside it.
  2. POST /notes/check and FHIR reads and searches with 1,000, 10,000 and 100,000 stored
     notes (loaded in-process through NoteService).
  3. `capnote check` over NDJSON files of 10,000 and 100,000 notes against a bare pydantic
     parse loop over the same lines, with the peak memory of each process.
  4. Emission alone: capnote's Bundle builder + orjson against the R4B classes.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib.metadata
import json
import os
import platform
import socket
import subprocess
import sys
import tempfile
import time
import urllib.parse
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from datetime import UTC, date, datetime
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:  # run as `python bench/run.py`: the repository is the root
    sys.path.insert(0, str(ROOT))

import orjson  # noqa: E402
from sqlalchemy import event  # noqa: E402
from sqlmodel import Session  # noqa: E402

from service.assess import Assessor  # noqa: E402
from service.fhir.bundle import bundle  # noqa: E402
from service.fhir.validate import validate_resource  # noqa: E402
from service.notes import (  # noqa: E402
    NoteService,
    Principal,
    _read_copies,
    content_hash,
    note_key,
)
from service.policy import load_policy  # noqa: E402
from service.rules import Context, check_payload  # noqa: E402
from service.store import repository  # noqa: E402
from service.store.database import make_engine, upgrade  # noqa: E402
from service.views import assessment_view  # noqa: E402

PYTHON = sys.executable
CAPNOTE = [PYTHON, "-c", "from service.cli import main; main()"]
TEMPLATE = ROOT / "examples" / "notes" / "right-routine.json"
# The demo notes are set in late November 2026; every check runs as if on this day.
NOW = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)
NOW_TEXT = NOW.isoformat()
MARK = "__N__"  # replaced by a number unique to each request or stored note


@dataclass(frozen=True)
class Plan:
    """How long and how big each part is."""

    seconds: float  # per load run
    max_requests: int  # per load run, whichever bound comes first
    connections: tuple[int, ...]
    store_sizes: tuple[int, ...]
    read_seconds: float
    ndjson_sizes: tuple[int, ...]
    emissions: int
    r4b_emissions: int


FULL = Plan(
    seconds=6.0,
    max_requests=40_000,
    connections=(1, 8, 32),
    store_sizes=(1_000, 10_000, 100_000),
    read_seconds=4.0,
    ndjson_sizes=(10_000, 100_000),
    emissions=3_000,
    r4b_emissions=150,
)
SMOKE = Plan(
    seconds=0.4,
    max_requests=1_000,
    connections=(1, 8, 32),
    store_sizes=(100, 500),
    read_seconds=0.4,
    ndjson_sizes=(1_000, 5_000),
    emissions=200,
    r4b_emissions=10,
)


# --- machine ---------------------------------------------------------------------------------


def cpu_model() -> str:
    """The CPU's model name from /proc/cpuinfo."""
    with contextlib.suppress(OSError):
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    return platform.processor() or "unknown CPU"


def machine() -> dict[str, str]:
    """What the numbers were measured on."""
    versions = {}
    for package in ("fastapi", "starlette", "uvicorn", "pydantic", "fhir.resources", "sqlalchemy"):
        with contextlib.suppress(importlib.metadata.PackageNotFoundError):
            versions[package] = importlib.metadata.version(package)
    return {
        "cores": str(os.cpu_count() or 1),
        "cpu": cpu_model(),
        "python": platform.python_version(),
        "system": f"{platform.system()} {platform.release()}",
        "packages": ", ".join(f"{k} {v}" for k, v in versions.items()),
    }


def machine_slug(info: dict[str, str]) -> str:
    """A file-name-safe machine description: `2core-amd-epyc`."""
    words = "".join(c if c.isalnum() else "-" for c in info["cpu"].lower()).split("-")
    return f"{info['cores']}core-" + "-".join(w for w in words if w)[:40]


# --- processes -------------------------------------------------------------------------------


def free_port() -> int:
    """A loopback port nobody holds now."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port: int = sock.getsockname()[1]
        return port


@contextlib.contextmanager
def served(
    argv: Sequence[str], env: dict[str, str], workdir: Path, workers: int, name: str
) -> Iterator[int]:
    """Run a uvicorn server on a free port; yield the port once every worker has started."""
    port = free_port()
    log_path = workdir / f"{name}-{port}.log"
    argv = [*argv, "--host", "127.0.0.1", "--port", str(port), "--workers", str(workers)]
    full_env = {**os.environ, **env, "PYTHONPATH": str(ROOT)}
    with log_path.open("w") as log:
        process = subprocess.Popen(  # noqa: S603 (argv built here from constants)
            argv, cwd=workdir, env=full_env, stdout=log, stderr=subprocess.STDOUT
        )
    try:
        deadline = time.monotonic() + 90
        # uvicorn logs this once per worker: with two, the second may still be importing
        # when the first answers, and a run would then measure one worker.
        while log_path.read_text().count("Application startup complete") < workers:
            if process.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError(f"{name} did not start:\n{log_path.read_text()[-3000:]}")
            time.sleep(0.1)
        yield port
    finally:
        process.terminate()
        try:
            process.wait(timeout=30)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=10)


def capnote_server(url: str, workdir: Path, workers: int) -> contextlib.AbstractContextManager[int]:
    """capnote's app factory, served by bench/serve_app.py like every app here (the database
    is migrated beforehand, as `capnote serve` does before it starts its workers)."""
    return app_server(
        "service.app:app_from_environment",
        workdir,
        workers,
        {"CAPNOTE_DATABASE_URL": url, "CAPNOTE_MIGRATE_ON_START": "false"},
    )


def shipped_server(url: str, workdir: Path, workers: int) -> contextlib.AbstractContextManager[int]:
    """`capnote serve` itself, as an operator starts it."""
    return served(
        [*CAPNOTE, "serve"], {"CAPNOTE_DATABASE_URL": url}, workdir, workers, f"serve{workers}"
    )


def app_server(
    factory: str, workdir: Path, workers: int, env: dict[str, str] | None = None
) -> contextlib.AbstractContextManager[int]:
    """An app factory under uvicorn with capnote serve's settings (bench/serve_app.py)."""
    argv = [PYTHON, str(ROOT / "bench" / "serve_app.py"), factory]
    return served(argv, env or {}, workdir, workers, factory.split(":")[0].split(".")[-1])


def load(job: dict[str, Any]) -> dict[str, Any]:
    """One bounded load run from a separate process (bench/loadgen.py)."""
    done = subprocess.run(  # noqa: S603 (argv built here from constants)
        [PYTHON, str(ROOT / "bench" / "loadgen.py")],
        input=json.dumps(job),
        capture_output=True,
        text=True,
        timeout=job["seconds"] + 120,
        check=False,
    )
    if done.returncode != 0:
        raise RuntimeError(f"load generator failed:\n{done.stderr[-3000:]}")
    result: dict[str, Any] = json.loads(done.stdout)
    return result


# --- notes -----------------------------------------------------------------------------------


def note_template() -> str:
    """The routine demo note with a placeholder in its identifier and patient number, so
    that every request or stored note is a new note of a new patient."""
    note = json.loads(TEMPLATE.read_text())
    note["note_id"]["value"] = f"LN-{MARK}"
    note["patient"]["value"] = f"PT-{MARK}"
    return json.dumps(note)


def token(url: str, role: str) -> str:
    """A fresh bearer token in the database at url (migrated first)."""
    engine = make_engine(url)
    upgrade(engine)
    with Session(engine) as session:
        text, _row = repository.new_token(session, role, f"bench {role}", NOW)
        session.commit()
    engine.dispose()
    return text


def auth(tok: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {tok}", "Content-Type": "application/json"}


# --- the table -------------------------------------------------------------------------------


@dataclass
class Report:
    """Rows of the table and the targets, in the order measured."""

    rows: list[tuple[str, ...]] = field(default_factory=list)
    targets: list[tuple[str, str, str, str]] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    def load_row(self, part: str, case: str, conns: int, r: dict[str, Any], extra: str) -> None:
        statuses = ", ".join(f"{k}: {v}" for k, v in r["statuses"].items())
        if r["errors"]:
            statuses += f"; {r['errors']} connection errors"
        self.rows.append(
            (
                part,
                case,
                str(conns),
                f"{r['rps']:,.0f}",
                f"{r['p50_ms']:.2f}",
                f"{r['p99_ms']:.2f}",
                f"{extra} ({statuses})" if extra else statuses,
            )
        )
        print(f"  {part} | {case} | {conns} | {r['rps']:,.0f}/s | p50 {r['p50_ms']:.2f} ms")

    def target(self, what: str, value: float, goal: str, ok: bool) -> None:
        self.targets.append((what, f"{value:.2f}", goal, "PASS" if ok else "MISS"))
        print(f"  target: {what}: {value:.2f} (goal {goal}) {'PASS' if ok else 'MISS'}")

    def markdown(self, info: dict[str, str], title: str, elapsed: float) -> str:
        lines = [
            f"# {title}",
            "",
            f"Machine: {info['cores']} cores, {info['cpu']}; Python {info['python']}; "
            f"{info['system']}; {info['packages']}. Whole run: {elapsed / 60:.1f} min.",
            "",
            "| part | case | conns | per s | p50 ms | p99 ms | notes |",
            "| --- | --- | ---: | ---: | ---: | ---: | --- |",
        ]
        lines += ["| " + " | ".join(r) + " |" for r in self.rows]
        lines += ["", "| target | measured | goal | result |", "| --- | ---: | --- | --- |"]
        lines += ["| " + " | ".join(t) + " |" for t in self.targets]
        lines += ["", *[f"- {n}" for n in self.notes], ""]
        return "\n".join(lines)


def best(results: dict[int, dict[str, Any]]) -> float:
    """The highest requests/s over the connection counts: each server at its own best."""
    return max(float(r["rps"]) for r in results.values())


# --- part 1: POST /notes ---------------------------------------------------------------------


def post_job(
    port: int, path: str, conns: int, plan: Plan, headers: dict[str, str], tag: str
) -> dict[str, Any]:
    """A load run of POSTs, each with a note of its own."""
    return {
        "host": "127.0.0.1",
        "port": port,
        "connections": conns,
        "requests": plan.max_requests,
        "seconds": plan.seconds,
        "items": [["POST", path, note_template()]],
        "headers": headers,
        "vary": MARK,
        "tag": tag,
    }


def part_post(plan: Plan, report: Report, work: Path) -> None:
    """POST /notes on both engines and worker counts, the ceiling and the obvious app."""
    print("part 1: POST /notes")
    rps: dict[str, dict[int, dict[str, Any]]] = {}
    plain = {"Content-Type": "application/json"}
    for workers in (1, 2):
        with app_server("bench.ceiling_app:create", work, workers) as port:
            key = f"ceiling {workers}w"
            rps[key] = {}
            for conns in plan.connections:
                r = load(post_job(port, "/echo", conns, plan, plain, f"c{workers}{conns}-"))
                rps[key][conns] = r
                report.load_row("POST raw body (ceiling)", f"{workers} worker(s)", conns, r, "")
    engines: list[tuple[str, str]] = [("SQLite", f"sqlite:///{work / 'post.sqlite3'}")]
    cluster = _postgres(work)
    if cluster is not None:
        engines.append(("PostgreSQL", cluster.url))
    else:
        report.notes.append(
            "PostgreSQL rows missing: no server binaries (apt-get install postgresql)"
        )
    try:
        for engine_name, url in engines:
            tok = token(url, "submitter")
            for workers in (1, 2):
                key = f"{engine_name} {workers}w"
                rps[key] = {}
                with capnote_server(url, work, workers) as port:
                    for conns in plan.connections:
                        tag = f"{engine_name[0]}{workers}{conns}-"
                        r = load(post_job(port, "/notes", conns, plan, auth(tok), tag))
                        rps[key][conns] = r
                        ceiling = rps[f"ceiling {workers}w"][conns]["rps"]
                        report.load_row(
                            "POST /notes",
                            f"{engine_name}, {workers} worker(s)",
                            conns,
                            r,
                            f"{r['rps'] / ceiling:.2f} of ceiling",
                        )
            if engine_name == "SQLite":
                _shipped_two_workers(plan, report, work, url, tok)
    finally:
        if cluster is not None:
            cluster.stop()
    obvious_db = f"sqlite:///{work / 'obvious.sqlite3'}"
    with app_server("bench.obvious_app:create", work, 1, {"BENCH_OBVIOUS_DB": obvious_db}) as port:
        rps["obvious"] = {}
        for conns in plan.connections:
            r = load(post_job(port, "/notes", conns, plan, plain, f"o{conns}-"))
            rps["obvious"][conns] = r
            mine = rps["SQLite 1w"][conns]["rps"]
            report.load_row(
                "POST /notes, obvious (R4B + ORM)",
                "SQLite, 1 worker(s)",
                conns,
                r,
                f"capnote {mine / r['rps']:.1f}x this",
            )
    sqlite1 = best(rps["SQLite 1w"])
    report.target(
        "POST /notes SQLite 1 worker / ceiling 1 worker (best req/s of each)",
        sqlite1 / best(rps["ceiling 1w"]),
        ">= 0.4",
        sqlite1 / best(rps["ceiling 1w"]) >= 0.4,
    )
    report.target(
        "POST /notes SQLite 1 worker / obvious implementation",
        sqlite1 / best(rps["obvious"]),
        ">= 5",
        sqlite1 / best(rps["obvious"]) >= 5,
    )
    for engine_name, _url in engines:
        scale = best(rps[f"{engine_name} 2w"]) / best(rps[f"{engine_name} 1w"])
        report.target(
            f"POST /notes {engine_name} 2 workers / 1 worker", scale, ">= 1.8", scale >= 1.8
        )


def _shipped_two_workers(plan: Plan, report: Report, work: Path, url: str, tok: str) -> None:
    """`capnote serve --workers 2` itself: uvicorn's shared socket lacks TCP_NODELAY there,
    which these rows show (see bench/serve_app.py)."""
    with shipped_server(url, work, 2) as port:
        for conns in plan.connections[:2]:
            r = load(post_job(port, "/notes", conns, plan, auth(tok), f"x{conns}-"))
            report.load_row(
                "POST /notes, `capnote serve --workers 2`",
                "SQLite, as shipped",
                conns,
                r,
                "uvicorn's shared socket: no TCP_NODELAY",
            )


def _postgres(work: Path) -> Any:
    """A started throwaway cluster (tests/pg_cluster.py), or None without PostgreSQL."""
    from tests.pg_cluster import PgCluster, available

    if not available():
        return None
    cluster = PgCluster()
    cluster.start()
    return cluster


# --- part 2: the store grows -----------------------------------------------------------------


def _note_text(template: str, i: int) -> str:
    # Two notes per patient, so that a patient search finds a patient's own few.
    return template.replace(f"LN-{MARK}", f"LN-S{i:07d}").replace(f"PT-{MARK}", f"PT-S{i // 2:07d}")


def _rows(service: NoteService, payload: bytes) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    """The rows NoteService._write stores for a new note: the same calls, in the same order
    (check, complete, the view, the read copies), without its per-note transaction."""
    note, findings = check_payload(payload, Context(service.assessor.policy, NOW))
    assert note is not None
    key = note_key(note)
    result = service.assessor.complete(note, findings, ())
    assert result.bundle is not None
    assert result.derived is not None
    values = {
        "note_key": key,
        "version": 1,
        "sender_system": note.note_id.system,
        "sender_value": note.note_id.value,
        "patient_system": note.patient.system,
        "patient_value": note.patient.value,
        "eye": note.eye,
        "started_at": repository.to_db(note.started_at),
        "status": note.status,
        "total_energy_mj": result.derived.total_energy_mj,
        "content_hash": content_hash(note),
        "note_json": note.model_dump_json(exclude_none=True),
        "result_json": orjson.dumps(assessment_view(result)).decode(),
        "bundle_json": orjson.dumps(result.bundle).decode(),
        "reason": None,
        "recorded_at": repository.to_db(NOW),
        "recorded_by": "bench loader",
    }
    return values, _read_copies(result.bundle, 1, NOW)


def fill(service: NoteService, start: int, stop: int, template: str) -> None:
    """Store notes start..stop-1: the first through NoteService.submit (POST /notes' path),
    the rest as the same rows in transactions of 500, checked against the first.

    Submitting 100,000 notes one transaction each would take most of the run's time; the
    reads measured afterwards see the same rows either way.
    """
    who = Principal(label="bench loader", role="submitter")
    if start == 0:
        _created, stored = service.submit(_note_text(template, 0).encode(), who)
        values, _copies = _rows(service, _note_text(template, 0).encode())
        same = orjson.loads(values["result_json"]) == stored.result
        if not same or orjson.loads(values["bundle_json"]) != stored.bundle:
            raise RuntimeError("bulk rows differ from what NoteService.submit stores")
        start = 1
    for first in range(start, stop, 500):
        with Session(service.engine) as session:
            for i in range(first, min(first + 500, stop)):
                values, copies = _rows(service, _note_text(template, i).encode())
                patient = (values["patient_system"], values["patient_value"])
                repository.insert_version(session, values, copies, patient)
            session.commit()


def _no_sync(dbapi_connection: Any, _record: Any) -> None:
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA synchronous=OFF")
    cursor.close()


def part_store(plan: Plan, report: Report, work: Path) -> None:
    """POST /notes/check, GET /fhir/Procedure/{id} and a patient search as the store grows."""
    print("part 2: the store grows")
    url = f"sqlite:///{work / 'store.sqlite3'}"
    tok = token(url, "clinician")
    engine = make_engine(url)
    # Loading is set-up, not measurement: the loader's own connections skip the fsyncs of
    # WAL checkpoints (the server measured afterwards opens its own, as configured).
    event.listen(engine, "connect", _no_sync)
    service = NoteService(engine, Assessor(load_policy()), lambda: NOW)
    template = note_template()
    system = json.loads(template)["patient"]["system"]
    p50: dict[str, dict[int, float]] = {"check": {}, "read": {}, "search": {}}
    stored = 0
    for size in plan.store_sizes:
        began = time.perf_counter()
        fill(service, stored, size, template)
        load_seconds = time.perf_counter() - began
        print(f"  stored {size:,} notes ({(size - stored) / load_seconds:,.0f}/s)")
        stored = size
        # 200 notes and patients spread over the whole store, so reads do not hit one page.
        picks = [int(k * (size - 1) / 199) for k in range(200)]
        keys = []
        with Session(engine) as session:
            for i in picks:
                row = repository.fhir_search(
                    session, "Procedure", patient=(system, f"PT-S{i // 2:07d}"), limit=1
                )[1]
                keys.append(row[0].resource_id)
        check_body = template.replace(f"LN-{MARK}", "LN-CHECK").replace(
            f"PT-{MARK}", f"PT-S{(size // 2) // 2:07d}"
        )
        jobs = {
            "check": [("POST", "/notes/check", check_body)],
            "read": [("GET", f"/fhir/Procedure/{k}", "") for k in keys],
            "search": [
                (
                    "GET",
                    "/fhir/Procedure?patient:identifier="
                    + urllib.parse.quote(f"{system}|PT-S{i // 2:07d}", safe=""),
                    "",
                )
                for i in picks
            ],
        }
        names = {
            "check": "POST /notes/check",
            "read": "GET /fhir/Procedure/{id}",
            "search": "GET /fhir/Procedure?patient:identifier=",
        }
        with capnote_server(url, work, 1) as port:
            for name, items in jobs.items():
                r = load(
                    {
                        "host": "127.0.0.1",
                        "port": port,
                        "connections": 1,
                        "requests": plan.max_requests,
                        "seconds": plan.read_seconds,
                        "items": items,
                        "headers": auth(tok),
                        "warmup": 20,
                    }
                )
                p50[name][size] = r["p50_ms"]
                report.load_row(names[name], f"{size:,} notes stored (SQLite)", 1, r, "")
    sample = service.get(repository_key(engine))
    problems = validate_resource(sample.bundle)
    report.notes.append(
        "A stored Bundle read back after loading validates with the R4B models and the "
        f"required bindings: {'yes' if not problems else f'NO, {problems[:3]}'}."
    )
    engine.dispose()
    small, large = plan.store_sizes[0], plan.store_sizes[-1]
    for name in ("check", "read", "search"):
        ratio = p50[name][large] / p50[name][small]
        report.target(
            f"{names[name]} p50 at {large:,} / at {small:,} notes", ratio, "<= 1.3", ratio <= 1.3
        )


def repository_key(engine: Any) -> str:
    """Some stored note's key."""
    from sqlmodel import select

    from service.store.tables import NoteVersion

    with Session(engine) as session:
        row = session.exec(select(NoteVersion.note_key).limit(1)).first()
    assert row is not None
    return str(row)


# --- part 3: capnote check over NDJSON -------------------------------------------------------


def write_ndjson(path: Path, lines: int, template: str) -> None:
    """Distinct notes; every 10th has a warning (an IOP rise) and every 25th an error."""
    base = json.loads(template)
    warn = json.loads(template)
    warn["result"]["iop_after"][0]["value_mmhg"] = 22
    bad = json.loads(template)
    bad["before"]["iop"]["value_mmhg"] = 95
    texts = [json.dumps(base), json.dumps(warn), json.dumps(bad)]
    with path.open("w") as out:
        for i in range(1, lines + 1):
            kind = 2 if i % 25 == 0 else 1 if i % 10 == 0 else 0
            out.write(texts[kind].replace(MARK, f"{i:07d}") + "\n")


def timed(argv: Sequence[str]) -> tuple[float, int]:
    """Wall seconds and peak RSS (MiB) of one process, from the kernel's rusage of that child."""
    began = time.perf_counter()
    with subprocess.Popen(  # noqa: S603 (argv built here from constants)
        list(argv), cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE
    ) as proc:
        _pid, status, usage = os.wait4(proc.pid, 0)
        proc.returncode = os.waitstatus_to_exitcode(status)
        err = proc.stderr.read() if proc.stderr else b""
    wall = time.perf_counter() - began
    if proc.returncode not in (0, 1):
        raise RuntimeError(f"{argv} exited {proc.returncode}: {err.decode()[-2000:]}")
    return wall, int(usage.ru_maxrss) // 1024


def part_ndjson(plan: Plan, report: Report, work: Path) -> None:
    """`capnote check` over NDJSON against a bare parse loop over the same lines."""
    print("part 3: capnote check over NDJSON")
    template = note_template()
    empty = work / "empty.ndjson"
    empty.write_text("")
    check = [*CAPNOTE, "check", "--now", NOW_TEXT]
    bare = [PYTHON, str(ROOT / "bench" / "bare_parse.py")]
    # Start-up (imports, policy) is paid once per process: measured on an empty file and
    # taken off, so notes/s is the streaming rate itself. Wall time is in the table too.
    check_start = min(timed([*check, str(empty)])[0] for _ in range(3))
    bare_start = min(timed([*bare, str(empty)])[0] for _ in range(3))
    peaks: dict[int, int] = {}
    ratio = 0.0
    for size in plan.ndjson_sizes:
        path = work / f"notes-{size}.ndjson"
        write_ndjson(path, size, template)
        check_wall, check_peak = timed([*check, str(path)])
        bare_wall, bare_peak = timed([*bare, str(path)])
        check_rate = size / max(check_wall - check_start, 1e-9)
        bare_rate = size / max(bare_wall - bare_start, 1e-9)
        ratio = check_rate / bare_rate
        peaks[size] = check_peak
        report.rows.append(
            (
                "capnote check NDJSON",
                f"{size:,} notes",
                "-",
                f"{check_rate:,.0f}",
                "-",
                "-",
                f"{check_wall:.1f} s wall incl. {check_start:.1f} s start-up; peak "
                f"{check_peak} MiB; {ratio:.2f} of the bare loop",
            )
        )
        report.rows.append(
            (
                "bare Note.model_validate_json loop",
                f"{size:,} notes",
                "-",
                f"{bare_rate:,.0f}",
                "-",
                "-",
                f"{bare_wall:.1f} s wall incl. {bare_start:.1f} s start-up; peak {bare_peak} MiB",
            )
        )
        print(f"  check {size:,}: {check_rate:,.0f}/s, bare {bare_rate:,.0f}/s, {check_peak} MiB")
        path.unlink()
    small, large = plan.ndjson_sizes[0], plan.ndjson_sizes[-1]
    report.target(
        f"capnote check / bare parse loop ({large:,} notes)", ratio, ">= 0.3", ratio >= 0.3
    )
    growth = peaks[large] / peaks[small]
    report.target(
        f"capnote check peak memory at {large:,} / at {small:,} notes",
        growth,
        "<= 1.10",
        growth <= 1.10,
    )


# --- part 4: emission alone ------------------------------------------------------------------


def part_emission(plan: Plan, report: Report) -> None:
    """capnote's builder + orjson against the same Bundle from R4B classes, in-process."""
    print("part 4: emission")
    from bench.obvious_app import r4b_bundle

    assessor = Assessor(load_policy())
    result = assessor.assess(TEMPLATE.read_bytes(), NOW)
    assert result.note is not None
    assert result.derived is not None
    note, derived, due = result.note, result.derived, list(result.due)
    began = time.perf_counter()
    for _ in range(plan.emissions):
        orjson.dumps(bundle(note, derived, due))
    ours = plan.emissions / (time.perf_counter() - began)
    began = time.perf_counter()
    for _ in range(plan.r4b_emissions):
        r4b_bundle(note, derived, due).model_dump_json(exclude_none=True)
    theirs = plan.r4b_emissions / (time.perf_counter() - began)
    entries = len(result.bundle["entry"]) if result.bundle else 0
    report.rows.append(
        (
            "emission: bundle() + orjson",
            f"{entries}-entry Bundle",
            "-",
            f"{ours:,.0f}",
            "-",
            "-",
            f"{ours / theirs:.0f}x the R4B classes",
        )
    )
    report.rows.append(
        (
            "emission: R4B classes + model_dump_json",
            f"{entries}-entry Bundle",
            "-",
            f"{theirs:,.0f}",
            "-",
            "-",
            "",
        )
    )
    print(f"  bundle()+orjson {ours:,.0f}/s, R4B {theirs:,.0f}/s")


# --- main ------------------------------------------------------------------------------------


def main(argv: Sequence[str] | None = None) -> int:
    """Run every part; print the table and write it to a file."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--smoke", action="store_true", help="a short run that proves it works")
    parser.add_argument("--out", type=Path, help="folder for the results file")
    args = parser.parse_args(argv)
    plan = SMOKE if args.smoke else FULL
    info = machine()
    report = Report()
    load_at_start = os.getloadavg()[0]
    began = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="capnote-bench-") as tmp:
        work = Path(tmp)
        part_post(plan, report, work)
        part_store(plan, report, work)
        part_ndjson(plan, report, work)
        part_emission(plan, report)
    report.notes += [
        f"The load generator (bench/loadgen.py, asyncio, keep-alive) runs on the same "
        f"{info['cores']} cores as the servers, and PostgreSQL's server processes too: "
        "every number is the whole machine's, and two workers compete with the client.",
        "Every POST /notes carries a new note of a new patient (note_id.value and "
        "patient.value numbered from examples/notes/right-routine.json), so every request "
        "stores: one note version, its FHIR resources and an audit entry.",
        "Requests/s is each server at 1, 8 and 32 connections; ratios use each server's best.",
        "PostgreSQL is a throwaway cluster (tests/pg_cluster.py) with fsync off; SQLite runs "
        "as capnote configures it (WAL, synchronous=NORMAL).",
        "capnote check notes/s leaves out process start-up (measured on an empty file).",
    ]
    load_before, load_after = load_at_start, os.getloadavg()[0]
    # Other work on the machine takes cores from the servers and the client alike; a run
    # beside it measures less, and the ratios move too.
    report.notes.append(
        f"Load average (1 min) at the start and the end of the run: {load_before:.1f}, "
        f"{load_after:.1f} on {info['cores']} cores; well above 1 means other work shared them."
    )
    kind = "smoke run" if args.smoke else "full run"
    title = f"capnote benchmark, {date.today().isoformat()}, {kind}"
    text = report.markdown(info, title, time.perf_counter() - began)
    print()
    print(text)
    out_dir = args.out or (
        Path(tempfile.gettempdir()) / "capnote-bench" if args.smoke else ROOT / "bench" / "results"
    )
    out_dir.mkdir(parents=True, exist_ok=True)
    suffix = "-smoke" if args.smoke else ""
    out = out_dir / f"{date.today().isoformat()}-{machine_slug(info)}{suffix}.md"
    out.write_text(text)
    print(f"written to {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
