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
# A whole .json file is one record too, and validating a resource takes about twenty times
# its size in memory (a 14 MB Bundle took 305 MB): the same bound as a line.
MAX_FILE_BYTES = MAX_LINE_BYTES
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
    size: int = 0  # bytes of input behind the record, for a progress bar's time left
    offset: int = 0  # where the record's line starts in its file, to read it again

    @property
    def empty(self) -> bool:
        """True for the marker of an NDJSON file that held no record at all."""
        return self.data is None and self.failure is None


@dataclass(frozen=True, slots=True)
class Skipped:
    """Something a folder walk passed over, and why."""

    path: Path
    reason: str

    @property
    def name(self) -> str:
        """The path as reports show it."""
        return str(self.path)


# Why a walk passes something over, as the summary and the report say it.
HIDDEN = "hidden"
OTHER_ENDING = "not .json or .ndjson"
LINKED_FOLDER = "a symbolic link to a folder (not followed)"
NOT_A_FILE = "not a regular file"


@dataclass(frozen=True, slots=True)
class Inputs:
    """The files a batch reads, in order, and what the folder walks skipped."""

    sources: list[Source]
    skipped: list[Skipped]


def _walk(folder: Path, skipped: list[Skipped]) -> list[Path]:
    """Every .json and .ndjson file under folder, in name order; what is left out goes into
    skipped (hidden files and folders, other endings, links to folders)."""
    found: list[tuple[tuple[str, ...], Path]] = []
    passed: list[tuple[tuple[str, ...], Skipped]] = []
    # Symbolic links to folders are not followed: a link back up the tree would never end.
    for top, dirs, files in os.walk(folder):
        here = Path(top)
        for d in list(dirs):
            if d.startswith("."):
                path = here / d
                passed.append((path.relative_to(folder).parts, Skipped(path, HIDDEN)))
        dirs[:] = [d for d in dirs if not d.startswith(".")]
        # os.walk lists a link to a folder among the folders and never enters it.
        for d in dirs:
            path = here / d
            if path.is_symlink():
                passed.append((path.relative_to(folder).parts, Skipped(path, LINKED_FOLDER)))
        for name in files:
            path = here / name
            parts = path.relative_to(folder).parts
            if name.startswith("."):
                passed.append((parts, Skipped(path, HIDDEN)))
            elif not name.lower().endswith(FOLDER_SUFFIXES):
                passed.append((parts, Skipped(path, OTHER_ENDING)))
            elif not path.is_file():
                passed.append((parts, Skipped(path, NOT_A_FILE)))
            else:
                found.append((parts, path))
    # Sorting by path parts keeps a folder's files together and the order the same on every
    # machine, whatever order the file system lists them in.
    skipped.extend(item for _parts, item in sorted(passed, key=lambda kv: kv[0]))
    return [path for _parts, path in sorted(found)]


def gather(paths: Sequence[Path], ndjson: bool = False, exclude: Iterable[Path] = ()) -> Inputs:
    """The files behind the command line's paths, in order, and what folder walks skipped.

    A named file is read line by line when it ends in .ndjson or ndjson is set; files found in
    a folder by their ending alone; standard input (``-``) always line by line. Paths in
    exclude (an output file inside an input folder) are left out.
    """
    skip = {p.resolve() for p in exclude}
    sources: list[Source] = []
    skipped: list[Skipped] = []
    for path in paths:
        if path == STDIN:
            sources.append(Source(STDIN, True))
        elif path.is_dir():
            passed: list[Skipped] = []
            found = [p for p in _walk(path, passed) if p.resolve() not in skip]
            if not found:
                raise UsageError(
                    f"folder {path} holds no .json or .ndjson files (hidden ones are skipped)"
                )
            skipped.extend(passed)
            sources.extend(Source(p, p.suffix.lower() == NDJSON_SUFFIX) for p in found)
        elif path.exists():
            sources.append(Source(path, ndjson or path.suffix.lower() == NDJSON_SUFFIX))
        else:
            raise UsageError(f"{path} does not exist")
    if sum(1 for s in sources if s.path == STDIN) > 1:
        raise UsageError("standard input (-) can be named once")
    return Inputs(sources, skipped)


def expand(
    paths: Sequence[Path], ndjson: bool = False, exclude: Iterable[Path] = ()
) -> list[Source]:
    """The files behind the command line's paths, in order (gather() without the skipped)."""
    return gather(paths, ndjson, exclude).sources


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


def _too_large() -> Finding:
    return Finding(
        severity=Severity.ERROR,
        code="file-too-large",
        location="",
        message=f"the file is larger than {MAX_FILE_BYTES // (1024 * 1024)} MiB; not read",
        rule="a .json file holds one note or resource",
        allowed=f"up to {MAX_FILE_BYTES // (1024 * 1024)} MiB",
        issue_type="too-costly",
    )


def _lines(source: Source, stream: BinaryIO) -> Iterator[Record]:
    """The non-blank lines of an NDJSON stream, numbered from 1 as an editor numbers them."""
    number = 0
    found = False
    offset = 0
    while line := stream.readline(MAX_LINE_BYTES + 1):
        number += 1
        if len(line) > MAX_LINE_BYTES:
            size = len(line)
            while not line.endswith(b"\n") and (line := stream.readline(MAX_LINE_BYTES)):
                size += len(line)  # the rest of the overlong line, read in bounded pieces
            found = True
            yield Record(source, number, None, _too_long(), size, offset)
            offset += size
            continue
        raw = line.strip()
        if number == 1 and raw.startswith(_BOM):  # RFC 8259 lets a reader ignore a BOM
            raw = raw[len(_BOM) :].strip()
        if raw:  # blank lines separate nothing in NDJSON: skipped, not counted, still numbered
            found = True
            yield Record(source, number, raw, None, len(line), offset)
        offset += len(line)
    if not found:  # named in the summary and the report, rather than passing unnoticed
        yield Record(source, None, None)


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
                data = stream.read(MAX_FILE_BYTES + 1)
            except OSError as exc:  # a folder named as a file, or an I/O error
                reason = f"the file cannot be read: {exc.strerror}"
                yield Record(source, None, None, unreadable(reason))
                continue
            if len(data) > MAX_FILE_BYTES:
                yield Record(source, None, None, _too_large(), len(data))
                continue
            size = len(data)
            if data.startswith(_BOM):  # as on an NDJSON line: RFC 8259 lets a reader ignore it
                data = data[len(_BOM) :]
            yield Record(source, None, data, None, size)
