"""What a batch shows while it runs, and how it stops: the progress bar, signals, a closed pipe.

The bar is for a person at a terminal: it is drawn on standard error only when that is a
terminal, so a log file or a pipe gets nothing extra. SIGTERM and Ctrl-C unwind the command
(its reports are dropped in their finally blocks, so no hidden .part file stays); a reader
that goes away (`| head`) is noticed once and standard output silenced after it.
"""

from __future__ import annotations

import contextlib
import os
import signal
import sys
import time
from collections.abc import Iterable, Iterator
from types import FrameType

from rich.console import Console
from rich.progress import (
    BarColumn,
    Progress,
    TaskID,
    TextColumn,
    TimeRemainingColumn,
)

from capnote.batch.inputs import STDIN, Record, Source

# Exit codes beyond 0-3 (capnote.cli): the shell's own for a death by signal, 128 + its number,
# so a script tells "stopped" from "errors found" (1).
BROKEN_PIPE = 128 + signal.SIGPIPE
INTERRUPTED = 128 + signal.SIGINT
TERMINATED = 128 + signal.SIGTERM
_EVERY = 0.1  # seconds between redraws: a record takes 0.1 ms, a redraw far more


class Stopped(BaseException):
    """The command was told to stop (SIGTERM, or Ctrl-C): a BaseException, so no
    `except Exception` on the way up swallows it, and every finally block runs."""

    def __init__(self, name: str, code: int) -> None:
        super().__init__(name)
        self.name = name
        self.code = code


def _terminate(signum: int, frame: FrameType | None) -> None:
    raise Stopped("SIGTERM", TERMINATED)


@contextlib.contextmanager
def stoppable() -> Iterator[None]:
    """SIGTERM and Ctrl-C become Stopped for the command inside, which then cleans up."""
    previous = signal.signal(signal.SIGTERM, _terminate)
    try:
        yield
    except KeyboardInterrupt:
        raise Stopped("Ctrl-C", INTERRUPTED) from None
    finally:
        signal.signal(signal.SIGTERM, previous)


def silence_stdout() -> None:
    """Point standard output at /dev/null, so nothing written after a broken pipe (nor the
    interpreter's last flush) raises again."""
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, sys.stdout.fileno())
    os.close(devnull)


class StdoutGuard:
    """Calls that write to standard output, until the reader goes away."""

    def __init__(self) -> None:
        self.closed = False

    def write(self, text: str) -> None:
        """Write unless the pipe has closed; a BrokenPipeError closes it."""
        if self.closed:
            return
        try:
            sys.stdout.write(text)
        except BrokenPipeError:
            self.close()

    def flush(self) -> None:
        """Flush unless the pipe has closed."""
        if self.closed:
            return
        try:
            sys.stdout.flush()
        except BrokenPipeError:
            self.close()

    def close(self) -> None:
        """Note that the reader went away, and silence what follows."""
        self.closed = True
        silence_stdout()


def input_size(sources: Iterable[Source]) -> int | None:
    """Bytes of input, when every source is a file whose size is known (not stdin)."""
    total = 0
    for source in sources:
        if source.path == STDIN:
            return None
        try:
            total += source.path.stat().st_size
        except OSError:
            return None
    return total


class Bar:
    """A progress bar on standard error: records done, records per second, and the time
    left when the input's size is known; nothing at all unless standard error is a
    terminal and the command is not quiet."""

    def __init__(self, sources: list[Source], quiet: bool) -> None:
        self.shown = not quiet and sys.stderr.isatty()
        self.total = input_size(sources) if self.shown else None
        console = Console(stderr=True)
        columns = [TextColumn("checking"), BarColumn()] if self.total is not None else []
        columns += [
            TextColumn("{task.fields[done]:,} records"),
            TextColumn("{task.fields[rate]:,.0f} records/s"),
        ]
        if self.total is not None:
            columns.append(TimeRemainingColumn())
        # Standard output through the bar's console only when it is the same terminal: a
        # redirected one must stay a clean file.
        self.progress = Progress(
            *columns,
            console=console,
            transient=True,
            disable=not self.shown,
            redirect_stdout=sys.stdout.isatty(),
            redirect_stderr=False,
        )
        self.task: TaskID | None = None
        self.done = 0
        self._began = 0.0
        self._drawn = 0.0

    def __enter__(self) -> Bar:
        self.progress.__enter__()
        self.task = self.progress.add_task("checking", total=self.total, done=0, rate=0.0)
        self._began = self._drawn = time.monotonic()
        return self

    def __exit__(self, *exc: object) -> None:
        self.progress.__exit__(None, None, None)

    def follow(self, records: Iterable[Record]) -> Iterator[Record]:
        """The records, counted as they pass."""
        if not self.shown or self.task is None:
            yield from records
            return
        read = 0
        for record in records:
            self.done += 1
            read += record.size
            now = time.monotonic()
            if now - self._drawn >= _EVERY:
                self._drawn = now
                rate = self.done / max(now - self._began, 1e-6)
                self.progress.update(self.task, completed=read, done=self.done, rate=rate)
            yield record
