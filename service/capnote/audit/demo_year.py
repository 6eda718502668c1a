"""A deterministic invented year of laser sessions for the audit demo (`capnote demo-data`):
two units, four clinicians, about 2,000 sessions, and one clinician whose IOP rises are set
high on purpose, so that the funnel plot shows what it is for.

Everything here is invented: the units, the people, the identifiers. It is demo data, never
a check value; tests count what it holds independently of the audit.
"""

from __future__ import annotations

import copy
import random
from collections.abc import Iterator
from datetime import UTC, date, datetime, timedelta
from typing import Any

import orjson

from capnote.demo_notes import demo_notes

STAFF = "https://harbourside-eye.example/fhir/sid/staff"
UNITS = (
    ("HX-LASER", "Harbourside Eye Unit, laser room 2"),
    ("FH-LASER", "Fernhill Community Eye Clinic"),
)
# (unit, staff value, name, chance of a moderate and of a severe rise): the last is high.
CLINICIANS = (
    (0, "S-0042", "Dr Ilona Marsh", 0.05, 0.01),
    (0, "S-0107", "Dr Tobias Wrenfield", 0.04, 0.01),
    (1, "S-0213", "Dr Amara Quillon", 0.05, 0.02),
    (1, "S-0388", "Dr Petra Holloway-Strand", 0.16, 0.08),
)
YEAR_START = date(2025, 12, 1)


def _template() -> dict[str, Any]:
    for entry in demo_notes():
        if entry.name == "right-routine.json":
            found: dict[str, Any] = orjson.loads(entry.read_bytes())
            return found
    raise RuntimeError("this installation has no routine demo note")


def _at(moment: datetime) -> str:
    return moment.isoformat()


def sessions(count: int = 2000, seed: int = 19) -> Iterator[dict[str, Any]]:
    """count invented session notes in session order over a year from YEAR_START."""
    rng = random.Random(seed)  # noqa: S311 - invented demo data, not a secret
    base = _template()
    base["laser"].pop("reported_total_energy_mj", None)
    for i in range(count):
        unit, staff, name, p_moderate, p_severe = CLINICIANS[rng.randrange(len(CLINICIANS))]
        note = copy.deepcopy(base)
        day = YEAR_START + timedelta(days=i * 365 // count)
        start = datetime(day.year, day.month, day.day, 8, 30, tzinfo=UTC) + timedelta(
            minutes=15 * (i % 24)
        )
        note["note_id"]["value"] = f"AUD-{i:05d}"
        note["patient"]["value"] = f"AX{i:06d}"
        note["eye"] = rng.choice(("right", "left"))
        note["performer"] = {"identifier": {"system": STAFF, "value": staff}, "name": name}
        code, place = UNITS[unit]
        note["location"] = {
            "name": place,
            "identifier": {
                "system": "https://harbourside-eye.example/fhir/sid/unit",
                "value": code,
            },
        }
        note["started_at"] = _at(start)
        note["ended_at"] = _at(start + timedelta(minutes=10))
        note["consent"]["recorded_at"] = _at(start - timedelta(minutes=15))
        before = note["before"]
        pressure = rng.randint(12, 20)
        before["iop"]["value_mmhg"] = pressure
        before["iop"]["measured_at"] = _at(start - timedelta(minutes=25))
        before["cataract_surgery_date"] = (day - timedelta(days=rng.randint(120, 1500))).isoformat()
        glaucoma = rng.random() < 0.12
        before["risk_factors"]["glaucoma"] = rng.choice(("suspect", "mild")) if glaucoma else "none"
        # Pulses so that totals spread around the published series' tens of millijoules.
        pulses = max(4, int(rng.lognormvariate(3.2, 0.5)))
        note["laser"]["series"] = [{"energy_mj": round(rng.uniform(1.2, 2.4), 1), "pulses": pulses}]
        draw = rng.random()
        rise = (
            rng.randint(10, 14)
            if draw < p_severe
            else rng.randint(5, 9)
            if draw < p_severe + p_moderate
            else rng.randint(0, 3)
        )
        note["result"]["iop_after"] = [
            {
                "value_mmhg": pressure + rise,
                "method": "applanation",
                "measured_at": _at(start + timedelta(minutes=70)),
            }
        ]
        given = rng.random() < (0.85 if glaucoma else 0.6)
        if not given:
            note["plan"]["prophylaxis"] = []
        yield note


# Chances at review, invented: attended, then findings among those seen; RD and CMO near
# Steinberg 1991's 0.89% and 1.23%, and some findings left unrecorded, as real forms are.
ATTENDED, MISSED = 0.86, 0.09
FINDING_CHANCE = {
    "retinal_detachment": 0.009,
    "cystoid_macular_oedema": 0.012,
    "anterior_uveitis": 0.03,
    "raised_iop_needing_treatment": 0.02,
    "iol_pits": 0.08,
}
UNRECORDED = 0.1
REVIEW_AFTER_DAYS = 28


def reviews(notes: list[dict[str, Any]], now: datetime, seed: int = 23) -> Iterator[dict[str, Any]]:
    """An invented review record for most sessions (attended, or missed), seen four weeks
    after the laser; none for a session whose review would still lie after now."""
    rng = random.Random(seed)  # noqa: S311 - invented demo data, not a secret
    for note in notes:
        draw = rng.random()
        seen = datetime.fromisoformat(note["started_at"]).replace(hour=9, minute=0) + timedelta(
            days=REVIEW_AFTER_DAYS
        )
        if draw >= ATTENDED + MISSED or seen > now:
            continue  # no record yet: still awaited
        review: dict[str, Any] = {
            "review_id": {
                "system": "https://harbourside-eye.example/fhir/sid/review",
                "value": "R" + note["note_id"]["value"],
            },
            "session": copy.deepcopy(note["note_id"]),
            "patient": copy.deepcopy(note["patient"]),
            "eye": note["eye"],
            "attended": draw < ATTENDED,
            "seen_at": _at(seen),
            "status": "final",
        }
        if review["attended"]:
            findings = {
                name: rng.random() < chance
                for name, chance in FINDING_CHANCE.items()
                if rng.random() >= UNRECORDED
            }
            review |= {
                "seen_by": copy.deepcopy(note["performer"]),
                "iop": {"value_mmhg": rng.randint(12, 20), "method": "applanation"},
                "opening": {"patent": rng.random() > 0.03, "adequate": rng.random() > 0.04},
                "symptoms_relieved": rng.random() > 0.05,
                "findings": findings,
                "retreatment_needed": rng.random() < 0.03,
                "outcome": "discharged",
            }
            if any(findings.values()):
                review["outcome"] = "further-follow-up"
                review["follow_up_days"] = 14
        yield review
