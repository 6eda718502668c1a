"""Inputs of a batch: files, folders and standard input, as one ordered stream of records.

A record is a whole JSON file or one line of an NDJSON file. Records are read one at a time,
so a batch of a million lines needs the memory of one line.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

from capnote.errors import UsageError
from capnote.findings import Finding, Severity
from capnote.plain_text import printable

STDIN = Path("-")
STDIN_NAME = "<stdin>"
# What a folder walk picks up, and how each kind is read.
JSON_SUFFIX = ".json"
NDJSON_SUFFIX = ".ndjson"
FOLDER_SUFFIXES = (JSON_SUFFIX, NDJSON_SUFFIX)
# A note is a few kB and a Bundle under 100 kB; a longer line is refused unread, so that one
# hostile line cannot take the memory a million ordinary ones do not.
MAX_LINE_BYTES = 16 * 1024 * 1024
_BOM = b"\xef\xbb\xbf"


@dataclass(frozen=True, slots=True)
class Source:
    """One input file (or standard input) and whether it is read line by line."""

    path: Path
    streamed: bool

    @property
    def name(self) -> str:
        """The name reports use: the path as given or found, or <stdin>."""
        return STDIN_NAME if self.path == STDIN else str(self.path)

    @property
    def shown(self) -> str:
        """The name as text output shows it: control characters escaped, so a file name
        cannot move a terminal's cursor (CSV, HTML and JSON escape in their own way)."""
        return printable(self.name)


@dataclass(frozen=True, slots=True)
class Record:
    """One thing to check: a whole JSON file (line None) or one NDJSON line.

    data is None when the input could not be read; failure then says why.
    """

    source: Source
    line: int | None
    data: bytes | None
    failure: Finding | None = None


def _walk(folder: Path) -> list[Path]:
    """Every .json and .ndjson file under folder, in name order, hidden ones left out."""
    found: list[tuple[tuple[str, ...], Path]] = []
    # Symbolic links to folders are not followed: a link back up the tree would never end.
    for top, dirs, files in os.walk(folder):
        dirs[:] = [d for d in dirs if not d.startswith(".")]
        here = Path(top)
        for name in files:
            if name.startswith(".") or not name.lower().endswith(FOLDER_SUFFIXES):
                continue
            path = here / name
            if path.is_file():
                found.append((path.relative_to(folder).parts, path))
    # Sorting by path parts keeps a folder's files together and the order the same on every
    # machine, whatever order the file system lists them in.
    return [path for _parts, path in sorted(found)]


def expand(
    paths: Sequence[Path], ndjson: bool = False, exclude: Iterable[Path] = ()
) -> list[Source]:
    """The files behind the command line's paths, in order; folders are walked.

    A named file is read line by line when it ends in .ndjson or ndjson is set; files found in
    a folder by their ending alone; standard input (``-``) always line by line. Paths in
    exclude (an output file inside an input folder) are left out.
    """
    skip = {p.resolve() for p in exclude}
    sources: list[Source] = []
    for path in paths:
        if path == STDIN:
            sources.append(Source(STDIN, True))
        elif path.is_dir():
            found = [p for p in _walk(path) if p.resolve() not in skip]
            if not found:
                raise UsageError(
                    f"folder {path} holds no .json or .ndjson files (hidden ones are skipped)"
                )
            sources.extend(Source(p, p.suffix.lower() == NDJSON_SUFFIX) for p in found)
        elif path.exists():
            sources.append(Source(path, ndjson or path.suffix.lower() == NDJSON_SUFFIX))
        else:
            raise UsageError(f"{path} does not exist")
    if sum(1 for s in sources if s.path == STDIN) > 1:
        raise UsageError("standard input (-) can be named once")
    return sources


def unreadable(reason: str) -> Finding:
    """The finding for an input that cannot be read."""
    return Finding(
        severity=Severity.ERROR,
        code="file-unreadable",
        location="",
        message=reason,
        rule="input files are readable",
        issue_type="exception",
    )


def _too_long() -> Finding:
    return Finding(
        severity=Severity.ERROR,
        code="line-too-long",
        location="",
        message=f"the line is longer than {MAX_LINE_BYTES // (1024 * 1024)} MiB; not read",
        rule="an NDJSON line holds one note or resource",
        issue_type="too-costly",
    )


def _lines(source: Source, stream: BinaryIO) -> Iterator[Record]:
    """The non-blank lines of an NDJSON stream, numbered from 1 as an editor numbers them."""
    number = 0
    while line := stream.readline(MAX_LINE_BYTES + 1):
        number += 1
        if len(line) > MAX_LINE_BYTES:
            while not line.endswith(b"\n") and (line := stream.readline(MAX_LINE_BYTES)):
                pass  # the rest of the overlong line, read in bounded pieces and dropped
            yield Record(source, number, None, _too_long())
            continue
        raw = line.strip()
        if number == 1 and raw.startswith(_BOM):  # RFC 8259 lets a reader ignore a BOM
            raw = raw[len(_BOM) :].strip()
        if raw:  # blank lines separate nothing in NDJSON: skipped, not counted, still numbered
            yield Record(source, number, raw)


def records(sources: Iterable[Source], stdin: BinaryIO | None = None) -> Iterator[Record]:
    """Every record of every source in order, read lazily."""
    for source in sources:
        if source.path == STDIN:
            yield from _lines(source, stdin if stdin is not None else sys.stdin.buffer)
            continue
        try:
            stream = source.path.open("rb")
        except OSError as exc:
            reason = f"the file cannot be read: {exc.strerror}"
            yield Record(source, None, None, unreadable(reason))
            continue
        with stream:
            if source.streamed:
                yield from _lines(source, stream)
                continue
            try:
                data = stream.read()
            except OSError as exc:  # a folder named as a file, or an I/O error
                reason = f"the file cannot be read: {exc.strerror}"
                yield Record(source, None, None, unreadable(reason))
                continue
            yield Record(source, None, data)
