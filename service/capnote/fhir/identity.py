"""What names each repeated item of a note in FHIR: the thing itself, never its position.

A resource's role (and so its stable UUID and its read API id) follows what identifies the
item: a post-laser reading by the minute it was taken, a laser series by its energy, a drop
by what was given. Removing the first of two readings therefore leaves the second reading's
resource as it was, instead of turning it into the first one's and withdrawing the wrong
resource (issue 14). Items that share a natural key (two readings in one minute) are told
apart by their order among themselves only: ``-2``, ``-3``...

Every role fits the read API's id (capnote.fhir.readmodel.ROLE_MAX characters).
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Sequence
from datetime import UTC, datetime

from capnote.note import ClinicDrop, HomeDrop, PressureTreatment, Series, TimedIopReading


def _minute(moment: datetime) -> str:
    """A moment to the minute in UTC: ``20261120t1115`` (ids are lower case)."""
    return moment.astimezone(UTC).strftime("%Y%m%dt%H%M")


def _drug(agent: str, strength: float | None) -> str:
    """Six hex digits naming a drug as entered (agent and strength), whatever its length:
    free text would not fit an id, and a digest stays the same for the same drug."""
    text = f"{' '.join(agent.lower().split())}|{strength!r}"
    return hashlib.sha1(text.encode(), usedforsecurity=False).hexdigest()[:6]


def distinct(prefix: str, natural: Iterable[str]) -> list[str]:
    """``prefix-key`` per item, with ``-2``, ``-3``... for a key seen before."""
    seen: dict[str, int] = {}
    out = []
    for key in natural:
        seen[key] = seen.get(key, 0) + 1
        n = seen[key]
        out.append(f"{prefix}-{key}" if n == 1 else f"{prefix}-{key}-{n}")
    return out


def reading_roles(readings: Sequence[TimedIopReading]) -> list[str]:
    """Post-laser IOP readings, by the minute each was taken."""
    return distinct("iop-after", (_minute(r.measured_at) for r in readings))


def series_roles(series: Sequence[Series]) -> list[str]:
    """Laser series, by their energy setting (in microjoules, so the key has no point)."""
    return distinct("series", (f"{round(s.energy_mj * 1000)}uj" for s in series))


def prophylaxis_roles(drops: Sequence[ClinicDrop]) -> list[str]:
    """Drops given in clinic, by the drug (each gets ``-pre`` / ``-post`` added)."""
    return distinct("prophylaxis", (_drug(d.agent, d.strength_percent) for d in drops))


def treatment_roles(given: Sequence[PressureTreatment]) -> list[str]:
    """Treatments for a raised IOP, by the minute each was given."""
    return distinct("iop-tx", (_minute(g.given_at) for g in given))


def take_home_roles(drops: Sequence[HomeDrop]) -> list[str]:
    """Drops to take home, by the drug."""
    return distinct("take-home", (_drug(d.agent, d.strength_percent) for d in drops))
