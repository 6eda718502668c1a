"""Options and helpers that several commands share."""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path
from typing import Annotated

import typer

from capnote.assess import Assessor
from capnote.config import Settings, effective_policy

PolicyOption = Annotated[
    Path | None,
    typer.Option("--policy", exists=True, dir_okay=False, help="Site policy TOML file."),
]
_NOW_EXAMPLE = "2026-12-01T12:00:00+00:00"


def parse_now(text: str) -> datetime:
    """--now as an ISO 8601 date-time with its UTC offset; a clear refusal without one, since
    a bare time would be read in whatever zone the machine is set to."""
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        raise typer.BadParameter(
            f"{text!r} is not an ISO 8601 date-time; give one with its UTC offset, such as "
            f"{_NOW_EXAMPLE} or 2026-12-01T12:00Z"
        ) from None
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise typer.BadParameter(
            f"{text!r} needs a UTC offset (the time zone it is in), such as {_NOW_EXAMPLE} "
            "or 2026-12-01T12:00Z"
        )
    return moment


NowOption = Annotated[
    datetime | None,
    typer.Option(
        "--now",
        parser=parse_now,
        metavar="DATETIME",
        help="Treat this as the present time (ISO 8601 with its UTC offset, such as "
        f"{_NOW_EXAMPLE}); default: the clock.",
    ),
]


def assessor(policy_file: Path | None) -> Assessor:
    """An Assessor for the settings' policy, or for the file given on the command line."""
    settings = Settings()
    if policy_file is not None:
        settings = settings.model_copy(update={"policy_file": policy_file})
    return Assessor(effective_policy(settings))


def present(now: datetime | None) -> datetime:
    """The time given with --now, else the clock."""
    return now if now is not None else datetime.now(UTC)
