"""The command line: a thin layer over service.assess and service.fhir.validate.

Exit codes: 0 no file has an error; 1 some file has an error; 2 usage or configuration
error; 3 an unexpected failure (a generic message with an incident id, never a traceback).
"""

from __future__ import annotations

import asyncio
import logging
import os
import signal
import sys
import threading
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Annotated, Any

import orjson
import typer
from rich.progress import Progress
from sqlalchemy import Engine
from sqlmodel import Session

from schemas.export import write_schemas
from service import serving
from service.assess import Assessor
from service.config import Settings, effective_policy
from service.delivery import DeliveryWorker
from service.derive import Derived
from service.errors import CapnoteError
from service.fhir.outcome import incident_outcome, outcome
from service.fhir.validate import validate_resource
from service.findings import Finding, Severity, has_errors
from service.notes import Principal
from service.report import CAUTION, derived_lines, due_line, finding_line, summary
from service.rules import Context, check_payload
from service.schedule import DueItem
from service.store import outbox, repository
from service.store.database import make_engine, upgrade

log = logging.getLogger("capnote.cli")
DEMO_NOTES = Path(__file__).resolve().parents[1] / "examples" / "notes"
app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    help="capnote: check, derive and emit Nd:YAG posterior capsulotomy notes as FHIR R4.",
)

Files = Annotated[
    list[Path],
    typer.Argument(exists=True, dir_okay=False, readable=True, help="Note or FHIR JSON files."),
]
PolicyOption = Annotated[
    Path | None,
    typer.Option("--policy", exists=True, dir_okay=False, help="Site policy TOML file."),
]
NowOption = Annotated[
    datetime | None,
    typer.Option(
        "--now",
        formats=["%Y-%m-%dT%H:%M:%S%z", "%Y-%m-%dT%H:%M%z"],
        help="Treat this as the present time (ISO 8601 with offset); default: the clock.",
    ),
]


@dataclass(frozen=True, slots=True)
class Checked:
    """One file's result: a note's assessment or a FHIR resource's findings."""

    path: Path
    kind: str
    findings: list[Finding]
    derived: Derived | None = None
    due: tuple[DueItem, ...] = ()


def _assessor(policy_file: Path | None) -> Assessor:
    settings = Settings()
    if policy_file is not None:
        settings = settings.model_copy(update={"policy_file": policy_file})
    return Assessor(effective_policy(settings))


def _present(now: datetime | None) -> datetime:
    return now if now is not None else datetime.now(UTC)


def check_file(path: Path, assessor: Assessor, now: datetime) -> Checked:
    """Check one file as a FHIR resource when it has a resourceType, else as a note."""
    try:
        raw = path.read_bytes()
    except OSError as exc:
        finding = Finding(
            Severity.ERROR,
            "file-unreadable",
            "",
            f"the file cannot be read: {exc.strerror}",
            "input files are readable",
            issue_type="exception",
        )
        return Checked(path, "file", [finding])
    try:
        data = orjson.loads(raw)
    except orjson.JSONDecodeError:
        data = None
    if isinstance(data, dict) and "resourceType" in data:
        return Checked(path, "fhir", validate_resource(data))
    result = assessor.assess(raw, now)
    return Checked(path, "note", result.findings, result.derived, result.due)


def _print_text(checked: Checked) -> None:
    errors = sum(1 for f in checked.findings if f.severity is Severity.ERROR)
    state = "FAILED" if errors else "ok"
    typer.echo(f"{checked.path} ({checked.kind}): {state}")
    for f in checked.findings:
        typer.echo(finding_line(f))
    if checked.derived is not None:
        for line in derived_lines(checked.derived):
            typer.echo(line)
    if checked.due:
        typer.echo("  follow-up:")
        for item in checked.due:
            typer.echo("  " + due_line(item))


def _json_report(results: list[Checked]) -> bytes:
    report = {
        "resourceType": "Bundle",
        "type": "collection",
        "entry": [
            {"fullUrl": r.path.resolve().as_uri(), "resource": outcome(r.findings)} for r in results
        ],
    }
    return orjson.dumps(report, option=orjson.OPT_INDENT_2)


@app.command()
def check(
    files: Files,
    policy: PolicyOption = None,
    now: NowOption = None,
    output_format: Annotated[
        str, typer.Option("--format", help="text (default) or json (OperationOutcomes).")
    ] = "text",
    ndjson: Annotated[
        bool,
        typer.Option(
            "--ndjson",
            help="Read every file as NDJSON (one note or FHIR resource per line), as files "
            "ending .ndjson always are.",
        ),
    ] = False,
) -> None:
    """Validate notes, or FHIR R4 resources and Bundles; exit 1 when any file has an error."""
    if output_format not in ("text", "json"):
        raise typer.BadParameter("use text or json", param_hint="--format")
    streamed = [ndjson or path.suffix.lower() == ".ndjson" for path in files]
    if any(streamed):
        if output_format == "json" and not all(streamed):
            # One stream on stdout: NDJSON records and a pretty Bundle cannot share it.
            raise typer.BadParameter(
                "takes either JSON files or NDJSON files, not both", param_hint="--format json"
            )
        _check_streaming(files, streamed, _assessor(policy), _present(now), output_format)
        return
    assessor = _assessor(policy)
    moment = _present(now)
    results: list[Checked] = []
    show_progress = len(files) > 1 and sys.stderr.isatty()
    with Progress(transient=True, disable=not show_progress) as progress:
        task = progress.add_task("checking", total=len(files))
        for path in files:
            results.append(check_file(path, assessor, moment))
            progress.advance(task)
    if output_format == "json":
        sys.stdout.buffer.write(_json_report(results) + b"\n")
    else:
        for r in results:
            _print_text(r)
        typer.echo(summary([r.findings for r in results]))
        typer.echo(CAUTION)
    if any(has_errors(r.findings) for r in results):
        raise typer.Exit(1)


@dataclass(slots=True)
class Tally:
    """What a streaming check keeps: counters only, so memory stays flat however long the
    input is."""

    records: int = 0
    failed: int = 0
    errors: int = 0
    warnings: int = 0
    information: int = 0

    def add(self, findings: list[Finding]) -> None:
        """Count one record's findings."""
        self.records += 1
        errors = 0
        for f in findings:
            if f.severity is Severity.ERROR:
                errors += 1
            elif f.severity is Severity.WARNING:
                self.warnings += 1
            else:
                self.information += 1
        self.errors += errors
        self.failed += 1 if errors else 0

    def summary(self, files: int) -> str:
        """The closing line: records (lines and JSON files) rather than files."""
        return (
            f"{self.records} record(s) in {files} file(s): {self.records - self.failed} "
            f"without errors, {self.failed} with errors; {self.errors} error(s), "
            f"{self.warnings} warning(s), {self.information} information"
        )


def check_record(raw: bytes, assessor: Assessor, ctx: Context) -> tuple[str, list[Finding]]:
    """One NDJSON line: ("fhir", findings) when it is a FHIR resource, else ("note", ...).

    Only the findings are computed: a streamed check prints nothing else, so deriving,
    scheduling and emitting each note would cost four fifths of the time for no output.
    """
    # Parsing every line twice would halve the speed; a line that could be a FHIR resource
    # names resourceType (or escapes a character, which might spell it).
    if b"resourceType" in raw or b"\\u" in raw:
        try:
            data = orjson.loads(raw)
        except orjson.JSONDecodeError:
            data = None
        if isinstance(data, dict) and "resourceType" in data:
            return "fhir", validate_resource(data)
    _note, findings = check_payload(raw, ctx)
    return "note", findings


def _check_streaming(
    files: list[Path],
    streamed: list[bool],
    assessor: Assessor,
    now: datetime,
    output_format: str,
) -> None:
    """Check NDJSON files line by line (and any JSON files among them), printing as it goes.

    Text: a line per finding, located as file:line and the finding's path, and only for
    records with findings; json: one {"file", "line", "outcome"} object per input line.
    """
    ctx = Context(assessor.policy, now)
    tally = Tally()
    write = sys.stdout.write
    as_json = output_format == "json"
    for path, is_stream in zip(files, streamed, strict=True):
        if not is_stream:
            checked = check_file(path, assessor, now)
            tally.add(checked.findings)
            _print_text(checked)
            continue
        try:
            stream = path.open("rb")
        except OSError as exc:
            unreadable = Finding(
                Severity.ERROR,
                "file-unreadable",
                "",
                f"the file cannot be read: {exc.strerror}",
                "input files are readable",
                issue_type="exception",
            )
            tally.add([unreadable])
            if as_json:
                record: dict[str, Any] = {
                    "file": str(path),
                    "line": None,
                    "outcome": outcome([unreadable]),
                }
                write(orjson.dumps(record).decode() + "\n")
            else:
                write(f"{path}: {finding_line(unreadable).lstrip()}\n")
            continue
        with stream:
            for number, line in enumerate(stream, 1):
                raw = line.strip()
                if not raw:  # blank lines separate nothing in NDJSON; skipped, not counted
                    continue
                _kind, findings = check_record(raw, assessor, ctx)
                tally.add(findings)
                if as_json:
                    record = {"file": str(path), "line": number, "outcome": outcome(findings)}
                    write(orjson.dumps(record).decode() + "\n")
                else:
                    for f in findings:
                        write(f"{path}:{number}: {finding_line(f).lstrip()}\n")
    if not as_json:
        write(tally.summary(len(files)) + "\n")
        write(CAUTION + "\n")
    sys.stdout.flush()
    if tally.failed:
        raise typer.Exit(1)


@app.command()
def emit(
    file: Annotated[Path, typer.Argument(exists=True, dir_okay=False)],
    policy: PolicyOption = None,
    now: NowOption = None,
) -> None:
    """Print the FHIR R4 transaction Bundle for a note (the same bytes for the same note)."""
    result = _assessor(policy).assess(file.read_bytes(), _present(now))
    if result.bundle is None:
        for f in result.findings:
            if f.blocking:
                typer.echo(finding_line(f), err=True)
        typer.echo(f"{file}: not emitted, the note has errors", err=True)
        raise typer.Exit(1)
    sys.stdout.buffer.write(orjson.dumps(result.bundle, option=orjson.OPT_INDENT_2) + b"\n")


@app.command()
def schema(
    out: Annotated[Path, typer.Option(help="Folder to write the schema files to.")] = Path(
        "schemas"
    ),
) -> None:
    """Write the note contract's JSON Schema and the project CodeSystem."""
    for path in write_schemas(out):
        typer.echo(f"wrote {path}")


token_app = typer.Typer(help="Bearer tokens: new, list, revoke.", no_args_is_help=True)
db_app = typer.Typer(help="The database: upgrade to the newest schema.", no_args_is_help=True)
app.add_typer(token_app, name="token")
app.add_typer(db_app, name="db")
ROLES = ("submitter", "clinician", "analyst", "auditor")


def _engine() -> Engine:
    return make_engine(Settings().database_url)


@db_app.command("upgrade")
def db_upgrade() -> None:
    """Apply every migration the database lacks (the service also does this on start)."""
    upgrade(_engine())
    typer.echo("database is at the newest schema")


@token_app.command("new")
def token_new(
    role: Annotated[str, typer.Option(help="submitter, clinician, analyst or auditor.")],
    label: Annotated[str, typer.Option(help="Who or what holds it, e.g. 'EHR interface'.")],
) -> None:
    """Create a token and print it once; only its hash is kept."""
    if role not in ROLES:
        raise typer.BadParameter(f"use one of {', '.join(ROLES)}", param_hint="--role")
    engine = _engine()
    upgrade(engine)
    with Session(engine) as session:
        token, row = repository.new_token(session, role, label, datetime.now(UTC))
        session.commit()
        typer.echo(f"token {row.id} ({role}, {label}); shown once, keep it safe:")
    typer.echo(token)


@token_app.command("list")
def token_list() -> None:
    """Every token: id, role, label, created, revoked (never the token itself)."""
    engine = _engine()
    upgrade(engine)
    with Session(engine) as session:
        for row in repository.list_tokens(session):
            state = f"revoked {row.revoked_at:%Y-%m-%d}" if row.revoked_at else "live"
            typer.echo(f"{row.id}\t{row.role}\t{row.label}\t{row.created_at:%Y-%m-%d}\t{state}")


@token_app.command("revoke")
def token_revoke(token_id: Annotated[int, typer.Argument(help="The id from token list.")]) -> None:
    """Revoke a token: it answers 401 from now on."""
    engine = _engine()
    with Session(engine) as session:
        if not repository.revoke_token(session, token_id, datetime.now(UTC)):
            typer.echo(f"no live token {token_id}", err=True)
            raise typer.Exit(1)
        session.commit()
    typer.echo(f"token {token_id} revoked")


outbox_app = typer.Typer(help="Forwarding outbox: list, retry, park.", no_args_is_help=True)
app.add_typer(outbox_app, name="outbox")


@outbox_app.command("list")
def outbox_list(
    state: Annotated[
        str | None, typer.Option(help="pending, delivering, delivered, failed.")
    ] = None,
    limit: Annotated[int, typer.Option(min=1, max=10_000)] = 50,
) -> None:
    """Outbox entries, newest first: id, note, version, state, attempts, last answer."""
    with Session(_engine()) as session:
        for e in outbox.listing(session, state, limit):
            typer.echo(
                f"{e.id}\t{e.note_key}\tv{e.version}\t{e.state}\t{e.attempts}\t"
                f"{e.last_status or ''}"
            )


def _set_entry(entry_id: int, state: str) -> None:
    with Session(_engine()) as session:
        if not outbox.operator_set(session, entry_id, state, datetime.now(UTC)):
            typer.echo(f"no undelivered outbox entry {entry_id}", err=True)
            raise typer.Exit(1)
    typer.echo(f"outbox entry {entry_id}: {state}")


@outbox_app.command("retry")
def outbox_retry(entry_id: Annotated[int, typer.Argument(help="The id from outbox list.")]) -> None:
    """Send a parked or waiting entry again, now."""
    _set_entry(entry_id, outbox.PENDING)


@outbox_app.command("park")
def outbox_park(entry_id: Annotated[int, typer.Argument(help="The id from outbox list.")]) -> None:
    """Stop trying an entry; it stays, marked failed, for a person to look at."""
    _set_entry(entry_id, outbox.FAILED)


@app.command()
def deliver(
    once: Annotated[bool, typer.Option(help="Deliver what is due now, then stop.")] = False,
) -> None:
    """Run the delivery worker alone (CAPNOTE_FORWARD_URL and its credentials set)."""
    settings = Settings()
    receiver = settings.receiver()
    if receiver is None:
        raise typer.BadParameter("set CAPNOTE_FORWARD_URL first", param_hint="settings")
    engine = make_engine(settings.database_url)
    upgrade(engine)
    worker = DeliveryWorker(engine, receiver)
    try:
        if once:
            typer.echo(f"{worker.run_once()} entries tried")
            return
        stop = threading.Event()
        signal.signal(signal.SIGTERM, lambda *_: stop.set())
        typer.echo(f"delivering to {receiver.base_url} (Ctrl-C to stop)")
        try:
            worker.run_forever(stop)
        except KeyboardInterrupt:
            stop.set()
    finally:
        worker.close()


@app.command()
def serve(
    host: Annotated[str, typer.Option(help="Address to listen on.")] = "127.0.0.1",
    port: Annotated[int, typer.Option(help="Port to listen on.")] = 8000,
    workers: Annotated[int, typer.Option(min=1, max=64, help="Worker processes.")] = 1,
    demo: Annotated[bool, typer.Option(help="Load the demo notes and print a demo token.")] = False,
) -> None:
    """Run the REST service (SQLite file capnote.sqlite3 here unless CAPNOTE_DATABASE_URL)."""
    settings = Settings()
    engine = make_engine(settings.database_url)
    upgrade(engine)  # once, here, so that workers never race to migrate
    if demo:
        _load_demo(settings, engine)
    os.environ["CAPNOTE_MIGRATE_ON_START"] = "false"
    typer.echo(f"capnote serving on http://{host}:{port} (API docs at /docs)")
    serving.run("service.app:app_from_environment", host, port, workers)


def _load_demo(settings: Settings, engine: Engine) -> None:
    """Store the example notes and print a clinician token to try the API with."""
    from service.app import create_app

    notes = create_app(settings.model_copy(update={"migrate_on_start": False})).state.notes
    who = Principal(label="demo loader", role="submitter")
    demo = sorted(DEMO_NOTES.glob("*.json"))
    if not demo:  # an installed wheel has no examples/: say so rather than serve nothing
        raise typer.BadParameter(
            f"no demo notes in {DEMO_NOTES}; run from a checkout", param_hint="--demo"
        )

    async def load() -> None:
        for path in demo:
            await notes.submit(path.read_bytes(), who)

    try:
        asyncio.run(load())
    finally:
        notes.ledger.close()
    with Session(engine) as session:
        token, _row = repository.new_token(session, "clinician", "demo", datetime.now(UTC))
        session.commit()
    typer.echo(f"demo notes loaded; demo clinician token: {token}")


def main() -> None:
    """Entry point: run the app; turn every failure into a message and an exit code."""
    try:
        # Standalone mode: the framework answers usage errors with exit 2 and its own message.
        app()
    except CapnoteError as exc:
        typer.echo(f"capnote: {exc.message}", err=True)
        sys.exit(2)
    except Exception:
        incident, _ = incident_outcome()
        # Debug level: the terminal gets the incident id only; operators who turn logging on
        # get the details.
        log.debug("unexpected failure, incident %s", incident, exc_info=True)
        typer.echo(f"capnote: unexpected failure (incident {incident})", err=True)
        sys.exit(3)
