"""The floor for `capnote check` over NDJSON: parse each line with the note contract, nothing
else. bench/run.py times this over the same file as the check."""

from __future__ import annotations

import sys
from pathlib import Path

from pydantic import ValidationError

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from capnote.note import Note  # noqa: E402


def main() -> None:
    """Parse every non-blank line of the file named on the command line."""
    parsed = failed = 0
    with Path(sys.argv[1]).open("rb") as stream:
        for line in stream:
            raw = line.strip()
            if not raw:
                continue
            try:
                Note.model_validate_json(raw)
                parsed += 1
            except ValidationError:
                failed += 1
    print(f"{parsed} parsed, {failed} refused")


if __name__ == "__main__":
    main()
