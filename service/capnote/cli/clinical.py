"""The clinical audit at the command line: `capnote audit` writes the report of a period as
HTML or CSV; `capnote demo-data` loads the invented audit year (capnote.audit.demo_year).

Exit codes as for every command (capnote.cli): 0 written, 2 usage or configuration error.
"""

from __future__ import annotations

import os
import tempfile
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import orjson
import typer

from capnote.cli.operator import _with_store
from capnote.config import Settings

if TYPE_CHECKING:  # the store loads only for the commands that need it (not for check)
    from capnote.store.base import Store

_DATE = ["%Y-%m-%d"]


def audit(
    start: Annotated[
        datetime, typer.Option("--from", formats=_DATE, help="First day (YYYY-MM-DD), UTC.")
    ],
    end: Annotated[
        datetime, typer.Option("--to", formats=_DATE, help="Last day (YYYY-MM-DD), included.")
    ],
    report: Annotated[Path, typer.Option(help="Where to write it: a .html or .csv file.")],
    site: Annotated[str | None, typer.Option(help="One unit's code (its location id).")] = None,
    clinician: Annotated[
        str | None,
        typer.Option(help="One clinician: staff identifier system|value, or the value alone."),
    ] = None,
) -> None:
    """Write the clinical audit of the final sessions of a period: local figures set against
    published series (differences in case mix explain much; local governance decides)."""
    from capnote.audit.render import csv_text, html_page
    from capnote.audit.report import build, period

    kind = report.suffix.lower()
    if kind not in (".html", ".csv"):
        raise typer.BadParameter(
            f"the report's name ends {kind or 'without a suffix'}; allowed: .html or .csv",
            param_hint="--report",
        )
    first, last = start.date(), end.date()
    if last < first:
        raise typer.BadParameter(
            f"--to {last} is before --from {first}; the period runs from --from to --to",
            param_hint="--to",
        )
    since, until = period(first, last)

    async def work(store: Store) -> str:
        groups = await store.audit_figures(since, until, site)
        built = build(groups, first, last, site, clinician)
        return html_page(built) if kind == ".html" else csv_text(built)

    text = _with_store(work, migrate=True)
    _write(report, text)
    typer.echo(f"audit of {first} to {last} written to {report}")


def _write(path: Path, text: str) -> None:
    """Write whole or not at all: a temporary file beside it, renamed over it."""
    folder = path.parent if str(path.parent) else Path(".")
    handle, temporary = tempfile.mkstemp(dir=folder, prefix=".capnote-audit-")
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as out:
            out.write(text)
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


def demo_data(
    sessions: Annotated[
        int, typer.Option(min=1, max=20_000, help="How many invented sessions.")
    ] = 2000,
) -> None:
    """Load the invented audit year (two units, four clinicians, one clinician's IOP rises
    set high on purpose) into the settings' database, for trying `capnote audit`."""
    from capnote.app import create_app
    from capnote.audit.demo_year import reviews as invented_reviews
    from capnote.audit.demo_year import sessions as invented
    from capnote.errors import InputError
    from capnote.notes import Principal

    settings = Settings()
    from capnote.cli.operator import _migrated

    _migrated(settings.database_url)
    state = create_app(settings.model_copy(update={"migrate_on_start": False})).state
    notes, review_service = state.notes, state.reviews
    who = Principal(label="audit demo loader", role="submitter")

    async def load() -> tuple[int, int]:
        stored = reviewed = 0
        try:
            made = list(invented(sessions))
            for note in made:
                created, _ = await notes.submit(orjson.dumps(note), who)
                stored += created
            for review in invented_reviews(made, review_service.clock()):
                try:
                    created, _ = await review_service.submit(orjson.dumps(review), who)
                except InputError:
                    continue  # a session kept otherwise (as a draft): no review of it
                reviewed += created
        finally:
            await notes.store.aclose()
        return stored, reviewed

    import asyncio

    stored, reviewed = asyncio.run(load())
    typer.echo(
        f"{stored} invented sessions stored ({sessions - stored} were there already); "
        f"{reviewed} new review records"
    )
