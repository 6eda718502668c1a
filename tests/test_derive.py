"""Derived values, one pure function at a time."""

from __future__ import annotations

import json
import math
from datetime import UTC, datetime

import pytest

from capnote.derive import (
    PriorSession,
    cumulative,
    derive,
    energy_band,
    iop_course,
    opening_size,
    recounted,
    risk,
    spike_grade,
    total_energy_mj,
    total_pulses,
)
from capnote.note import IopReading, LaserSettings, Note, Opening, RiskFactors, TimedIopReading
from capnote.policy import Policy
from tests.conftest import routine

T0 = datetime(2026, 11, 27, 10, 15, tzinfo=UTC)


def laser(*series: tuple[float, int]) -> LaserSettings:
    return LaserSettings.model_validate(
        {
            "series": [{"energy_mj": e, "pulses": n} for e, n in series],
            "pattern": "cruciate",
            "contact_lens": {"used": True},
        }
    )


def test_totals_over_several_series() -> None:
    settings = laser((1.2, 10), (1.8, 14), (2.2, 6))
    assert total_pulses(settings) == 30
    assert total_energy_mj(settings) == pytest.approx(12 + 25.2 + 13.2)


@pytest.mark.parametrize(
    ("total", "band"),
    # Chawla et al., ESCRS 2014: bands 0-40, 40-80, > 80 mJ; a cut point is in the lower band.
    [(0.5, 1), (40.0, 1), (40.1, 2), (80.0, 2), (80.01, 3), (250.0, 3)],
)
def test_energy_bands(policy: Policy, total: float, band: int) -> None:
    assert energy_band(total, policy.thresholds.total_energy_bands_mj).index == band


@pytest.mark.parametrize(
    ("rise", "grade"),
    # Chawla et al., ESCRS 2014: mild < 5, moderate 5-9, severe >= 10 mmHg.
    [
        (-2.0, "none"),
        (0.0, "none"),
        (4.9, "mild"),
        (5.0, "moderate"),
        (9.9, "moderate"),
        (10.0, "severe"),
        (31.0, "severe"),
    ],
)
def test_spike_grades(policy: Policy, rise: float, grade: str) -> None:
    assert spike_grade(rise, policy.thresholds) == grade


def test_round_and_elliptical_opening() -> None:
    # Area of a circle pi d^2 / 4 and of an ellipse pi a b / 4 (geometry).
    round_ = opening_size(Opening(horizontal_mm=4.0), 6.0)
    assert round_.area_mm2 == pytest.approx(math.pi * 4.0, abs=0.01)
    assert round_.ratio_to_optic == pytest.approx(0.67, abs=0.005)
    oval = opening_size(Opening(horizontal_mm=5.0, vertical_mm=4.0), 6.0)
    assert oval.area_mm2 == pytest.approx(math.pi * 5.0, abs=0.01)
    assert oval.largest_mm == 5.0


def test_iop_course_finds_the_highest_rise_and_when(policy: Policy) -> None:
    before = IopReading(value_mmhg=16, method="applanation")
    after = [
        TimedIopReading(value_mmhg=19, method="applanation", measured_at=T0.replace(hour=11)),
        TimedIopReading(value_mmhg=27, method="applanation", measured_at=T0.replace(hour=13)),
        TimedIopReading(value_mmhg=21, method="applanation", measured_at=T0.replace(hour=14)),
    ]
    course = iop_course(before, after, T0, policy.thresholds)
    assert [c.change_mmhg for c in course.changes] == [3, 11, 5]
    assert course.highest is not None
    assert course.highest.reading_index == 1
    assert course.highest.minutes_after == 180
    assert course.spike_grade == "severe"


def test_no_post_laser_reading_means_no_grade(policy: Policy) -> None:
    before = IopReading(value_mmhg=16, method="applanation")
    course = iop_course(before, [], T0, policy.thresholds)
    assert course.highest is None
    assert course.spike_grade == "none"


def test_cumulative_energy_counts_only_earlier_sessions() -> None:
    prior = [
        PriorSession(started_at=datetime(2026, 10, 1, 9, tzinfo=UTC), total_energy_mj=30.0),
        PriorSession(started_at=datetime(2026, 11, 20, 9, tzinfo=UTC), total_energy_mj=12.5),
        PriorSession(started_at=datetime(2026, 12, 5, 9, tzinfo=UTC), total_energy_mj=99.0),
    ]
    c = cumulative(T0, 20.0, prior)
    assert c.session_number == 3
    assert c.cumulative_energy_mj == pytest.approx(62.5)
    assert c.days_since_last_session == 7


def test_recounted_names_only_the_later_sessions_whose_totals_move() -> None:
    def at(day: int, energy: float, key: str) -> PriorSession:
        return PriorSession(datetime(2026, 11, day, 9, tzinfo=UTC), energy, key)

    a, b, c = at(10, 10.0, "a"), at(17, 10.0, "b"), at(24, 10.0, "c")
    late = at(3, 5.0, "late")
    # A session arriving before all the others moves every later one, in session order.
    assert recounted([b, a, c], [c, a, late, b]) == ["a", "b", "c"]
    # One arriving between a and b moves b and c only.
    assert recounted([a, b, c], [a, b, c, at(12, 5.0, "mid")]) == ["b", "c"]
    # A last session moves nothing already stored; so does a change that keeps every total.
    assert recounted([a, b], [a, b, c]) == []
    assert recounted([a, b, c], [a, b, c]) == []
    # Voiding a (after: without it) moves b and c; more energy in b moves b itself (the
    # caller stores that as the amendment) and c, never a.
    assert recounted([a, b, c], [b, c]) == ["b", "c"]
    assert recounted([a, b, c], [a, at(17, 20.0, "b"), c]) == ["b", "c"]


def test_first_session_has_no_gap() -> None:
    c = cumulative(T0, 20.0, [])
    assert (c.session_number, c.cumulative_energy_mj, c.days_since_last_session) == (1, 20.0, None)


def test_an_average_adult_eye_is_not_raised_risk(policy: Policy) -> None:
    # 23.5 mm is about the average adult axial length (common practice): not a risk factor.
    course = iop_course(IopReading(value_mmhg=15, method="applanation"), [], T0, policy.thresholds)
    band = energy_band(30.0, policy.thresholds.total_energy_bands_mj)
    found = risk(RiskFactors(axial_length_mm=23.5), course, band, policy)
    assert found.level == "routine"


@pytest.mark.parametrize(
    ("factors", "reason"),
    # AAO Preferred Practice Pattern, Cataract in the Adult Eye: RD risk factors; axial length
    # at the default high-axial-myopia threshold of 26 mm or more (from memory, see default.toml).
    [
        ({"axial_length_mm": 26.0}, "axial-length"),
        ({"high_myopia": True}, "high-myopia"),
        ({"lattice_degeneration": True}, "lattice-degeneration"),
        ({"retinal_detachment_fellow_eye": True}, "retinal-detachment-history"),
        ({"vitreous_loss_at_cataract_surgery": True}, "vitreous-loss"),
        ({"glaucoma": "suspect"}, "glaucoma"),
        ({"uveitis": True}, "uveitis"),
    ],
)
def test_risk_factors_raise_the_level(
    policy: Policy, factors: dict[str, object], reason: str
) -> None:
    before = IopReading(value_mmhg=16, method="applanation")
    course = iop_course(before, [], T0, policy.thresholds)
    band = energy_band(20, policy.thresholds.total_energy_bands_mj)
    result = risk(RiskFactors.model_validate(factors), course, band, policy)
    assert result.level == "raised"
    assert [r.code for r in result.reasons] == [reason]


def test_routine_note_is_routine(policy: Policy) -> None:
    d = derive(Note.model_validate_json(json.dumps(routine())), policy)
    assert d.risk.level == "routine"
    assert d.total_energy_mj == pytest.approx(28.8)
    assert d.acuity.before_logmar == pytest.approx(0.48)  # log10(18/6) = 0.477
    assert d.acuity.change_logmar == pytest.approx(-0.30)  # 6/18 -> 6/9
    assert d.focal_spot.cone_angle_deg == 24  # contact lens, no angle given: policy default
    assert d.focal_spot.cone_angle_assumed
