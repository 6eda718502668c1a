"""capnote's benchmark: one command, one table, every number from the same run.

    python bench/run.py            # the full run (about 10 minutes on 2 cores)
    python bench/run.py --smoke    # a few seconds per part: proves the benchmark works

It starts what it needs (capnote on SQLite and on a throwaway PostgreSQL cluster, the
ceiling app, the obvious app), drives bounded load from a separate process on 127.0.0.1
(bench/loadgen.py) and prints one Markdown table, then writes it to
bench/results/<date>-<HHMM>-<machine>.md (a smoke run writes to a temporary folder unless --out).

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
import asyncio
import contextlib
import json
import os
import sqlite3
import statistics
import sys
import tempfile
import time
import urllib.parse
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

if __package__ in (None, ""):  # run as `python bench/run.py`: the repository is the root
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import orjson

from bench.harness import (
    CAPNOTE_ENTRY,
    MARK,
    NOW,
    NOW_TEXT,
    ROOT,
    TEMPLATE,
    Report,
    Timed,
    app_server,
    auth,
    best,
    capnote_server,
    driver,
    load,
    machine,
    machine_slug,
    note_template,
    shipped_server,
    timed,
    token,
    write_ndjson,
)
from capnote.assess import Assessor
from capnote.fhir.bundle import OutputCheck, emit
from capnote.fhir.common import Version
from capnote.fhir.validate import validate_resource
from capnote.notes import Change, NoteService, Principal, note_key
from capnote.policy import load_policy
from capnote.rules import Context, check_payload
from capnote.store.database import migrate, open_store


@dataclass(frozen=True)
class Plan:
    """How long and how big each part is."""

    seconds: float  # per load run
    max_requests: int  # per load run, whichever bound comes first (bench/loadgen.py only)
    rounds: int  # of the ceiling and capnote measured in turn, each keeping its best
    connections: tuple[int, ...]
    store_sizes: tuple[int, ...]
    read_rounds: int  # of each read at every store size back to back (targets: median ratio)
    read_seconds: float
    ndjson_sizes: tuple[int, ...]
    emissions: int
    r4b_emissions: int


FULL = Plan(
    seconds=4.0,
    max_requests=40_000,
    rounds=3,
    connections=(1, 8, 32),
    store_sizes=(1_000, 10_000, 100_000),
    read_rounds=6,
    read_seconds=2.0,
    ndjson_sizes=(10_000, 100_000),
    emissions=3_000,
    r4b_emissions=150,
)
SMOKE = Plan(
    seconds=0.4,
    max_requests=1_000,
    rounds=1,
    connections=(1, 8, 32),
    store_sizes=(100, 500),
    read_rounds=1,
    read_seconds=0.4,
    ndjson_sizes=(1_000, 5_000),
    emissions=200,
    r4b_emissions=10,
)


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


def ratio(mine: float, theirs: float) -> float:
    """mine / theirs, and infinity when theirs answered nothing in its run (a smoke run's
    second is shorter than a slow server's queue at 32 connections)."""
    return mine / theirs if theirs else float("inf")


def _keep_best(runs: dict[int, dict[str, Any]], conns: int, r: dict[str, Any]) -> None:
    """Keep the run with more requests/s for this connection count."""
    if conns not in runs or r["rps"] > runs[conns]["rps"]:
        runs[conns] = r


def part_post(plan: Plan, report: Report, work: Path) -> None:
    """POST /notes on both engines and worker counts, the ceiling and the obvious app.

    The ceiling and capnote are measured in turn, round after round, and each keeps its
    best run: a machine whose speed drifts (other work on the host) then moves both alike
    rather than the one measured in a slow minute.
    """
    print("part 1: POST /notes")
    rps: dict[str, dict[int, dict[str, Any]]] = {}
    plain = {"Content-Type": "application/json"}
    ceiling_env = {"CAPNOTE_DATABASE_URL": f"sqlite:///{work / 'ceiling.sqlite3'}"}
    token(ceiling_env["CAPNOTE_DATABASE_URL"], "submitter")  # creates and migrates it
    engines: list[tuple[str, str]] = [("SQLite", f"sqlite:///{work / 'post.sqlite3'}")]
    cluster = _postgres(work)
    if cluster is not None:
        engines.append(("PostgreSQL", cluster.url))
    else:
        report.notes.append(
            "PostgreSQL rows missing: no server binaries (apt-get install postgresql)"
        )
    try:
        tokens = {name: token(url, "submitter") for name, url in engines}
        for round_no in range(plan.rounds):
            for workers in (1, 2):
                with app_server("bench.ceiling_app:create", work, workers, ceiling_env) as port:
                    runs = rps.setdefault(f"ceiling {workers}w", {})
                    for conns in plan.connections:
                        tag = f"c{round_no}{workers}{conns}-"
                        _keep_best(
                            runs,
                            conns,
                            load(post_job(port, "/bench/echo", conns, plan, plain, tag)),
                        )
                for engine_name, url in engines:
                    runs = rps.setdefault(f"{engine_name} {workers}w", {})
                    with capnote_server(url, work, workers) as port:
                        for conns in plan.connections:
                            tag = f"{engine_name[0]}{round_no}{workers}{conns}-"
                            job = post_job(
                                port, "/notes", conns, plan, auth(tokens[engine_name]), tag
                            )
                            _keep_best(runs, conns, load(job))
        for workers in (1, 2):
            for conns in plan.connections:
                r = rps[f"ceiling {workers}w"][conns]
                report.load_row("POST raw body (ceiling)", f"{workers} worker(s)", conns, r, "")
        for engine_name, _url in engines:
            for workers in (1, 2):
                for conns in plan.connections:
                    r = rps[f"{engine_name} {workers}w"][conns]
                    ceiling = rps[f"ceiling {workers}w"][conns]["rps"]
                    report.load_row(
                        "POST /notes",
                        f"{engine_name}, {workers} worker(s)",
                        conns,
                        r,
                        f"{ratio(r['rps'], ceiling):.2f} of ceiling",
                    )
        sqlite_url = engines[0][1]
        rps["r4b"] = _r4b_check(plan, report, work, sqlite_url, tokens["SQLite"], rps["SQLite 1w"])
        _shipped_two_workers(plan, report, work, sqlite_url, tokens["SQLite"])
    finally:
        if cluster is not None:
            cluster.stop()
    report.notes.append(
        f"POST rows of the ceiling and capnote: the best of {plan.rounds} round(s), measured "
        "in turn (ceiling, SQLite, PostgreSQL, for 1 then 2 workers, round after round)."
    )
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
                f"capnote {ratio(mine, r['rps']):.1f}x this",
            )
    sqlite1 = best(rps["SQLite 1w"])
    report.target(
        "POST /notes SQLite 1 worker / ceiling 1 worker (best req/s of each)",
        ratio(sqlite1, best(rps["ceiling 1w"])),
        ">= 0.4",
        ratio(sqlite1, best(rps["ceiling 1w"])) >= 0.4,
    )
    report.target(
        "POST /notes SQLite 1 worker / obvious implementation",
        ratio(sqlite1, best(rps["obvious"])),
        ">= 5",
        ratio(sqlite1, best(rps["obvious"])) >= 5,
    )
    for engine_name, _url in engines:
        scale = ratio(best(rps[f"{engine_name} 2w"]), best(rps[f"{engine_name} 1w"]))
        report.target(
            f"POST /notes {engine_name} 2 workers / 1 worker", scale, ">= 1.8", scale >= 1.8
        )
    statuses = [
        r["statuses"]
        for key, runs in rps.items()
        if key != "obvious" and not key.startswith("ceiling")
        for r in runs.values()
    ]
    report.notes.append(
        "Every POST /notes answered 201 (a new note stored): "
        + ("yes" if all(set(s) == {"201"} for s in statuses) else f"NO: {statuses}")
        + "."
    )


def _r4b_check(
    plan: Plan, report: Report, work: Path, url: str, tok: str, bindings: dict[int, Any]
) -> dict[int, dict[str, Any]]:
    """POST /notes with CAPNOTE_OUTPUT_CHECK=r4b: every Bundle through the R4B models too."""
    out = {}
    with capnote_server(url, work, 1, {"CAPNOTE_OUTPUT_CHECK": "r4b"}) as port:
        for conns in plan.connections:
            r = load(post_job(port, "/notes", conns, plan, auth(tok), f"r{conns}-"))
            out[conns] = r
            report.load_row(
                "POST /notes, output checked with R4B",
                "SQLite, 1 worker(s)",
                conns,
                r,
                f"{ratio(r['rps'], bindings[conns]['rps']):.2f} of the default (bindings only)",
            )
    return out


def _shipped_two_workers(plan: Plan, report: Report, work: Path, url: str, tok: str) -> None:
    """`capnote serve --workers 2` itself, as an operator starts it (its own uvicorn set-up
    and migration step), to show it performs as the harness's two workers do."""
    with shipped_server(url, work, 2) as port:
        for conns in plan.connections[1:]:
            r = load(post_job(port, "/notes", conns, plan, auth(tok), f"x{conns}-"))
            report.load_row("POST /notes, `capnote serve --workers 2`", "SQLite", conns, r, "")


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


def fill(service: NoteService, start: int, stop: int, template: str) -> None:
    """Store notes start..stop-1: the first through NoteService.submit (POST /notes' path),
    the rest prepared by the same code (NoteService.prepare) and written 500 to a
    transaction (Store.write_many), checked against the first.

    Submitting 100,000 notes one transaction each would take most of the run's time; the
    reads measured afterwards see the same rows either way.
    """
    who = Principal(label="bench loader", role="submitter")

    async def load_all() -> None:
        nonlocal start
        if start == 0:
            _created, stored = await service.submit(_note_text(template, 0).encode(), who)
            _new, again = _prepared(service, _note_text(template, 0).encode(), who)
            if again.result != stored.result or again.bundle_json != stored.bundle_json:
                raise RuntimeError("bulk rows differ from what NoteService.submit stores")
            start = 1
        for first in range(start, stop, 500):
            batch = [
                _prepared(service, _note_text(template, i).encode(), who)[0]
                for i in range(first, min(first + 500, stop))
            ]
            await service.store.write_many(batch, forward=False)

    asyncio.run(load_all())


def _prepared(service: NoteService, payload: bytes, who: Principal) -> Any:
    """What NoteService.submit stores for a new note with no earlier sessions."""
    note, findings = check_payload(payload, Context(service.assessor.policy, NOW))
    assert note is not None
    note_json = note.model_dump_json(exclude_none=True)
    change = Change(
        note_key(note), note, note_json, findings, (), Version(1), note.status, None, "create"
    )
    return service.prepare(change, who)


_READS = {
    "check": "POST /notes/check",
    "read": "GET /fhir/Procedure/{id}",
    "search": "GET /fhir/Procedure?patient:identifier=",
}


def _read_jobs(template: str, size: int) -> dict[str, list[tuple[str, str, str]]]:
    """The requests of each read at one store size: 200 notes and patients spread over the
    whole store, so that reads do not hit one page."""
    system = json.loads(template)["patient"]["system"]
    picks = [int(k * (size - 1) / 199) for k in range(200)]
    check_body = template.replace(f"LN-{MARK}", "LN-CHECK").replace(
        f"PT-{MARK}", f"PT-S{(size // 2) // 2:07d}"
    )
    return {
        "check": [("POST", "/notes/check", check_body)],
        "read": [("GET", f"/fhir/Procedure/{_key(template, i)}", "") for i in picks],
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


def _snapshot(source: Path, target: Path) -> None:
    """A consistent copy of a SQLite database, its WAL included (the backup API)."""
    with (
        contextlib.closing(sqlite3.connect(source)) as src,
        contextlib.closing(sqlite3.connect(target)) as dst,
    ):
        src.backup(dst)


def part_store(plan: Plan, report: Report, work: Path) -> None:
    """POST /notes/check, GET /fhir/Procedure/{id} and a patient search as the store grows."""
    print("part 2: the store grows")
    path = work / "store.sqlite3"
    url = f"sqlite:///{path}"
    tok = token(url, "clinician")
    migrate(url)
    store = open_store(url)
    service = NoteService(store, Assessor(load_policy()), lambda: NOW)
    template = note_template()
    stores: dict[int, Path] = {}
    stored = 0
    for size in plan.store_sizes:
        began = time.perf_counter()
        fill(service, stored, size, template)
        load_seconds = time.perf_counter() - began
        print(f"  stored {size:,} notes ({(size - stored) / load_seconds:,.0f}/s)")
        stored = size
        # Each size is kept, so that all are measured in turn; the largest is the store itself.
        stores[size] = path if size == plan.store_sizes[-1] else work / f"store-{size}.sqlite3"
        if stores[size] != path:
            _snapshot(path, stores[size])
    sample = asyncio.run(service.get(_key(template, stored - 1)))
    problems = validate_resource(orjson.loads(sample.bundle_json))
    report.notes.append(
        "A stored Bundle read back after loading validates with the R4B models and the "
        f"required bindings: {'yes' if not problems else f'NO, {problems[:3]}'}."
    )
    asyncio.run(store.aclose())
    # Every size is served at once. Each read is measured at every size back to back, in short
    # runs, round after round: the machine's speed drifts (by half, between spells of tens of
    # seconds), so sizes are compared within a round, where they ran seconds apart, and the
    # target is the median of the rounds' ratios; the table shows each size's best p50.
    fastest: dict[tuple[str, int], dict[str, Any]] = {}
    ratios: dict[str, list[float]] = {name: [] for name in _READS}
    small, large = plan.store_sizes[0], plan.store_sizes[-1]
    jobs = {size: _read_jobs(template, size) for size in plan.store_sizes}
    with contextlib.ExitStack() as servers:
        ports = {
            size: servers.enter_context(capnote_server(f"sqlite:///{copy}", work, 1))
            for size, copy in stores.items()
        }
        for _round in range(plan.read_rounds):
            for name in _READS:
                p50: dict[int, float] = {}
                for size, port in ports.items():
                    r = load(
                        {
                            "host": "127.0.0.1",
                            "port": port,
                            "connections": 1,
                            "requests": plan.max_requests,
                            "seconds": plan.read_seconds,
                            "items": jobs[size][name],
                            "headers": auth(tok),
                            "warmup": 20,
                        }
                    )
                    print(f"  {_READS[name]} | {size:,} notes | p50 {r['p50_ms']:.2f} ms")
                    p50[size] = r["p50_ms"]
                    kept = fastest.get((name, size))
                    if kept is None or r["p50_ms"] < kept["p50_ms"]:
                        fastest[name, size] = r
                ratios[name].append(p50[large] / p50[small])
    for size in plan.store_sizes:
        for name, label in _READS.items():
            report.load_row(label, f"{size:,} notes stored (SQLite)", 1, fastest[name, size], "")
    report.notes.append(
        f"Reads at each store size: every size served at once; in each of {plan.read_rounds} "
        "round(s) each read runs at every size back to back. The rows show each size's best "
        "p50; a store-size target is the median of the rounds' own ratios (each round's are "
        "printed beside it)."
    )
    for name, label in _READS.items():
        ratio = statistics.median(ratios[name])
        each = ", ".join(f"{x:.2f}" for x in ratios[name])
        report.target(
            f"{label} p50 at {large:,} / at {small:,} notes (median of rounds: {each})",
            ratio,
            "<= 1.3",
            ratio <= 1.3,
        )


def _key(template: str, i: int) -> str:
    """The id capnote gives the i-th stored note (its Procedure's id on the read API)."""
    note, _findings = check_payload(_note_text(template, i).encode(), Context(load_policy(), NOW))
    assert note is not None
    return note_key(note)


# --- part 3: capnote check over NDJSON -------------------------------------------------------


def part_ndjson(plan: Plan, report: Report, work: Path) -> None:
    """`capnote check` over NDJSON against a bare parse loop over the same lines."""
    print("part 3: capnote check over NDJSON")
    empty = work / "empty.ndjson"
    empty.write_text("")
    check = (CAPNOTE_ENTRY, "check", "--now", NOW_TEXT)
    bare = (str(ROOT / "bench" / "bare_parse.py"),)
    peaks: dict[int, int] = {}
    ratio = 0.0
    for size in plan.ndjson_sizes:
        path = work / f"notes-{size}.ndjson"
        write_ndjson(path, size)
        # The two commands in turn, round after round, each keeping its best: a slow spell of
        # the machine then falls on both instead of on one. Start-up (imports, policy) is
        # paid once per process: measured on an empty file and taken off, so notes/s is the
        # streaming rate itself. Wall time is in the table too.
        runs: dict[str, list[Timed]] = {"check": [], "bare": [], "check0": [], "bare0": []}
        for _ in range(plan.rounds + 1):
            runs["check0"].append(timed(*check, str(empty)))
            runs["check"].append(timed(*check, str(path)))
            runs["bare0"].append(timed(*bare, str(empty)))
            runs["bare"].append(timed(*bare, str(path)))
        fastest = {k: min(v, key=lambda t: t.wall) for k, v in runs.items()}
        check_rate = size / max(fastest["check"].wall - fastest["check0"].wall, 1e-9)
        bare_rate = size / max(fastest["bare"].wall - fastest["bare0"].wall, 1e-9)
        ratio = check_rate / bare_rate
        check_peak = max(t.peak_mib for t in runs["check"])
        bare_peak = max(t.peak_mib for t in runs["bare"])
        peaks[size] = check_peak
        report.rows.append(
            (
                "capnote check NDJSON",
                f"{size:,} notes",
                "-",
                f"{check_rate:,.0f}",
                "-",
                "-",
                f"{fastest['check'].wall:.1f} s wall incl. {fastest['check0'].wall:.1f} s "
                f"start-up; peak {check_peak} MiB; {ratio:.2f} of the bare loop",
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
                f"{fastest['bare'].wall:.1f} s wall incl. {fastest['bare0'].wall:.1f} s start-up; "
                f"peak {bare_peak} MiB",
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
    report.notes.append(
        f"capnote check and the bare loop: the best of {plan.rounds + 1} runs each, in turn; "
        "peak memory is each process's own (VmHWM, through bench/peak.py), the highest of its "
        "runs."
    )


# --- part 4: emission alone ------------------------------------------------------------------


def part_emission(plan: Plan, report: Report) -> None:
    """capnote's emission (with each output check) against the floor of building the same
    dicts and serialising them with orjson, and against the R4B classes; in-process."""
    print("part 4: emission")
    from bench.obvious_app import r4b_bundle

    result = Assessor(load_policy()).assess(TEMPLATE.read_bytes(), NOW)
    assert result.note is not None
    assert result.derived is not None
    note, derived, due = result.note, result.derived, list(result.due)
    serialised = orjson.dumps(result.bundle)

    def rate(work: Any, times: int) -> float:
        began = time.perf_counter()
        for _ in range(times):
            work()
        return times / (time.perf_counter() - began)

    # The floor: the same dicts made by orjson's C parser (no Python per element), dumped.
    floor = rate(lambda: orjson.dumps(orjson.loads(serialised)), plan.emissions)
    rates = {
        "emit(), bindings check (default) + orjson": rate(
            lambda: orjson.dumps(emit(note, derived, due).bundle), plan.emissions
        ),
        "emit(), R4B check + orjson": rate(
            lambda: orjson.dumps(emit(note, derived, due, check=OutputCheck.R4B).bundle),
            plan.r4b_emissions,
        ),
        "R4B classes + model_dump_json (obvious)": rate(
            lambda: r4b_bundle(note, derived, due).model_dump_json(exclude_none=True),
            plan.r4b_emissions,
        ),
    }
    entries = len(result.bundle["entry"]) if result.bundle else 0
    report.rows.append(
        (
            "emission floor: the same dicts (orjson.loads) + orjson.dumps",
            f"{entries}-entry Bundle",
            "-",
            f"{floor:,.0f}",
            "-",
            "-",
            "",
        )
    )
    for name, value in rates.items():
        report.rows.append(
            (
                f"emission: {name}",
                f"{entries}-entry Bundle",
                "-",
                f"{value:,.0f}",
                "-",
                "-",
                f"{value / floor:.2f} of the floor",
            )
        )
        print(f"  {name}: {value:,.0f}/s ({value / floor:.2f} of the floor)")


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
    started = datetime.now()  # the machine's local time names the file
    began = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="capnote-bench-") as tmp:
        work = Path(tmp)
        part_post(plan, report, work)
        part_store(plan, report, work)
        part_ndjson(plan, report, work)
        part_emission(plan, report)
    report.notes += [
        f"The load generator ({driver()}, one thread, keep-alive, 1 s of warm-up before each "
        f"run) runs on the same {info['cores']} cores as the servers, and PostgreSQL's server "
        "processes too: every number is the whole machine's.",
        "The ceiling is capnote's own app (same middleware) with a bare route that answers "
        "with the raw body (bench/ceiling_app.py).",
        "Every POST /notes carries a new note of a new patient (note_id.value and "
        "patient.value numbered from examples/notes/right-routine.json), so every request "
        "stores: one note version (its Bundle compressed), its search rows and an audit "
        "entry.",
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
    title = f"capnote benchmark, {started:%Y-%m-%d %H:%M}, {kind}"
    text = report.markdown(info, title, time.perf_counter() - began)
    print()
    print(text)
    out_dir = args.out or (
        Path(tempfile.gettempdir()) / "capnote-bench" if args.smoke else ROOT / "bench" / "results"
    )
    out_dir.mkdir(parents=True, exist_ok=True)
    suffix = "-smoke" if args.smoke else ""
    # Named by the start's date and time, so that runs of one day sit side by side.
    stamp = started.strftime("%Y-%m-%d-%H%M")
    out = out_dir / f"{stamp}-{machine_slug(info)}{suffix}.md"
    out.write_text(text)
    print(f"written to {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
