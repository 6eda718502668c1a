"""Follow-up due dates on the clinic's real calendar."""

from __future__ import annotations

import json
from datetime import UTC, date, datetime, time, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import pytest

from capnote.clinic_calendar import PolicyCalendar
from capnote.derive import derive
from capnote.note import Note
from capnote.policy import Policy
from capnote.policy.model import WEEKDAYS
from capnote.schedule import FLAG_AFTER_TARGET, FLAG_WHOLE_WINDOW, DueItem, schedule
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
    assert review.moved_direction == "later"
    assert review.moved_text() == (
        "target moved later, from Fri 25 Dec 2026, past Fri 25 Dec 2026 (Christmas Day), "
        "Sat 26 Dec 2026 (Boxing Day), Sun 27 Dec 2026 (not a working day), "
        f"Mon 28 Dec 2026 ({review.passed_over[3].reason})"
    )


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


def test_recheck_before_opening_is_part_of_the_visit(policy: Policy) -> None:
    # Fri 27 Nov 2026, session ends 07:00: the 60-min recheck (Simsek et al. 1998, as in
    # default.toml) is at 08:00, before the demo clinic's 08:30 opening. The laser was done,
    # so the clinic is open: the recheck is not moved.
    recheck = items(note_ending("2026-11-27T07:00:00+00:00"), policy)["iop-recheck"]
    assert recheck.target == datetime(2026, 11, 27, 8, 0, tzinfo=LONDON)
    assert recheck.moved_from is None
    assert recheck.moved_direction is None
    assert recheck.flag is None


def test_recheck_after_closing_is_neither_moved_nor_flagged(policy: Policy) -> None:
    # Ends 17:10, recheck window 17:40-20:10 (30/60/180 min), after the 17:30 closing.
    recheck = items(note_ending("2026-11-27T17:10:00+00:00"), policy)["iop-recheck"]
    assert recheck.flag is None
    assert recheck.moved_from is None
    assert recheck.target == datetime(2026, 11, 27, 18, 10, tzinfo=LONDON)
    assert recheck.earliest == datetime(2026, 11, 27, 17, 40, tzinfo=LONDON)
    assert recheck.latest == datetime(2026, 11, 27, 20, 10, tzinfo=LONDON)


@pytest.mark.parametrize(
    ("end", "target"),
    [
        # Sat 28 Nov 2026: not a working day in the demo policy (Mon-Fri).
        ("2026-11-28T10:15:00+00:00", datetime(2026, 11, 28, 11, 15, tzinfo=LONDON)),
        # Fri 25 Dec 2026: Christmas Day, an England bank holiday (gov.uk; holidays package).
        ("2026-12-25T10:15:00+00:00", datetime(2026, 12, 25, 11, 15, tzinfo=LONDON)),
        # Mon 28 Dec 2026: Boxing Day substitute day (gov.uk; holidays package).
        ("2026-12-28T16:50:00+00:00", datetime(2026, 12, 28, 17, 50, tzinfo=LONDON)),
    ],
)
def test_recheck_on_a_closed_day_stays_with_the_visit(
    policy: Policy, end: str, target: datetime
) -> None:
    recheck = items(note_ending(end), policy)["iop-recheck"]
    assert recheck.target == target
    assert recheck.moved_from is None
    assert recheck.passed_over == ()
    assert recheck.flag is None


def test_next_day_check_for_advanced_glaucoma_moves_off_sunday(policy: Policy) -> None:
    # Nesher & Kolker 1990: next-day check in advanced glaucoma. Sat 28 Nov 10:15 + 24 h is a
    # Sunday; Mon 08:30 is 46 h 15 min after, inside the 48 h window.
    note = note_ending("2026-11-28T10:15:00+00:00", before__risk_factors={"glaucoma": "advanced"})
    next_day = items(note, policy)["next-day-iop"]
    assert next_day.target == datetime(2026, 11, 30, 8, 30, tzinfo=LONDON)
    assert next_day.moved_from == datetime(2026, 11, 29, 10, 15, tzinfo=LONDON)
    assert next_day.moved_direction == "later"
    assert next_day.passed_over[0].day == date(2026, 11, 29)
    assert "glaucoma (advanced)" in next_day.reasons
    # The 18 h earliest is Sun 04:15; the next opening, Mon 08:30, is not after the target,
    # so the window starts then.
    assert next_day.earliest == datetime(2026, 11, 30, 8, 30, tzinfo=LONDON)
    assert next_day.earliest_from == datetime(2026, 11, 29, 4, 15, tzinfo=LONDON)
    assert next_day.latest == datetime(2026, 11, 30, 10, 15, tzinfo=LONDON)


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
    assert flagged.flag == FLAG_WHOLE_WINDOW
    assert flagged.moved_from is None


def test_recheck_done_when_a_reading_lies_in_its_window(policy: Policy) -> None:
    note = Note.model_validate_json(json.dumps(routine()))  # reading 60 min after the end
    recheck = items(note, policy)["iop-recheck"]
    assert recheck.done_by_reading == 0


def test_raised_review_on_christmas_is_never_brought_forward(policy: Policy) -> None:
    # Fri 18 Dec 2026 + 7 days = Fri 25 Dec, Christmas Day; raised-risk window 5/7/10 days
    # (default.toml, from memory) is 23-28 Dec. England bank holidays 2026 (gov.uk; holidays
    # package): 25 Dec Christmas Day, 28 Dec Boxing Day substitute; 26-27 Dec a weekend. No
    # open day from the target to the end of the window: flagged, not moved to 24 Dec.
    note = note_ending(
        "2026-12-18T10:15:00+00:00", before__risk_factors={"lattice_degeneration": True}
    )
    review = items(note, policy)["review"]
    assert review.earliest.date() == date(2026, 12, 23)
    assert review.latest.date() == date(2026, 12, 28)
    assert review.target == datetime(2026, 12, 25, 8, 30, tzinfo=LONDON)
    assert review.moved_from is None
    assert review.moved_direction is None
    assert review.moved_text() is None
    assert review.passed_over == ()
    assert review.flag == FLAG_AFTER_TARGET


def test_next_day_earliest_before_opening_starts_at_opening(policy: Policy) -> None:
    # Tue 24 Nov 2026 10:15 + 18 h = Wed 04:15, before the 08:30 opening; Wed 08:30 is not
    # after the 24 h target (Wed 10:15), so the window starts at 08:30 (next-day window
    # 18/24/48 h: Nesher & Kolker 1990; Simsek et al. 1998).
    note = note_ending("2026-11-24T10:15:00+00:00", before__risk_factors={"glaucoma": "advanced"})
    next_day = items(note, policy)["next-day-iop"]
    assert next_day.target == datetime(2026, 11, 25, 10, 15, tzinfo=LONDON)
    assert next_day.moved_from is None
    assert next_day.earliest == datetime(2026, 11, 25, 8, 30, tzinfo=LONDON)
    assert next_day.earliest_from == datetime(2026, 11, 25, 4, 15, tzinfo=LONDON)
    assert next_day.earliest_text() == (
        "window starts at opening time, Wed 25 Nov 2026 08:30 GMT; the policy's earliest "
        "time, Wed 25 Nov 2026 04:15 GMT, is outside clinic hours"
    )


def test_next_day_target_after_closing_moves_to_next_morning(policy: Policy) -> None:
    # Mon 23 Nov 2026 17:45 + 24 h = Tue 17:45, after the 17:30 closing: Wed 08:30 is the
    # next open time and lies inside the 48 h window (ends Wed 17:45). No day is closed.
    note = note_ending("2026-11-23T17:45:00+00:00", before__risk_factors={"glaucoma": "advanced"})
    next_day = items(note, policy)["next-day-iop"]
    assert next_day.target == datetime(2026, 11, 25, 8, 30, tzinfo=LONDON)
    assert next_day.moved_from == datetime(2026, 11, 24, 17, 45, tzinfo=LONDON)
    assert next_day.moved_direction == "later"
    assert next_day.passed_over == ()
    assert next_day.moved_text() == (
        "target moved later, from Tue 24 Nov 2026 17:45 GMT, which is outside clinic hours"
    )
    assert next_day.earliest == datetime(2026, 11, 24, 11, 45, tzinfo=LONDON)
    assert next_day.earliest_from is None


def test_next_day_target_is_never_moved_earlier(policy: Policy) -> None:
    # Wed 23 Dec 2026 17:40 + 24 h = Thu 24 Dec 17:40, after closing; the rest of the window
    # (to Fri 25 Dec 17:40) is Christmas Day (gov.uk; holidays package). Thu 24 Dec 11:40 to
    # 17:30 is open but before the target: flagged, not moved back.
    note = note_ending("2026-12-23T17:40:00+00:00", before__risk_factors={"glaucoma": "advanced"})
    next_day = items(note, policy)["next-day-iop"]
    assert next_day.target == datetime(2026, 12, 24, 17, 40, tzinfo=LONDON)
    assert next_day.moved_from is None
    assert next_day.flag == FLAG_AFTER_TARGET
    assert next_day.earliest == datetime(2026, 12, 24, 11, 40, tzinfo=LONDON)


def test_next_day_whole_window_on_christmas_says_earliest_is_outside_hours(
    policy: Policy,
) -> None:
    # Thu 24 Dec 2026 10:15: the window Fri 25 Dec 04:15 - Sat 26 Dec 10:15 is Christmas Day
    # and Boxing Day (gov.uk; holidays package). No opening before the target: say so.
    note = note_ending("2026-12-24T10:15:00+00:00", before__risk_factors={"glaucoma": "advanced"})
    next_day = items(note, policy)["next-day-iop"]
    assert next_day.flag == FLAG_WHOLE_WINDOW
    assert next_day.target == datetime(2026, 12, 25, 10, 15, tzinfo=LONDON)
    assert next_day.earliest == datetime(2026, 12, 25, 4, 15, tzinfo=LONDON)
    assert next_day.earliest_from is None
    assert next_day.earliest_outside_hours
    assert next_day.earliest_text() is not None


@pytest.mark.parametrize("glaucoma", [None, "none"])
def test_no_next_day_check_without_recorded_glaucoma(policy: Policy, glaucoma: str | None) -> None:
    # Not recorded (None) gives no reason, and neither does a recorded "none".
    note = note_ending("2026-11-27T10:15:00+00:00", before__risk_factors={"glaucoma": glaucoma})
    assert "next-day-iop" not in items(note, policy)


def test_flagged_and_done_cannot_be_one_item(policy: Policy) -> None:
    recheck = items(note_ending("2026-11-27T10:15:00+00:00"), policy)["iop-recheck"]
    with pytest.raises(ValueError, match="flagged for booking or done"):
        DueItem(
            recheck.kind,
            recheck.title,
            recheck.earliest,
            recheck.target,
            recheck.latest,
            recheck.all_day,
            recheck.reasons,
            recheck.source,
            flag=FLAG_WHOLE_WINDOW,
            done_by_reading=0,
        )


def test_no_item_is_both_flagged_and_done_over_the_christmas_fortnight(policy: Policy) -> None:
    # Sessions every 2 hours from 18 Dec 2026 to 3 Jan 2027 (England bank holidays 25, 26
    # observed 28 Dec and 1 Jan: gov.uk; holidays package), each with a safe reading 60 min
    # after and advanced glaucoma, so all three kinds of item are due.
    start = datetime(2026, 12, 18, 0, 15, tzinfo=UTC)
    for step in range(0, 16 * 24, 2):
        end = start + timedelta(hours=step)
        reading = {
            "value_mmhg": 16,
            "method": "applanation",
            "measured_at": (end + timedelta(minutes=60)).isoformat(),
        }
        note = note_ending(
            end.isoformat(),
            before__risk_factors={"glaucoma": "advanced"},
            result__iop_after=[reading],
        )
        due = items(note, policy)
        recheck = due["iop-recheck"]
        assert recheck.done_by_reading == 0, end
        assert recheck.flag is None, end
        assert recheck.moved_from is None, end
        for item in due.values():
            assert not (item.flag and item.done_by_reading is not None), end
            assert item.target >= (item.moved_from or item.target), end
            words = " ".join(
                t for t in (item.flag, item.moved_text(), item.earliest_text()) if t is not None
            )
            assert "book this by hand; done" not in words, end
