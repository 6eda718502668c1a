"""The analyst's commands: check and emit, one note or a batch, and the schema files.

The work is done in capnote.batch; these functions read options, wire the parts and turn the
outcome into an exit code.
"""

from __future__ import annotations

import sys
from datetime import datetime
from pathlib import Path
from typing import Annotated, TextIO, cast

import orjson
import typer

from capnote import __version__
from capnote.assess import Assessor
from capnote.batch.checking import Checker, Tally, resource_type
from capnote.batch.emitting import EmitTally, emit_records, not_a_note
from capnote.batch.inputs import STDIN, STDIN_NAME, Skipped, Source, gather, records
from capnote.batch.listing import (
    BundleListing,
    Listing,
    NdjsonListing,
    SummaryListing,
    TextListing,
    summary_lines,
)
from capnote.batch.output import AtomicFile, ReportWriter, RunInfo
from capnote.batch.reports import open_report, report_format
from capnote.cli.options import NowOption, PolicyOption, assessor, present
from capnote.cli.progress import BROKEN_PIPE, Bar, StdoutGuard, silence_stdout, stoppable
from capnote.plain_text import finding_line, printable
from capnote.schema_files import write_schemas

_NAMED_SKIPPED = 20  # on standard error; a report names every one

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


def _listing(output_format: str, streamed: bool, out: TextIO, summary_to: TextIO) -> Listing:
    if output_format == "text":
        return TextListing(out, summary_to)
    return NdjsonListing(out) if streamed else BundleListing(out)


def check(
    inputs: CheckInputs,
    policy: PolicyOption = None,
    now: NowOption = None,
    output_format: Annotated[
        str | None,
        typer.Option(
            "--format",
            help="text (default) or json (OperationOutcomes) on standard output.",
            show_default=False,
        ),
    ] = None,
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
            "records with errors first, a table per file, findings by code and rule) or .csv "
            "(a row per finding). It appears whole or not at all. With a report, standard "
            "output gets the summary only, unless --print-findings or --format is given.",
        ),
    ] = None,
    report_format_name: Annotated[
        str | None,
        typer.Option("--report-format", help="html or csv, when the file name does not say."),
    ] = None,
    quiet: Annotated[
        bool,
        typer.Option("--quiet", "-q", help="Print the summary only: no findings, no progress."),
    ] = False,
    print_findings: Annotated[
        bool,
        typer.Option(
            "--print-findings", help="With --report, also print every finding, as without one."
        ),
    ] = False,
    csv_bom: Annotated[
        bool,
        typer.Option(
            "--csv-bom",
            help="Start a CSV report with a UTF-8 byte order mark, which some spreadsheet "
            "programs need to read UTF-8.",
        ),
    ] = False,
) -> None:
    """Validate notes, or FHIR R4 resources and Bundles; exit 1 when any record has an error."""
    started = datetime.now().astimezone()
    if output_format not in (None, "text", "json"):
        raise typer.BadParameter("use text or json", param_hint="--format")
    fmt = report_format(report, report_format_name) if report is not None else None
    found = gather(inputs, ndjson)
    sources = found.sources
    streamed = any(s.streamed for s in sources)
    if output_format == "json" and streamed and not all(s.streamed for s in sources):
        # One stream on stdout: NDJSON records and a pretty Bundle cannot share it.
        raise typer.BadParameter(
            "takes either JSON files or NDJSON files, not both", param_hint="--format json"
        )
    assessing = assessor(policy)
    moment = present(now)
    # The findings alone when asked for: with a report they are in it, and a terminal
    # flooded with 200,000 lines hides the counts.
    listed = not quiet and (report is None or print_findings or output_format is not None)
    tally = Tally(skipped=len(found.skipped))
    guard = StdoutGuard()
    with stoppable():
        writer = open_report(report, fmt, csv_bom) if report is not None and fmt else None
        try:
            _run_check(
                Checker(assessing, moment),
                sources,
                (output_format or "text") if listed else None,
                writer,
                tally,
                guard,
                quiet,
            )
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
                        skipped=tuple(found.skipped),
                    )
                )
        finally:
            if writer is not None:
                writer.discard()  # nothing left to drop once committed
    if found.skipped and report is None and not quiet:
        _name_skipped(found.skipped)
    if guard.closed:
        said = f"the report was written to {writer.target}" if writer else "no report was asked for"
        typer.echo(
            "capnote: standard output was closed before the end (broken pipe), so not every "
            f"finding was printed; {said}",
            err=True,
        )
        raise typer.Exit(BROKEN_PIPE)
    if writer is not None:
        typer.echo(f"report written to {writer.target}", err=True)
    if tally.failed:
        raise typer.Exit(1)


def _name_skipped(skipped: list[Skipped]) -> None:
    """What folder walks passed over, on standard error, when no report names it."""
    for item in skipped[:_NAMED_SKIPPED]:
        typer.echo(f"skipped: {printable(item.name)} ({item.reason})", err=True)
    if len(skipped) > _NAMED_SKIPPED:
        typer.echo(f"skipped: and {len(skipped) - _NAMED_SKIPPED} more", err=True)


def _run_check(
    checker: Checker,
    sources: list[Source],
    output_format: str | None,
    writer: ReportWriter | None,
    tally: Tally,
    guard: StdoutGuard,
    quiet: bool,
) -> None:
    """Every record through the checker, into the tally, the listing and the report.

    The summary goes to standard error when standard output is not a terminal (a file, a
    pager, a program), so the counts stay in sight; so does the summary of a JSON listing,
    whose standard output is JSON alone."""
    streamed = any(s.streamed for s in sources)
    summary_to = sys.stdout if sys.stdout.isatty() else sys.stderr
    with Bar(sources, quiet) as bar:
        # Bound to sys.stdout as it is now: inside a shown bar it may be rich's proxy.
        listing: Listing = (
            SummaryListing(summary_to)
            if output_format is None
            else _listing(output_format, streamed, cast(TextIO, guard), summary_to)
        )
        for result in checker.results(bar.follow(records(sources))):
            tally.take(result)
            listing.add(result)
            if writer is not None:
                writer.add(result)
            elif guard.closed:
                break  # nobody reads on, and there is no report to finish
    if guard.closed:
        return
    try:
        listing.close(tally, len(sources), streamed)
    except BrokenPipeError:
        guard.close()
    if output_format == "json" and not quiet:
        sys.stderr.write(summary_lines(tally, len(sources), streamed))
    guard.flush()


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
    found = gather(inputs, ndjson, exclude=[out] if out is not None else [])
    sources = found.sources
    batch = (
        ndjson
        or len(sources) > 1
        or any(s.streamed for s in sources)
        or any(p.is_dir() for p in inputs)
    )
    try:
        with stoppable():
            if batch:
                _emit_batch(sources, assessor(policy), present(now), out, found.skipped)
            else:
                _emit_one(sources[0], policy, now, out)
    except BrokenPipeError:
        # Caught here: the framework would answer a closed pipe with 1, "errors found".
        silence_stdout()
        typer.echo("capnote: standard output was closed before the end (broken pipe)", err=True)
        raise typer.Exit(BROKEN_PIPE) from None


def _emit_one(source: Source, policy: Path | None, now: datetime | None, out: Path | None) -> None:
    """One note file: the Bundle, pretty-printed, or its errors and exit 1."""
    record = next(records([source]))
    kind = resource_type(record.data) if record.data is not None else None
    if record.data is None:
        findings = [record.failure] if record.failure is not None else []
    elif kind is not None:
        findings = [not_a_note(kind)]
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
    what = "it is a FHIR resource" if kind is not None else "the note has errors"
    typer.echo(f"{source.shown}: not emitted, {what}", err=True)
    raise typer.Exit(1)


def _emit_batch(
    sources: list[Source],
    assessing: Assessor,
    moment: datetime,
    out: Path | None,
    skipped: list[Skipped],
) -> None:
    """A Bundle per clean note, one per line; errors on stderr as file:line: finding, and
    what folder walks skipped, named and counted."""
    target = AtomicFile(out) if out is not None else None
    sink = target.binary if target is not None else sys.stdout.buffer
    tally = EmitTally(skipped_files=len(skipped))
    _name_skipped(skipped)
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
