"""When a same-visit IOP recheck counts as done: a safe reading inside its window."""

from __future__ import annotations

from datetime import datetime, timedelta
from typing import Any

import pytest

from capnote.policy import Policy
from tests.test_schedule import items, note_ending

END = "2026-11-27T10:15:00+00:00"  # Fri 27 Nov 2026, an open day; the date does not matter


def reading(mmhg: float, minutes_after: int) -> dict[str, Any]:
    at = datetime.fromisoformat(END) + timedelta(minutes=minutes_after)
    return {"value_mmhg": mmhg, "method": "applanation", "measured_at": at.isoformat()}


def done_by(policy: Policy, before_mmhg: float, after: list[dict[str, Any]]) -> int | None:
    note = note_ending(
        END,
        before__iop={"value_mmhg": before_mmhg, "method": "applanation", "measured_at": None},
        result__iop_after=after,
    )
    return items(note, policy)["iop-recheck"].done_by_reading


# Recheck window 30/60/180 min (Simsek et al. 1998; Pollack et al. 1988, as in default.toml).
# A reading needs action at 30 mmHg or more (default.toml, common practice) or at a rise of
# 10 mmHg or more (Chawla et al., ESCRS 2014; Unal et al. 2006).


def test_done_by_the_safe_reading_not_the_high_one(policy: Policy) -> None:
    # 18 before, 30 at 60 min (needs action), 22 at 120 min (does not): done by the second.
    assert done_by(policy, 18, [reading(30, 60), reading(22, 120)]) == 1


def test_done_by_the_safe_reading_whatever_the_list_order(policy: Policy) -> None:
    assert done_by(policy, 18, [reading(22, 120), reading(30, 60)]) == 0


def test_not_done_when_every_reading_in_the_window_needs_action(policy: Policy) -> None:
    # 30 mmHg at 60 min (action level); 28 at 120 min is a rise of 10 (severe).
    assert done_by(policy, 18, [reading(30, 60), reading(28, 120)]) is None


def test_not_done_when_a_later_reading_needs_action(policy: Policy) -> None:
    # A safe 20 at 60 min, then 31 at 150 min: the pressure is not settled.
    assert done_by(policy, 18, [reading(20, 60), reading(31, 150)]) is None


@pytest.mark.parametrize("minutes", [20, 200])
def test_not_done_by_a_safe_reading_outside_the_window(policy: Policy, minutes: int) -> None:
    assert done_by(policy, 18, [reading(19, minutes)]) is None


def test_done_by_the_first_safe_reading_after_the_last_high_one(policy: Policy) -> None:
    # 19 at 40 min, 32 at 60 min, 21 at 90 min, 20 at 150 min: the 90-min reading.
    after = [reading(20, 150), reading(32, 60), reading(19, 40), reading(21, 90)]
    assert done_by(policy, 18, after) == 3


def test_window_edges_count(policy: Policy) -> None:
    assert done_by(policy, 15, [reading(17, 30)]) == 0
    assert done_by(policy, 15, [reading(17, 180)]) == 0
