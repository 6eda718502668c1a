"""Checks: payload -> the finding it must raise, one table row per rule."""

from __future__ import annotations

import json
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from capnote.findings import WITHHELD, Severity
from capnote.policy import Policy
from capnote.rules import Context, check_payload
from tests.conftest import EXAMPLES, INVALID, NOW, VALID, load, routine

Change = Callable[[dict[str, Any]], object]


def findings_for(data: dict[str, Any] | str, policy: Policy) -> set[tuple[str, str, str]]:
    payload = data if isinstance(data, str) else json.dumps(data)
    _, found = check_payload(payload, Context(policy, NOW))
    return {(f.severity.value, f.code, f.location) for f in found}


def changed(change: Change) -> dict[str, Any]:
    data = routine()
    change(data)
    return data


def set_iop_after(value: float) -> Change:
    return lambda n: n["result"]["iop_after"][0].update(value_mmhg=value)


WARNINGS: list[tuple[str, Change, tuple[str, str, str]]] = [
    # from memory: usual pulse energy 1-3 mJ
    (
        "pulse energy 3.5 mJ",
        lambda n: n["laser"].update(
            series=[{"energy_mj": 3.5, "pulses": 8}], reported_total_energy_mj=None
        ),
        ("warning", "pulse-energy-above-usual", "laser.series[0].energy_mj"),
    ),
    # Chawla et al., ESCRS 2014: 40-80 mJ band
    (
        "total 45 mJ",
        lambda n: n["laser"].update(
            series=[{"energy_mj": 1.5, "pulses": 30}], reported_total_energy_mj=None
        ),
        ("information", "total-energy-band", "laser.series"),
    ),
    # Chawla et al., ESCRS 2014: over 80 mJ is the highest band, a warning by default
    (
        "total 90 mJ",
        lambda n: n["laser"].update(
            series=[{"energy_mj": 3.0, "pulses": 30}], reported_total_energy_mj=None
        ),
        ("warning", "total-energy-highest-band", "laser.series"),
    ),
    # Parajuli et al. 2019; Jabbar et al. 2022: > 50 mJ in glaucoma
    (
        "glaucoma and 60 mJ",
        lambda n: (
            n["before"]["risk_factors"].update({"glaucoma": "mild"}),
            n["laser"].update(
                series=[{"energy_mj": 2.0, "pulses": 30}], reported_total_energy_mj=None
            ),
        ),
        ("warning", "glaucoma-total-energy", "laser.series"),
    ),
    # Chawla et al., ESCRS 2014: a rise of 5 mmHg is moderate (pre-laser IOP 15)
    (
        "rise of exactly 5",
        set_iop_after(20),
        ("warning", "iop-rise-moderate", "result.iop_after[0].value_mmhg"),
    ),
    # Chawla et al. 2014; Unal et al. 2006: a rise of 10 mmHg or more is severe
    (
        "rise of exactly 10",
        set_iop_after(25),
        ("warning", "iop-rise-severe", "result.iop_after[0].value_mmhg"),
    ),
    # common practice: 30 mmHg or more is checked the next day
    ("IOP 31 after", set_iop_after(31), ("warning", "iop-high", "result.iop_after[0].value_mmhg")),
    # Ophthalmology Journal (Via Medica): prophylaxis in glaucoma and suspects
    (
        "glaucoma without prophylaxis",
        lambda n: (
            n["before"]["risk_factors"].update({"glaucoma": "suspect"}),
            n["plan"].update(prophylaxis=[]),
        ),
        ("warning", "glaucoma-no-prophylaxis", "plan.prophylaxis"),
    ),
    # Pollack et al. 1988: prophylaxis blunts the rise; noted, not warned, without glaucoma
    (
        "no prophylaxis",
        lambda n: n["plan"].update(prophylaxis=[]),
        ("information", "no-prophylaxis", "plan.prophylaxis"),
    ),
    # common practice; J Cataract Refract Surg 1990;16:732
    (
        "no contact lens",
        lambda n: n["laser"].update(contact_lens={"used": False}),
        ("warning", "no-contact-lens", "laser.contact_lens.used"),
    ),
    # from memory: an opening should not exceed the IOL optic
    (
        "opening 6.5 on a 6 mm optic",
        lambda n: n["result"]["opening"].update(horizontal_mm=6.5),
        ("warning", "opening-larger-than-optic", "result.opening.horizontal_mm"),
    ),
    # Chawla et al. 2014: openings of 3-4 mm
    (
        "opening 2.5",
        lambda n: n["result"]["opening"].update(horizontal_mm=2.5),
        ("warning", "opening-small", "result.opening.horizontal_mm"),
    ),
    (
        "vertical axis 2.8",
        lambda n: n["result"]["opening"].update(vertical_mm=2.8),
        ("warning", "opening-small", "result.opening.vertical_mm"),
    ),
    # from memory: about three months after cataract surgery
    (
        "30 days after surgery",
        lambda n: n["before"].update(cataract_surgery_date="2026-10-28"),
        ("warning", "soon-after-cataract-surgery", "before.cataract_surgery_date"),
    ),
    # Simsek et al. 1998; Pollack et al. 1988: IOP is rechecked after the laser
    (
        "no IOP after",
        lambda n: n["result"].update(iop_after=[]),
        ("warning", "iop-after-missing", "result.iop_after"),
    ),
    # common practice: warning signs of RD are explained
    (
        "RD signs not explained",
        lambda n: n["plan"].update(rd_warning_given=False),
        ("warning", "rd-warning-not-given", "plan.rd_warning_given"),
    ),
    # common practice: central pits cause glare
    (
        "pit on the axis",
        lambda n: n["result"].update(complications=[{"kind": "iol-pit", "on_visual_axis": True}]),
        ("warning", "iol-pit-on-axis", "result.complications[0].on_visual_axis"),
    ),
    (
        "no consent",
        lambda n: n["consent"].update(given=False),
        ("warning", "consent-not-recorded", "consent.given"),
    ),
    # Steinert, AAO: Nd:YAG is 1064 nm
    (
        "532 nm",
        lambda n: n["laser"].update(wavelength_nm=532),
        ("warning", "wavelength-unusual", "laser.wavelength_nm"),
    ),
    # common practice: posterior offset 0.1-0.5 mm
    (
        "offset 0.8 mm",
        lambda n: n["laser"]["focus"].update(distance_mm=0.8),
        ("warning", "focus-outside-usual", "laser.focus.distance_mm"),
    ),
    (
        "off centre",
        lambda n: n["result"]["opening"].update(centred=False),
        ("warning", "opening-off-centre", "result.opening.centred"),
    ),
    # secondary report / from memory: uveitis raises CME risk
    (
        "uveitis",
        lambda n: n["before"]["risk_factors"].update({"uveitis": True}),
        ("warning", "cme-risk", "before.risk_factors.uveitis"),
    ),
]

ERRORS: list[tuple[str, Change, tuple[str, str, str]]] = [
    (
        "ends before it starts",
        lambda n: n.update(ended_at="2026-11-27T09:00:00+00:00"),
        ("error", "ended-before-start", "ended_at"),
    ),
    (
        "other pattern without text",
        lambda n: n["laser"].update(pattern="other"),
        ("error", "missing-field", "laser.pattern_text"),
    ),
    (
        "pit without axis",
        lambda n: n["result"].update(complications=[{"kind": "iol-pit"}]),
        ("error", "missing-field", "result.complications[0].on_visual_axis"),
    ),
    (
        "complete without opening",
        lambda n: n["result"].pop("opening"),
        ("error", "missing-field", "result.opening"),
    ),
    (
        "focus without distance",
        lambda n: n["laser"].update(focus={"method": "posterior-offset"}),
        ("error", "missing-field", "laser.focus.distance_mm"),
    ),
    (
        "acuity 6/x",
        lambda n: n["before"].update(visual_acuity={"notation": "snellen-metric", "value": "6/x"}),
        ("error", "acuity-unreadable", "before.visual_acuity.value"),
    ),
    (
        "axial length 50",
        lambda n: n["before"]["risk_factors"].update({"axial_length_mm": 50}),
        ("error", "out-of-range", "before.risk_factors.axial_length_mm"),
    ),
    (
        "review in 0 days",
        lambda n: n["plan"].update(review_days=0),
        ("error", "out-of-range", "plan.review_days"),
    ),
    (
        "500-day course",
        lambda n: n["plan"]["take_home"][0].update(days=500),
        ("error", "out-of-range", "plan.take_home[0].days"),
    ),
    (
        "pulses 2.5",
        lambda n: n["laser"]["series"][0].update(pulses=2.5),
        ("error", "wrong-type", "laser.series[0].pulses"),
    ),
    (
        "boolean as text",
        lambda n: n["before"].update(pupil_dilated="yes"),
        ("error", "wrong-type", "before.pupil_dilated"),
    ),
    (
        "reported total 31.7 vs 28.8",
        lambda n: n["laser"].update(reported_total_energy_mj=31.7),
        ("error", "total-energy-mismatch", "laser.reported_total_energy_mj"),
    ),
    (
        "unknown status",
        lambda n: n.update(status="signed"),
        ("error", "code-not-allowed", "status"),
    ),
    (
        "empty series",
        lambda n: n["laser"].update(series=[]),
        ("error", "wrong-length", "laser.series"),
    ),
]


@pytest.mark.parametrize(
    ("case", "change", "expected"), WARNINGS + ERRORS, ids=[c[0] for c in WARNINGS + ERRORS]
)
def test_rule_raises_its_finding(
    policy: Policy, case: str, change: Change, expected: tuple[str, str, str]
) -> None:
    found = findings_for(changed(change), policy)
    assert expected in found
    if expected[0] != "error":
        assert not any(sev == "error" for sev, _, _ in found), "warnings must not come with errors"


def test_reported_total_inside_tolerance_passes(policy: Policy) -> None:
    # tolerance: the larger of 10 % and 2 mJ around the computed 28.8 mJ
    assert (
        findings_for(changed(lambda n: n["laser"].update(reported_total_energy_mj=31.6)), policy)
        == set()
    )


def test_routine_note_raises_nothing(policy: Policy) -> None:
    assert findings_for(routine(), policy) == set()


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "1e400"])
def test_non_finite_numbers_are_refused(policy: Policy, literal: str) -> None:
    text = json.dumps(routine()).replace('"value_mmhg": 15', f'"value_mmhg": {literal}')
    found = findings_for(text, policy)
    assert any(sev == "error" and loc in ("before.iop.value_mmhg", "") for sev, _, loc in found)


def test_identifying_values_are_withheld(policy: Policy) -> None:
    data = routine()
    data["patient"]["value"] = 123456789
    _, found = check_payload(json.dumps(data), Context(policy, NOW))
    [finding] = found
    assert finding.location == "patient.value"
    assert finding.value == WITHHELD
    assert "123456789" not in finding.message


@pytest.mark.parametrize("path", VALID, ids=lambda p: p.name)
def test_demo_notes_produce_exactly_their_findings(policy: Policy, path: Path) -> None:
    expected = {tuple(f) for f in load(EXAMPLES / "expected" / "notes.json")[path.name]}
    found = findings_for(path.read_text(), policy)
    assert found == expected
    assert not any(sev == Severity.ERROR.value for sev, _, _ in found)


@pytest.mark.parametrize("path", INVALID, ids=lambda p: p.name)
def test_invalid_notes_produce_their_errors(policy: Policy, path: Path) -> None:
    expected = {tuple(f) for f in load(EXAMPLES / "expected" / "invalid.json")[path.name]}
    errors = {f for f in findings_for(path.read_text(), policy) if f[0] == "error"}
    assert errors == expected


@pytest.mark.parametrize(
    ("change", "location"),
    [
        (lambda n: n.update(started_at="0001-01-01T00:10:00+01:00"), "started_at"),
        (
            lambda n: n["before"].update(cataract_surgery_date="1900-01-01"),
            "before.cataract_surgery_date",
        ),
        (lambda n: n["laser"]["series"][0].update(pulses=10**400), "laser.series[0].pulses"),
    ],
)
def test_absurd_times_and_numbers_are_errors_not_crashes(
    policy: Policy, change: Change, location: str
) -> None:
    found = findings_for(changed(change), policy)
    assert any(sev == "error" and loc == location for sev, _, loc in found), found


def test_unknown_fields_and_objects_never_echo_their_values(policy: Policy) -> None:
    data = routine()
    data["subject"] = {"system": "urn:mrn", "value": "HX555555"}  # a FHIR name in the wrong place
    data["before"]["pupil_dilated"] = {"mrn": "HX666666"}
    _, found = check_payload(json.dumps(data), Context(policy, NOW))
    text = " ".join(f"{f.message} {f.value}" for f in found)
    assert {f.location for f in found} >= {"subject", "before.pupil_dilated"}
    assert "HX555555" not in text
    assert "HX666666" not in text
