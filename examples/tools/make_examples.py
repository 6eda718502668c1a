"""Write the demo notes and invalid notes in examples/ from one invented base session.

Everything here is invented: the Harbourside Eye Unit, its staff and its patients do not
exist. Run from the repository root: python examples/tools/make_examples.py
"""

from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
SITE = "https://harbourside-eye.example/fhir/sid"


def base(note_no: str, mrn: str, eye: str, day: str) -> dict[str, Any]:
    """A routine, complete session on one eye on one day (times in UTC, winter)."""
    return {
        "note_id": {"system": f"{SITE}/laser-note", "value": note_no},
        "patient": {"system": f"{SITE}/mrn", "value": mrn},
        "encounter": {"system": f"{SITE}/visit", "value": "V-" + note_no[-4:]},
        "performer": {
            "identifier": {"system": f"{SITE}/staff", "value": "S-0042"},
            "name": "Dr Ilona Marsh",
        },
        "location": {"name": "Harbourside Eye Unit, laser room 2"},
        "started_at": f"{day}T10:05:00+00:00",
        "ended_at": f"{day}T10:15:00+00:00",
        "consent": {"given": True, "recorded_at": f"{day}T09:50:00+00:00"},
        "eye": eye,
        "before": {
            "iop": {
                "value_mmhg": 15,
                "method": "applanation",
                "measured_at": f"{day}T09:40:00+00:00",
            },
            "visual_acuity": {
                "notation": "snellen-metric",
                "value": "6/18",
                "correction": "best-corrected",
            },
            "pupil_dilated": True,
            "iol": {
                "optic_diameter_mm": 6.0,
                "optic_material": "hydrophobic-acrylic",
                "position": "bag",
            },
            "cataract_surgery_date": "2025-03-12",
            # Every item recorded: not recorded is never read as absent.
            "risk_factors": {
                "glaucoma": "none",
                "high_myopia": False,
                "uveitis": False,
                "diabetic_macular_oedema": False,
                "retinal_detachment_this_eye": False,
                "retinal_detachment_fellow_eye": False,
                "lattice_degeneration": False,
                "vitreous_loss_at_cataract_surgery": False,
            },
        },
        "laser": {
            "wavelength_nm": 1064,
            "series": [{"energy_mj": 1.6, "pulses": 18}],
            "focus": {"method": "posterior-offset", "distance_mm": 0.15},
            "pattern": "cruciate",
            "contact_lens": {"used": True},
            "reported_total_energy_mj": 28.6,
        },
        "result": {
            "outcome": "complete",
            "opening": {"horizontal_mm": 4.5, "centred": True},
            "complications": [],
            "iop_after": [
                {"value_mmhg": 17, "method": "applanation", "measured_at": f"{day}T11:15:00+00:00"}
            ],
            "visual_acuity_after": {
                "notation": "snellen-metric",
                "value": "6/9",
                "correction": "best-corrected",
            },
        },
        "plan": {
            "prophylaxis": [{"agent": "apraclonidine", "strength_percent": 1.0, "timing": "both"}],
            "take_home": [
                {
                    "agent": "prednisolone acetate",
                    "strength_percent": 1.0,
                    "times_per_day": 4,
                    "days": 7,
                }
            ],
            "rd_warning_given": True,
            "further_session_planned": False,
        },
        "status": "final",
    }


def valid_notes() -> dict[str, dict[str, Any]]:
    """Demo notes: both eyes, routine and raised risk, a spike, glaucoma, several series."""
    notes: dict[str, dict[str, Any]] = {}
    notes["right-routine"] = base("LN-2026-0417", "HX100234", "right", "2026-11-27")

    left = base("LN-2026-0418", "HX100871", "left", "2026-11-27")
    left["before"]["risk_factors"].update(
        high_myopia=True, axial_length_mm=26.4, lattice_degeneration=True
    )
    left["before"]["visual_acuity"] = {
        "notation": "snellen-imperial",
        "value": "20/60",
        "correction": "best-corrected",
    }
    left["laser"]["series"] = [
        {"energy_mj": 1.2, "pulses": 10},
        {"energy_mj": 1.8, "pulses": 14},
        {"energy_mj": 2.2, "pulses": 6},
    ]
    left["laser"]["reported_total_energy_mj"] = 50.0
    left["laser"]["pattern"] = "circular"
    left["laser"]["contact_lens"] = {"used": True, "cone_angle_deg": 24}
    left["result"]["opening"] = {"horizontal_mm": 5.0, "vertical_mm": 4.5, "centred": True}
    left["result"]["visual_acuity_after"] = {
        "notation": "snellen-imperial",
        "value": "20/30",
        "correction": "best-corrected",
    }
    notes["left-raised-risk-multi-series"] = left

    spike = base("LN-2026-0421", "HX101502", "right", "2026-11-30")
    spike["result"]["iop_after"] = [
        {"value_mmhg": 22, "method": "applanation", "measured_at": "2026-11-30T11:15:00+00:00"},
        {"value_mmhg": 29, "method": "applanation", "measured_at": "2026-11-30T13:10:00+00:00"},
    ]
    spike["result"]["complications"] = [{"kind": "iop-spike"}]
    # The severe rise is treated and re-measured before the patient leaves.
    spike["result"]["iop_after"].append(
        {"value_mmhg": 18, "method": "applanation", "measured_at": "2026-11-30T14:40:00+00:00"}
    )
    spike["result"]["pressure_treatment"] = [
        {
            "agent": "acetazolamide",
            "dose": 500,
            "dose_unit": "mg",
            "route": "oral",
            "given_at": "2026-11-30T13:20:00+00:00",
        }
    ]
    spike["result"]["discharge"] = {
        "at": "2026-11-30T14:50:00+00:00",
        "cleared_by": "Dr Ilona Marsh",
    }
    spike["plan"]["take_home"].append(
        {"agent": "timolol", "strength_percent": 0.5, "times_per_day": 2, "days": 5}
    )
    notes["right-iop-spike"] = spike

    glaucoma = base("LN-2026-0425", "HX100990", "left", "2026-11-26")
    glaucoma["before"]["iop"]["value_mmhg"] = 19
    glaucoma["before"]["risk_factors"]["glaucoma"] = "advanced"
    glaucoma["laser"]["series"] = [
        {"energy_mj": 2.4, "pulses": 20},
        {"energy_mj": 3.5, "pulses": 6},
    ]
    glaucoma["laser"]["reported_total_energy_mj"] = None
    glaucoma["laser"]["contact_lens"] = {"used": False}
    glaucoma["plan"]["prophylaxis"] = []
    glaucoma["result"]["iop_after"] = [
        {"value_mmhg": 23, "method": "rebound", "measured_at": "2026-11-26T11:20:00+00:00"}
    ]
    glaucoma["result"]["complications"] = [
        {"kind": "iol-pit", "on_visual_axis": False, "positions": [{"x_mm": 1.9, "y_mm": -0.6}]}
    ]
    notes["left-glaucoma-no-prophylaxis"] = glaucoma

    draft = base("LN-2026-0430", "HX102215", "right", "2026-12-01")
    draft["status"] = "draft"
    draft["ended_at"] = None
    draft["result"]["iop_after"] = []
    draft["plan"]["rd_warning_given"] = False
    draft["plan"]["iop_recheck_minutes"] = 45
    draft["plan"]["review_days"] = 14
    notes["right-draft-in-progress"] = draft
    return notes


def invalid_notes() -> dict[str, Any]:
    """Notes that must be refused, each with one kind of blocking problem."""
    good = base("LN-2026-0901", "HX109001", "right", "2026-11-27")
    out: dict[str, Any] = {}

    def variant(name: str, change: Any) -> None:
        note = copy.deepcopy(good)
        change(note)
        out[name] = note

    variant("eye-both", lambda n: n.update(eye="both"))
    variant(
        "energy-zero-pulses-negative",
        lambda n: n["laser"].update(
            series=[{"energy_mj": 0, "pulses": 12}, {"energy_mj": 1.5, "pulses": -3}],
            reported_total_energy_mj=None,
        ),
    )
    variant(
        "energy-beyond-device",
        lambda n: n["laser"].update(
            series=[{"energy_mj": 25, "pulses": 5}], reported_total_energy_mj=None
        ),
    )
    variant("energy-not-a-number", lambda n: n["laser"]["series"][0].update(energy_mj="1.6 mJ"))
    variant("iop-out-of-range", lambda n: n["before"]["iop"].update(value_mmhg=95))
    variant("date-does-not-exist", lambda n: n["before"].update(cataract_surgery_date="2025-02-30"))
    variant(
        "procedure-in-future",
        lambda n: n.update(
            started_at="2031-05-04T10:05:00+00:00", ended_at="2031-05-04T10:15:00+00:00"
        ),
    )
    variant(
        "iop-reading-before-procedure",
        lambda n: n["result"]["iop_after"][0].update(measured_at="2026-11-27T09:00:00+00:00"),
    )
    variant(
        "cataract-after-procedure", lambda n: n["before"].update(cataract_surgery_date="2026-12-20")
    )
    variant("reported-total-disagrees", lambda n: n["laser"].update(reported_total_energy_mj=60))
    variant(
        "opening-impossible",
        lambda n: n["result"].update(opening={"horizontal_mm": 14.0, "centred": True}),
    )
    variant(
        "missing-required",
        lambda n: (n.pop("eye"), n["before"].pop("iop"), n["plan"].pop("rd_warning_given")),
    )
    variant("glaucoma-not-recorded", lambda n: n["before"]["risk_factors"].pop("glaucoma"))
    variant("no-utc-offset", lambda n: n.update(started_at="2026-11-27T10:05:00"))
    variant("unknown-field", lambda n: n["laser"].update(power_watts=3))
    return out


def main() -> None:
    for folder, notes in (("notes", valid_notes()), ("invalid", invalid_notes())):
        (ROOT / folder).mkdir(exist_ok=True)
        for name, note in notes.items():
            (ROOT / folder / f"{name}.json").write_text(json.dumps(note, indent=2) + "\n")
    (ROOT / "invalid" / "not-json.json").write_text('{"eye": "right", "laser": \n')


if __name__ == "__main__":
    main()
