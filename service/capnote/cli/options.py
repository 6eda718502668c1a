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
NowOption = Annotated[
    datetime | None,
    typer.Option(
        "--now",
        formats=["%Y-%m-%dT%H:%M:%S%z", "%Y-%m-%dT%H:%M%z"],
        help="Treat this as the present time (ISO 8601 with offset); default: the clock.",
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
