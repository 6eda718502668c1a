"""The facts of one session that the audit counts, as stored beside each note version
(note_version's audit columns): taken once, on write, so the audit is SQL aggregation."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from capnote.derive import Derived
from capnote.note import Note
from capnote.schedule import DueItem


def audit_facts(note: Note, derived: Derived, due: Sequence[DueItem]) -> dict[str, Any]:
    """The audit columns of a note version: unit, clinician, highest IOP rise grade (None
    when no reading after the laser was recorded: unknown is not "no rise"), glaucoma as
    recorded (None: not recorded), whether a prophylaxis drop was given in clinic, and the
    days from cataract surgery (None: date not recorded), and whether a review visit was
    booked (a review among the due items: what attendance is counted against)."""
    location = note.location
    return {
        "site": location.identifier.value if location.identifier else location.name,
        "site_name": location.name,
        "performer": f"{note.performer.identifier.system}|{note.performer.identifier.value}",
        "performer_name": note.performer.name,
        "spike_grade": derived.iop.spike_grade if derived.iop.highest is not None else None,
        "glaucoma": note.before.risk_factors.glaucoma,
        "prophylaxis": bool(note.plan.prophylaxis),
        "cataract_days": derived.days_since_cataract_surgery,
        "review_booked": any(item.kind == "review" for item in due),
    }
