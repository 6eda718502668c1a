"""What every report shares: the atomic file it is written through, the facts of the run,
and one row per finding."""

from __future__ import annotations

import io
import os
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from types import TracebackType
from typing import BinaryIO, Protocol, Self, TextIO

from capnote.batch.checking import RecordResult, Tally
from capnote.batch.inputs import Skipped
from capnote.errors import UsageError
from capnote.findings import Finding


def writable_target(target: Path) -> Path:
    """The target, after making sure a file can be written there; a UsageError if not."""
    if target.is_dir():
        raise UsageError(f"{target} is a folder; name a file to write")
    parent = target.parent
    if not parent.is_dir():
        raise UsageError(f"folder {parent} does not exist; cannot write {target}")
    return target


class AtomicFile:
    """A file written under a hidden temporary name beside its target and renamed over it
    only when complete, so that no reader (nor a crash) ever sees half of it.

    The temporary file sits in the target's folder because a rename is only atomic within
    one file system. It is created readable by its owner alone (mkstemp's 0600), which suits
    reports about patient records.
    """

    def __init__(self, target: Path) -> None:
        self.target = writable_target(target)
        try:
            handle, name = tempfile.mkstemp(
                prefix=f".{target.name}.", suffix=".part", dir=target.parent
            )
        except OSError as exc:
            raise UsageError(f"cannot write {target}: {exc.strerror}") from exc
        self.temp = Path(name)
        self.binary: BinaryIO = os.fdopen(handle, "wb")
        self._text: io.TextIOWrapper | None = None
        self.done = False

    def text(self) -> TextIO:
        """A UTF-8 text view of the file (newlines written as given)."""
        if self._text is None:
            self._text = io.TextIOWrapper(self.binary, encoding="utf-8", newline="")
        return self._text

    def commit(self) -> None:
        """Flush to disk, then put the file in place of the target in one step."""
        if self._text is not None:
            self._text.flush()
        self.binary.flush()
        # Without the fsync a power cut soon after the rename can leave an empty target.
        os.fsync(self.binary.fileno())
        self.binary.close()
        os.replace(self.temp, self.target)
        self.done = True

    def discard(self) -> None:
        """Drop the temporary file; the target stays as it was."""
        if self.done:
            return
        try:
            self.binary.close()
        finally:
            self.temp.unlink(missing_ok=True)
        self.done = True

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        error: BaseException | None,
        trace: TracebackType | None,
    ) -> None:
        self.discard()  # a no-op after commit


@dataclass(frozen=True, slots=True)
class RunInfo:
    """The facts a report's header states about the run."""

    inputs: tuple[str, ...]
    files: int
    tally: Tally
    started: datetime
    as_at: datetime
    policy: str
    version: str
    skipped: tuple[Skipped, ...] = ()


@dataclass(frozen=True, slots=True)
class Row:
    """One finding of one record, with where it was found."""

    file: str
    line: int | None
    kind: str
    finding: Finding
    identifier: str | None = None


def rows(result: RecordResult) -> Iterator[Row]:
    """The rows of one result, in the order its findings came."""
    name = result.source.name
    for f in result.findings:
        yield Row(name, result.line, result.kind, f, result.identifier)


class ReportWriter(Protocol):
    """A report being written: rows go in as results pass, the whole lands at commit."""

    target: Path

    def add(self, result: RecordResult) -> None:
        """Take one record's result."""

    def commit(self, run: RunInfo) -> None:
        """Finish the report and put it in place of the target."""

    def discard(self) -> None:
        """Drop everything written so far; the target stays as it was."""
