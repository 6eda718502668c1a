"""Run a command in this process and write its own peak memory (VmHWM) to a file at exit.

The kernel's rusage of a child is no use here: a child started by fork (or vfork) and exec
reports as its ru_maxrss the peak of the parent it was copied from, so every command timed by
the benchmark showed the benchmark's own size. VmHWM in /proc/self/status belongs to the
memory map that exec made, so it is the command's own peak.

    python bench/peak.py OUT_FILE script.py ARGS...      (a script, run as __main__)
    python bench/peak.py OUT_FILE module:function ARGS... (a console entry point)
"""

from __future__ import annotations

import atexit
import importlib
import runpy
import sys
from pathlib import Path


def peak_kib() -> int:
    """This process's peak resident set, in KiB (Linux)."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1])
    raise RuntimeError("no VmHWM in /proc/self/status (this benchmark needs Linux)")


def main() -> None:
    """Run the command named on the command line; its exit status is kept."""
    out, target, *args = sys.argv[1:]
    atexit.register(lambda: Path(out).write_text(str(peak_kib())))
    sys.argv = [target, *args]
    if target.endswith(".py"):
        sys.path.insert(0, str(Path(target).resolve().parent))
        runpy.run_path(target, run_name="__main__")
        return
    module, function = target.split(":")
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    getattr(importlib.import_module(module), function)()


if __name__ == "__main__":
    main()
