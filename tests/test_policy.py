"""The shipped policy and a site's overrides."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from service.clinic_calendar import PolicyCalendar
from service.config import Settings, effective_policy
from service.errors import PolicyError
from service.policy import load_policy
from service.policy.loader import default_policy_data
from service.policy.model import Range


def sourced_tables(node: Any, path: str = "") -> list[tuple[str, dict[str, Any]]]:
    out = []
    if isinstance(node, dict):
        if "source" in node:
            out.append((path, node))
        for key, value in node.items():
            if isinstance(value, dict):
                out += sourced_tables(value, f"{path}.{key}" if path else key)
    return out


def test_every_default_names_its_source() -> None:
    data = default_policy_data()
    tables = sourced_tables(data)
    assert len(tables) > 30
    for section in ("limits", "thresholds", "schedule"):
        for key, value in data[section].items():
            assert isinstance(value, dict), f"{section}.{key} is not a sourced table"
            assert value.get("source"), f"{section}.{key} has no source"
    assert all(t["source"].strip() for _, t in tables)


def test_marks_from_memory_where_the_reference_says_so() -> None:
    # ../shared/reference/clinical-practice.md marks these [memory]: the policy must say so.
    t = default_policy_data()["thresholds"]
    assert t["usual_pulse_energy_max_mj"]["source"].startswith("from memory")
    assert t["days_after_cataract_surgery"]["source"].startswith("from memory")


def test_site_file_overrides_a_value_and_takes_the_source(tmp_path: Path) -> None:
    site = tmp_path / "site.toml"
    site.write_text(
        "[thresholds]\nusual_pulse_energy_max_mj = 2.5\n"
        "[schedule.review_routine]\ntarget = 35\nlatest = 49\n"
        '[calendar]\nholiday_subdivision = "SCT"\n'
    )
    policy = load_policy(site)
    assert policy.thresholds.usual_pulse_energy_max_mj.value == 2.5
    assert policy.thresholds.usual_pulse_energy_max_mj.source == "site policy (site.toml)"
    assert policy.schedule.review_routine.target == 35
    assert policy.schedule.review_routine.source == "site policy (site.toml)"
    assert policy.calendar.holiday_subdivision == "SCT"
    assert policy.thresholds.iop_rise_severe_mmhg.value == 10  # untouched defaults stay


@pytest.mark.parametrize(
    ("text", "words"),
    [
        ("[thresholds]\nusual_pulse_energy_max_mj = 'high'\n", "usual_pulse_energy_max_mj"),
        ("[thresholds]\nno_such_threshold = 3\n", "no_such_threshold"),
        ("[schedule.review_routine]\nearliest = 50\n", "earliest <= target <= latest"),
        ("[calendar\n", "not valid TOML"),
    ],
)
def test_bad_site_file_is_a_policy_error_naming_the_problem(
    tmp_path: Path, text: str, words: str
) -> None:
    site = tmp_path / "site.toml"
    site.write_text(text)
    with pytest.raises(PolicyError, match=words):
        load_policy(site)


def test_settings_override_the_calendar() -> None:
    policy = effective_policy(Settings(clinic_timezone="Europe/Dublin", holiday_country="IE"))
    assert policy.calendar.timezone == "Europe/Dublin"
    assert policy.calendar.holiday_country == "IE"
    assert policy.calendar.holiday_subdivision is None  # ENG belongs to GB, not IE
    PolicyCalendar.from_policy(policy.calendar)  # and the calendar builds


@pytest.mark.parametrize(
    ("update", "words"),
    [
        ({"timezone": "Mars/Olympus"}, "IANA"),
        ({"holiday_country": "XX"}, "holidays package"),
        ({"holiday_subdivision": "NOPE"}, "holidays package"),
    ],
)
def test_unknown_calendar_is_a_policy_error(update: dict[str, str], words: str) -> None:
    cal = load_policy().calendar.model_copy(update=update)
    with pytest.raises(PolicyError, match=words):
        PolicyCalendar.from_policy(cal)


@pytest.mark.parametrize(
    ("bounds", "inside", "outside"),
    [
        ({"min": 0, "max": 80}, [0, 40, 80], [-0.1, 80.1, float("nan")]),
        ({"above": 0}, [0.001, 1e9], [0, -1, float("nan")]),  # "more than 0": 0 itself is out
        ({"min": 1, "above": 1, "max": 2}, [1.5, 2], [1, 2.5]),
        ({}, [-1e9, 0, 1e9], [float("nan")]),  # open at both ends, yet NaN is no number
    ],
)
def test_a_range_holds_its_bounds_and_nothing_else(
    bounds: dict[str, float], inside: list[float], outside: list[float]
) -> None:
    allowed = Range(unit="mm", source="test", **bounds)
    assert [allowed.contains(v) for v in inside] == [True] * len(inside)
    assert [allowed.contains(v) for v in outside] == [False] * len(outside)
    # The bounds are worked out once; the model stays equal to one built afresh and dumps
    # only its fields.
    assert allowed == Range(unit="mm", source="test", **bounds)
    assert set(allowed.model_dump()) == {"min", "above", "max", "unit", "source"}
