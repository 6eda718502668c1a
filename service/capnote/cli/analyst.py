"""The analyst's commands: check and emit, one note or a batch, and the schema files.

The work is done in capnote.batch; these functions read options, wire the parts and turn the
outcome into an exit code.
"""

from __future__ import annotations

import sys
from datetime import datetime
from pathlib import Path
from typing import Annotated

import orjson
import typer
from rich.progress import Progress

from capnote import __version__
from capnote.assess import Assessor
from capnote.batch.checking import Checker, Tally
from capnote.batch.emitting import EmitTally, emit_records
from capnote.batch.inputs import STDIN, STDIN_NAME, Source, expand, records
from capnote.batch.listing import BundleListing, Listing, NdjsonListing, TextListing
from capnote.batch.output import AtomicFile, ReportWriter, RunInfo
from capnote.batch.reports import open_report, report_format
from capnote.cli.options import NowOption, PolicyOption, assessor, present
from capnote.plain_text import finding_line
from capnote.schema_files import write_schemas

_PICKED_UP = (
    "A folder is searched recursively, in name order, for *.json files (one note or FHIR "
    "resource each) and *.ndjson files (one per line); hidden files and folders are skipped."
)
# Existence is checked by capnote.batch.inputs.expand, which knows that - is standard input
# (typer's own check, as of 0.29, refuses - even with allow_dash).
CheckInputs = Annotated[
    list[Path],
    typer.Argument(
        readable=True,
        show_default=False,
        help="Note or FHIR JSON files, NDJSON files, folders, or - for standard input "
        f"(NDJSON). {_PICKED_UP}",
    ),
]
EmitInputs = Annotated[
    list[Path],
    typer.Argument(
        readable=True,
        show_default=False,
        help=f"Note files, NDJSON files of notes, folders, or - for standard input. {_PICKED_UP}",
    ),
]


def _listing(output_format: str, streamed: bool) -> Listing:
    # Bound to sys.stdout as it is now: inside a shown progress bar that is rich's proxy.
    if output_format == "text":
        return TextListing(sys.stdout)
    return NdjsonListing(sys.stdout) if streamed else BundleListing(sys.stdout)


def check(
    inputs: CheckInputs,
    policy: PolicyOption = None,
    now: NowOption = None,
    output_format: Annotated[
        str, typer.Option("--format", help="text (default) or json (OperationOutcomes).")
    ] = "text",
    ndjson: Annotated[
        bool,
        typer.Option(
            "--ndjson",
            help="Read every named file as NDJSON (one note or FHIR resource per line), as "
            "files ending .ndjson always are.",
        ),
    ] = False,
    report: Annotated[
        Path | None,
        typer.Option(
            "--report",
            dir_okay=False,
            help="Also write a report to this file: .html or .htm (one self-contained page: "
            "counts, findings by code and severity, a chart, every finding) or .csv (a row "
            "per finding). It appears whole or not at all.",
        ),
    ] = None,
    report_format_name: Annotated[
        str | None,
        typer.Option("--report-format", help="html or csv, when the file name does not say."),
    ] = None,
) -> None:
    """Validate notes, or FHIR R4 resources and Bundles; exit 1 when any record has an error."""
    started = datetime.now().astimezone()
    if output_format not in ("text", "json"):
        raise typer.BadParameter("use text or json", param_hint="--format")
    fmt = report_format(report, report_format_name) if report is not None else None
    sources = expand(inputs, ndjson)
    streamed = any(s.streamed for s in sources)
    if output_format == "json" and streamed and not all(s.streamed for s in sources):
        # One stream on stdout: NDJSON records and a pretty Bundle cannot share it.
        raise typer.BadParameter(
            "takes either JSON files or NDJSON files, not both", param_hint="--format json"
        )
    assessing = assessor(policy)
    moment = present(now)
    writer = open_report(report, fmt) if report is not None and fmt is not None else None
    tally = Tally()
    try:
        _run_check(Checker(assessing, moment), sources, output_format, streamed, writer, tally)
        if writer is not None:
            writer.commit(
                RunInfo(
                    inputs=tuple(STDIN_NAME if p == STDIN else str(p) for p in inputs),
                    files=len(sources),
                    tally=tally,
                    started=started,
                    as_at=moment,
                    policy=assessing.policy.policy_name,
                    version=__version__,
                )
            )
    finally:
        if writer is not None:
            writer.discard()  # nothing left to drop once committed
    if writer is not None:
        typer.echo(f"report written to {writer.target}", err=True)
    if tally.failed:
        raise typer.Exit(1)


def _run_check(
    checker: Checker,
    sources: list[Source],
    output_format: str,
    streamed: bool,
    writer: ReportWriter | None,
    tally: Tally,
) -> None:
    """Every record through the checker, into the tally, the listing and the report."""
    # A bar counts whole files; a streamed file's lines are too many to count beforehand.
    show = not streamed and len(sources) > 1 and sys.stderr.isatty()
    with Progress(transient=True, disable=not show) as progress:
        task = progress.add_task("checking", total=len(sources))
        listing = _listing(output_format, streamed)
        for result in checker.results(records(sources)):
            tally.add(result.findings)
            listing.add(result)
            if writer is not None:
                writer.add(result)
            if show:
                progress.advance(task)
    listing.close(tally, len(sources), streamed)
    sys.stdout.flush()


def emit(
    inputs: EmitInputs,
    policy: PolicyOption = None,
    now: NowOption = None,
    ndjson: Annotated[
        bool,
        typer.Option(
            "--ndjson",
            help="Write one compact Bundle per line, and read every named file as NDJSON (one "
            "note per line). Several inputs, folders, .ndjson files and - give one Bundle per "
            "line anyway; named .json files are then read whole.",
        ),
    ] = False,
    out: Annotated[
        Path | None,
        typer.Option(
            "--out",
            dir_okay=False,
            help="Write to this file instead of standard output; it appears whole or not at all.",
        ),
    ] = None,
) -> None:
    """Print a note's FHIR R4 transaction Bundle, or one Bundle per line for a batch."""
    sources = expand(inputs, ndjson, exclude=[out] if out is not None else [])
    batch = (
        ndjson
        or len(sources) > 1
        or any(s.streamed for s in sources)
        or any(p.is_dir() for p in inputs)
    )
    if batch:
        _emit_batch(sources, assessor(policy), present(now), out)
    else:
        _emit_one(sources[0], policy, now, out)


def _emit_one(source: Source, policy: Path | None, now: datetime | None, out: Path | None) -> None:
    """One note file: the Bundle, pretty-printed, or its errors and exit 1."""
    record = next(records([source]))
    if record.data is None:
        findings = [record.failure] if record.failure is not None else []
    else:
        result = assessor(policy).assess(record.data, present(now))
        if result.bundle is not None:
            text = orjson.dumps(result.bundle, option=orjson.OPT_INDENT_2) + b"\n"
            if out is None:
                sys.stdout.buffer.write(text)
                return
            with AtomicFile(out) as target:
                target.binary.write(text)
                target.commit()
            return
        findings = [f for f in result.findings if f.blocking]
    for f in findings:
        typer.echo(finding_line(f), err=True)
    typer.echo(f"{source.shown}: not emitted, the note has errors", err=True)
    raise typer.Exit(1)


def _emit_batch(
    sources: list[Source], assessing: Assessor, moment: datetime, out: Path | None
) -> None:
    """A Bundle per clean note, one per line; errors on stderr as file:line: finding."""
    target = AtomicFile(out) if out is not None else None
    sink = target.binary if target is not None else sys.stdout.buffer
    tally = EmitTally()
    try:
        for item in emit_records(records(sources), assessing, moment):
            tally.add(item)
            if item.bundle is not None:
                sink.write(item.bundle)
                sink.write(b"\n")
            else:
                sys.stderr.write("".join(line + "\n" for line in item.error_lines()))
        if target is not None:
            target.commit()
        else:
            sink.flush()
    finally:
        if target is not None:
            target.discard()  # nothing left to drop once committed
    typer.echo(tally.summary(len(sources)), err=True)
    if tally.skipped:
        raise typer.Exit(1)


def schema(
    out: Annotated[Path, typer.Option(help="Folder to write the schema files to.")] = Path(
        "schemas"
    ),
) -> None:
    """Write the note contract's JSON Schema and the project CodeSystem."""
    for path in write_schemas(out):
        typer.echo(f"wrote {path}")
