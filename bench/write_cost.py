"""CPU per stored note, in-process on a fresh SQLite file: what indexing a note costs.

    python bench/write_cost.py [--notes 3000]

Submissions go through NoteService one at a time (no HTTP, no group commit), each note a
new patient (no recount), and the figure is the process's CPU time per note after 20 to
warm up: on a shared machine the wall clock drifts, CPU time much less. To compare two
versions of the code, run this with PYTHONPATH at each version's service/ folder, in turn.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import re
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

from capnote.assess import Assessor
from capnote.notes import NoteService, Principal
from capnote.policy import load_policy
from capnote.store.database import migrate, open_store

TEMPLATE = Path(__file__).resolve().parents[1] / "examples" / "notes" / "right-routine.json"
WARM = 20
_MOMENT = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}[+-]\d{2}:\d{2}$")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--notes", type=int, default=3000)
    args = parser.parse_args()
    base = json.loads(TEMPLATE.read_text())
    bodies = []
    for i in range(args.notes + WARM):
        # Sessions arrive in time order, a few minutes apart, as a clinic writes them.
        note = shifted(base, timedelta(minutes=5 * i) - timedelta(days=30))
        note["note_id"]["value"] = f"LN-W-{i}"
        note["patient"]["value"] = f"P-W-{i}"
        note["eye"] = "right" if i % 2 else "left"
        bodies.append(json.dumps(note).encode())
    with tempfile.TemporaryDirectory() as folder:
        url = f"sqlite:///{folder}/write-cost.sqlite3"
        migrate(url)
        service = NoteService(open_store(url), Assessor(load_policy()), time_now)
        who = Principal("bench", "submitter")
        with asyncio.Runner() as runner:
            for body in bodies[:WARM]:
                runner.run(service.submit(body, who))
            wall, cpu = time.perf_counter(), time.process_time()
            for body in bodies[WARM:]:
                runner.run(service.submit(body, who))
            wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
            runner.run(service.store.aclose())
    per_note = cpu / args.notes * 1e3
    print(f"{args.notes} notes: {per_note:.2f} ms CPU per note, {args.notes / wall:.0f}/s wall")


def shifted(node: Any, by: timedelta) -> Any:
    """A copy of a note with every date-time (not the dates) moved by the same amount."""
    if isinstance(node, dict):
        return {k: shifted(v, by) for k, v in node.items()}
    if isinstance(node, list):
        return [shifted(v, by) for v in node]
    if isinstance(node, str) and _MOMENT.match(node):
        return (datetime.fromisoformat(node) + by).isoformat()
    return node


def time_now() -> datetime:
    """The present the notes are checked against (after every demo session)."""
    return datetime(2026, 12, 1, 12, 0, tzinfo=UTC)


if __name__ == "__main__":
    main()
