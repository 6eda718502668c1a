"""The analyst's 100,000-line batch as it was tried: about two findings per record.

Invented notes from the routine demo note. Every 20th line has an error (an IOP of 95 mmHg,
outside the range) beside two other findings; the rest carry one to three findings each (an
IOP rise, a pulse energy above the usual start, the total energy's band). At 100,000 lines
that is 5,000 errors among about 200,000 findings, the size of the export the report was
first tried on. Light on imports, so the browser test can use it too.
"""

from __future__ import annotations

import json
from pathlib import Path

TEMPLATE = Path(__file__).resolve().parents[1] / "examples" / "notes" / "right-routine.json"


def _variants() -> list[str]:
    base = json.loads(TEMPLATE.read_text())
    base["note_id"]["value"] = "LN-MIX-__N__"
    base["patient"]["value"] = "PX-__N__"

    def made(iop_after: int | None, energy: bool, bad_iop: bool) -> str:
        note = json.loads(json.dumps(base))
        if iop_after is not None:
            note["result"]["iop_after"][0]["value_mmhg"] = iop_after
        if energy:  # 3.5 mJ x 18 pulses: above the usual start, and the total's band
            note["laser"]["series"][0]["energy_mj"] = 3.5
            note["laser"]["reported_total_energy_mj"] = 63
        if bad_iop:
            note["before"]["iop"]["value_mmhg"] = 95
        return json.dumps(note)

    return [
        made(22, True, True),  # an error, a warning and information
        made(22, True, False),  # two warnings and information
        made(None, True, False),  # a warning and information
        made(22, False, False),  # a warning
    ]


def write_mix(path: Path, lines: int) -> Path:
    """Write the batch: distinct note identifiers, 5% of records with an error."""
    texts = _variants()
    with path.open("w") as out:
        for i in range(1, lines + 1):
            kind = 0 if i % 20 == 0 else 1 + i % 3
            out.write(texts[kind].replace("__N__", f"{i:07d}") + "\n")
    return path
