"""The command line: a thin layer over capnote.batch, capnote.assess and the store.

    analyst    check, emit, schema
    operator   serve, db, token, outbox, deliver
    options    what several commands share

Exit codes: 0 no record has an error; 1 some record has an error; 2 usage or configuration
error; 3 an unexpected failure (a generic message with an incident id, never a traceback);
as a shell reports a death by signal: 130 stopped by Ctrl-C, 141 standard output closed
early (a broken pipe), 143 stopped by SIGTERM.
"""

from __future__ import annotations

import logging
import sys

import typer

from capnote.cli import analyst, operator
from capnote.cli.progress import BROKEN_PIPE, Stopped, silence_stdout
from capnote.errors import CapnoteError
from capnote.fhir.outcome import incident_outcome

log = logging.getLogger("capnote.cli")
app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    help="capnote: check, derive and emit Nd:YAG posterior capsulotomy notes as FHIR R4.",
)
app.command()(analyst.check)
app.command()(analyst.emit)
app.command()(analyst.schema)
app.add_typer(operator.token_app, name="token")
app.add_typer(operator.db_app, name="db")
app.add_typer(operator.outbox_app, name="outbox")
app.command()(operator.deliver)
app.command()(operator.serve)


def main() -> None:
    """Entry point: run the app; turn every failure into a message and an exit code."""
    try:
        # Standalone mode: the framework answers usage errors with exit 2 and its own message.
        app()
    except CapnoteError as exc:
        typer.echo(f"capnote: {exc.message}", err=True)
        sys.exit(2)
    except Stopped as stop:
        # The command's finally blocks have dropped its temporary files on the way here.
        typer.echo(
            f"capnote: stopped by {stop.name}; unfinished reports and output files were removed",
            err=True,
        )
        sys.exit(stop.code)
    except BrokenPipeError:
        # The reader went away (`capnote emit big.ndjson | head`): not "errors found" (1).
        # Pointing stdout at /dev/null keeps the interpreter's final flush from raising again.
        silence_stdout()
        typer.echo("capnote: standard output was closed before the end (broken pipe)", err=True)
        sys.exit(BROKEN_PIPE)
    except Exception:
        incident, _ = incident_outcome()
        # Debug level: the terminal gets the incident id only; operators who turn logging on
        # get the details.
        log.debug("unexpected failure, incident %s", incident, exc_info=True)
        typer.echo(f"capnote: unexpected failure (incident {incident})", err=True)
        sys.exit(3)
