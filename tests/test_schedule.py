"""Follow-up due dates on the clinic's real calendar."""

from __future__ import annotations

import json
from datetime import UTC, date, datetime, time, timedelta
from typing import Any
from zoneinfo import ZoneInfo

from schemas.note import Note
from service.clinic_calendar import PolicyCalendar
from service.derive import derive
from service.policy import Policy
from service.policy.model import WEEKDAYS
from service.schedule import DueItem, schedule
from tests.conftest import routine

LONDON = ZoneInfo("Europe/London")


def note_ending(end: str, **changes: Any) -> Note:
    data = routine()
    data["started_at"] = (datetime.fromisoformat(end) - timedelta(minutes=10)).isoformat()
    data["ended_at"] = end
    data["before"]["iop"]["measured_at"] = None
    data["consent"]["recorded_at"] = None
    data["result"]["iop_after"] = []
    for path, value in changes.items():
        node = data
        *parents, leaf = path.split("__")
        for p in parents:
            node = node[p]
        node[leaf] = value
    return Note.model_validate_json(json.dumps(data))


def items(note: Note, policy: Policy, calendar: Any = None) -> dict[str, DueItem]:
    cal = calendar or PolicyCalendar.from_policy(policy.calendar)
    return {i.kind: i for i in schedule(note, derive(note, policy), policy, cal)}


def always_open() -> PolicyCalendar:
    return PolicyCalendar(LONDON, WEEKDAYS, time(0, 0), time(23, 59, 59))


def test_review_on_christmas_moves_past_boxing_day_substitute(policy: Policy) -> None:
    # UK Government bank holiday list (England and Wales), 2026: Christmas Day Fri 25 Dec,
    # Boxing Day (substitute day) Mon 28 Dec. 27 Nov + 28 days = 25 Dec -> Tue 29 Dec.
    review = items(note_ending("2026-11-27T10:15:00+00:00"), policy)["review"]
    assert review.moved_from is not None
    assert review.moved_from.date() == date(2026, 12, 25)
    assert review.target.date() == date(2026, 12, 29)
    assert [c.day for c in review.passed_over] == [
        date(2026, 12, 25),
        date(2026, 12, 26),
        date(2026, 12, 27),
        date(2026, 12, 28),
    ]
    assert review.passed_over[0].reason == "Christmas Day"
    assert "Boxing Day" in review.passed_over[3].reason


def test_recheck_across_the_spring_clock_change_is_60_elapsed_minutes(policy: Policy) -> None:
    # UK clocks go forward at 01:00 GMT on the last Sunday of March (29 Mar 2026; Summer Time
    # Act 1972 as amended). A session ending 00:30 GMT is rechecked at 01:30 UTC = 02:30 BST.
    end = "2026-03-29T00:30:00+00:00"
    recheck = items(note_ending(end), policy, always_open())["iop-recheck"]
    assert recheck.target - datetime.fromisoformat(end) == timedelta(minutes=60)
    assert recheck.target.astimezone(LONDON).strftime("%H:%M %Z") == "02:30 BST"
    assert recheck.target.utcoffset() == timedelta(hours=1)


def test_recheck_across_the_autumn_clock_change(policy: Policy) -> None:
    # Clocks go back at 01:00 GMT on 25 Oct 2026: 01:30 BST + 60 min is 01:30 GMT.
    end = "2026-10-25T00:30:00+00:00"
    recheck = items(note_ending(end), policy, always_open())["iop-recheck"]
    assert recheck.target.astimezone(UTC) == datetime(2026, 10, 25, 1, 30, tzinfo=UTC)
    assert recheck.target.astimezone(LONDON).strftime("%H:%M %Z") == "01:30 GMT"


def test_review_in_days_keeps_the_wall_clock_across_a_clock_change(policy: Policy) -> None:
    # 20 Mar 2026 (GMT) + 28 calendar days = Fri 17 Apr 2026 (BST); opening time 08:30 local.
    review = items(note_ending("2026-03-20T10:15:00+00:00"), policy)["review"]
    assert review.target == datetime(2026, 4, 17, 8, 30, tzinfo=LONDON)
    assert review.target.utcoffset() == timedelta(hours=1)


def test_recheck_before_opening_moves_to_opening_time(policy: Policy) -> None:
    # Fri 27 Nov 2026, session ends 07:00: 60 min is 08:00, the clinic opens 08:30 (policy).
    recheck = items(note_ending("2026-11-27T07:00:00+00:00"), policy)["iop-recheck"]
    assert recheck.target == datetime(2026, 11, 27, 8, 30, tzinfo=LONDON)
    assert recheck.moved_from == datetime(2026, 11, 27, 8, 0, tzinfo=LONDON)
    assert recheck.flag is None


def test_recheck_after_closing_with_no_open_time_in_window_is_flagged(policy: Policy) -> None:
    # Ends 17:10, recheck window 17:40-20:10, clinic shuts 17:30: a person must book it.
    recheck = items(note_ending("2026-11-27T17:10:00+00:00"), policy)["iop-recheck"]
    assert recheck.flag is not None
    assert recheck.target == datetime(2026, 11, 27, 18, 10, tzinfo=LONDON)


def test_next_day_check_for_advanced_glaucoma_moves_off_sunday(policy: Policy) -> None:
    # Nesher & Kolker 1990: next-day check in advanced glaucoma. Sat 28 Nov 10:15 + 24 h is a
    # Sunday; Mon 08:30 is 46 h 15 min after, inside the 48 h window.
    note = note_ending("2026-11-28T10:15:00+00:00", before__risk_factors={"glaucoma": "advanced"})
    next_day = items(note, policy)["next-day-iop"]
    assert next_day.target == datetime(2026, 11, 30, 8, 30, tzinfo=LONDON)
    assert next_day.passed_over[0].day == date(2026, 11, 29)
    assert "glaucoma (advanced)" in next_day.reasons


def test_no_next_day_check_for_a_routine_note(policy: Policy) -> None:
    assert "next-day-iop" not in items(note_ending("2026-11-27T10:15:00+00:00"), policy)


def test_raised_risk_brings_the_review_forward(policy: Policy) -> None:
    note = note_ending(
        "2026-11-23T10:15:00+00:00", before__risk_factors={"lattice_degeneration": True}
    )
    review = items(note, policy)["review"]
    assert review.target.date() == date(2026, 11, 30)  # Mon 23 Nov + 7 days
    assert review.reasons == ("raised risk: lattice degeneration",)


def test_clinician_review_days_shift_the_window(policy: Policy) -> None:
    note = note_ending("2026-11-23T10:15:00+00:00", plan__review_days=14)
    review = items(note, policy)["review"]
    # Policy routine window 21/28/42 days: margins 7 before and 14 after the target.
    assert review.earliest.date() == date(2026, 11, 30)
    assert review.target.date() == date(2026, 12, 7)
    assert review.latest.date() == date(2026, 12, 21)


def test_site_closure_day_is_skipped(policy: Policy) -> None:
    cal = policy.calendar.model_copy(update={"closures": [date(2026, 12, 21)]})
    review = items(
        note_ending("2026-11-23T10:15:00+00:00"), policy, PolicyCalendar.from_policy(cal)
    )["review"]
    assert review.target.date() == date(2026, 12, 22)
    assert review.passed_over[0].reason == "clinic closure"


def test_whole_window_closed_is_flagged(policy: Policy) -> None:
    closed = PolicyCalendar(LONDON, ["sun"], time(9), time(10), None, [])
    review = items(note_ending("2026-11-23T10:15:00+00:00"), policy, closed)["review"]
    # The routine window 14 Dec - 4 Jan has Sundays; close those too by hours: only a
    # calendar with no open day in the window flags it.
    assert review.flag is None
    shut = PolicyCalendar(
        LONDON,
        ["sun"],
        time(9),
        time(10),
        None,
        [date(2026, 12, d) for d in range(1, 32)] + [date(2027, 1, d) for d in range(1, 10)],
    )
    flagged = items(note_ending("2026-11-23T10:15:00+00:00"), policy, shut)["review"]
    assert flagged.flag is not None
    assert flagged.moved_from is None


def test_recheck_done_when_a_reading_lies_in_its_window(policy: Policy) -> None:
    note = Note.model_validate_json(json.dumps(routine()))  # reading 60 min after the end
    recheck = items(note, policy)["iop-recheck"]
    assert recheck.done_by_reading == 0
