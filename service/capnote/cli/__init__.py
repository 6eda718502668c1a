"""The command line: a thin layer over capnote.batch, capnote.assess and the store.

    analyst    check, emit, schema
    operator   serve, db, token, outbox, deliver
    clinical   audit, demo-data
    options    what several commands share

Exit codes: 0 no record has an error; 1 some record has an error; 2 usage or configuration
error; 3 an unexpected failure (a generic message with an incident id, never a traceback);
as a shell reports a death by signal: 130 stopped by Ctrl-C, 141 standard output closed
early (a broken pipe), 143 stopped by SIGTERM.
"""

from __future__ import annotations

import logging
import os
import sys
from typing import Annotated

import typer
from pydantic import ValidationError

from capnote.cli import analyst, clinical, operator
from capnote.cli.progress import BROKEN_PIPE, Stopped, silence_stdout
from capnote.config import Settings
from capnote.errors import CapnoteError
from capnote.fhir.outcome import incident_outcome
from capnote.logs import LogFormat, LogLevel, configure
from capnote.plain_text import printable

log = logging.getLogger("capnote.cli")
app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    help="capnote: check, derive and emit Nd:YAG posterior capsulotomy notes as FHIR R4.",
)


@app.callback()
def options(
    log_level: Annotated[
        LogLevel | None,
        typer.Option(help="debug, info, warning or error (else CAPNOTE_LOG_LEVEL, info)."),
    ] = None,
    log_format: Annotated[
        LogFormat | None,
        typer.Option(help="text, or json for one JSON object a line (else CAPNOTE_LOG_FORMAT)."),
    ] = None,
) -> None:
    """capnote: check, derive and emit Nd:YAG posterior capsulotomy notes as FHIR R4."""
    # Through the environment, so that Settings and `serve`'s worker processes see them too.
    if log_level is not None:
        os.environ["CAPNOTE_LOG_LEVEL"] = log_level
    if log_format is not None:
        os.environ["CAPNOTE_LOG_FORMAT"] = log_format
    settings = Settings()
    configure(settings.log_level, settings.log_format)


app.command()(analyst.check)
app.command()(analyst.emit)
app.command()(analyst.schema)
app.add_typer(operator.token_app, name="token")
app.add_typer(operator.db_app, name="db")
app.add_typer(operator.outbox_app, name="outbox")
app.command()(operator.deliver)
app.command()(operator.serve)
app.command()(clinical.audit)
app.command("demo-data")(clinical.demo_data)


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
    except ValidationError as exc:
        if exc.title != Settings.__name__:
            _unexpected()
        # A CAPNOTE_ variable (or .env line) out of its range: configuration, said in a line.
        error = exc.errors(include_url=False)[0]
        name = "CAPNOTE_" + "_".join(str(p) for p in error["loc"][:1]).upper()
        more = f" (and {exc.error_count() - 1} more)" if exc.error_count() > 1 else ""
        typer.echo(f"capnote: setting {name}: {printable(error['msg'])}{more}", err=True)
        sys.exit(2)
    except BrokenPipeError:
        # The reader went away (`capnote emit big.ndjson | head`): not "errors found" (1).
        # Pointing stdout at /dev/null keeps the interpreter's final flush from raising again.
        silence_stdout()
        typer.echo("capnote: standard output was closed before the end (broken pipe)", err=True)
        sys.exit(BROKEN_PIPE)
    except Exception:
        _unexpected()


def _unexpected() -> None:
    """Exit 3 with an incident id; the traceback goes to the log at debug level only
    (--log-level debug or CAPNOTE_LOG_LEVEL=debug), since it may quote what was read."""
    incident, _ = incident_outcome()
    log.debug("unexpected failure, incident %s", incident, exc_info=True)
    typer.echo(f"capnote: unexpected failure (incident {incident})", err=True)
    sys.exit(3)
