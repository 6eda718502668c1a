"""What every part of the benchmark shares: the machine's description, servers in their own
processes, load runs (wrk, or bench/loadgen.py without it), notes to send, and the table."""

from __future__ import annotations

import asyncio
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
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:  # run as `python bench/run.py`: the repository is the root
    sys.path.insert(0, str(ROOT))


from bench import wrk  # noqa: E402
from capnote.store.database import migrate, open_store  # noqa: E402

PYTHON = sys.executable
CAPNOTE = [PYTHON, "-c", "from capnote.cli import main; main()"]
CAPNOTE_ENTRY = "capnote.cli:main"  # for timed(): the same command, run through bench/peak.py
TEMPLATE = ROOT / "examples" / "notes" / "right-routine.json"
# The demo notes are set in late November 2026; every check runs as if on this day.
NOW = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)
NOW_TEXT = NOW.isoformat()
MARK = "__N__"  # replaced by a number unique to each request or stored note


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


@dataclass(frozen=True)
class Timed:
    """One command's wall time, its own peak memory and its exit code."""

    wall: float
    peak_mib: int
    code: int


def timed(target: str, *args: str) -> Timed:
    """Run a script (`path.py`) or an entry point (`module:function`) in a new process.

    The peak is the command's own (bench/peak.py explains why rusage cannot give it). An
    exit code other than 0 or 1 (1: findings with errors) is a failure of the benchmark.
    """
    with tempfile.TemporaryDirectory(prefix="capnote-peak-") as tmp:
        out = Path(tmp) / "peak"
        argv = [PYTHON, str(ROOT / "bench" / "peak.py"), str(out), target, *args]
        began = time.perf_counter()
        proc = subprocess.run(  # noqa: S603 (argv built here from constants)
            argv, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, check=False
        )
        wall = time.perf_counter() - began
        if proc.returncode not in (0, 1):
            raise RuntimeError(f"{argv} exited {proc.returncode}: {proc.stderr.decode()[-2000:]}")
        return Timed(wall, int(out.read_text()) // 1024, proc.returncode)


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
    # capnote's source folder first (a checkout's own code, installed or not), then bench.
    full_env = {**os.environ, **env, "PYTHONPATH": f"{ROOT / 'service'}{os.pathsep}{ROOT}"}
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


def capnote_server(
    url: str, workdir: Path, workers: int, env: dict[str, str] | None = None
) -> contextlib.AbstractContextManager[int]:
    """capnote's app factory, served by bench/serve_app.py like every app here (the database
    is migrated beforehand, as `capnote serve` does before it starts its workers)."""
    return app_server(
        "capnote.app:app_from_environment",
        workdir,
        workers,
        {"CAPNOTE_DATABASE_URL": url, "CAPNOTE_MIGRATE_ON_START": "false", **(env or {})},
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


def driver() -> str:
    """The load generator this run uses."""
    return "wrk" if wrk.available() else "bench/loadgen.py"


def load(job: dict[str, Any]) -> dict[str, Any]:
    """One bounded load run from a separate process: wrk when installed (a few microseconds
    of CPU per request), else bench/loadgen.py (asyncio, about a hundred)."""
    if wrk.available():
        return wrk.run(job)
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


def write_ndjson(path: Path, lines: int) -> None:
    """Distinct notes; every 10th has a warning (an IOP rise) and every 25th an error."""
    template = note_template()
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


def token(url: str, role: str) -> str:
    """A fresh bearer token in the database at url (migrated first)."""
    migrate(url)

    async def make() -> str:
        store = open_store(url)
        try:
            text, _id = await store.new_token(role, f"bench {role}", NOW)
            return text
        finally:
            await store.aclose()

    return asyncio.run(make())


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
