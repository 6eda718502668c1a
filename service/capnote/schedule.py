"""Follow-up due dates: policy windows and the clinic calendar in, due items out.

Offsets in minutes and hours are elapsed time (counted in UTC, so a clock change cannot
stretch a 60-minute recheck); offsets in days are calendar days in the clinic's zone.

The same-visit IOP recheck is part of the visit: the laser was done, so the clinic is open,
and the calendar neither moves it nor flags it. Every other target that falls when the
clinic is shut moves forward to the next open time inside its window, never earlier; when
there is none the item keeps its target and is flagged for a person to book by hand. A timed
window whose earliest time falls outside clinic hours starts at the next opening time when
that is still no later than the target (``earliest_from`` keeps the policy's earliest);
otherwise ``earliest_outside_hours`` says so.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from datetime import date, datetime, timedelta
from typing import Literal

from capnote.clinic_calendar import ClinicCalendar
from capnote.derive import Derived, session_reference
from capnote.note import Note, TimedIopReading
from capnote.policy.model import Policy, Window

DueKind = Literal["iop-recheck", "next-day-iop", "review"]
MovedDirection = Literal["later", "earlier"]

_TITLES: dict[DueKind, str] = {
    "iop-recheck": "IOP recheck after the laser",
    "next-day-iop": "Next-day IOP check",
    "review": "Review visit",
}
# Flags end with the words a person acts on; an item that is flagged is never also done.
FLAG_WHOLE_WINDOW = "the clinic is shut for the whole window: book this by hand"
FLAG_AFTER_TARGET = (
    "the clinic is shut from the target to the end of the window, and a target is never "
    "moved earlier: book this by hand"
)


@dataclass(frozen=True, slots=True)
class Closure:
    """A day the target passed over, and why the clinic was shut."""

    day: date
    reason: str


def _show_moment(all_day: bool) -> Callable[[datetime], str]:
    fmt = "%a %d %b %Y" if all_day else "%a %d %b %Y %H:%M %Z"
    return lambda moment: moment.strftime(fmt)


def _show_day(day: date) -> str:
    return day.strftime("%a %d %b %Y")


@dataclass(frozen=True, slots=True)
class DueItem:
    """One follow-up to book: its window, target and why it is due.

    moved_from: the target before the calendar moved it (None: not moved); moved_direction
    says whether the target now lies later or earlier than that. passed_over: the closed
    days between the two. flag: a sentence for a person when no open time could be found.
    done_by_reading: the index (in note.result.iop_after) of the reading that did the
    recheck. earliest_from: the policy's earliest time when the window was made to start at
    opening time; earliest_outside_hours: the earliest time is outside clinic hours and was
    left as it is, because the clinic does not open again before the target.
    """

    kind: DueKind
    title: str
    earliest: datetime
    target: datetime
    latest: datetime
    all_day: bool
    reasons: tuple[str, ...]
    source: str
    moved_from: datetime | None = None
    passed_over: tuple[Closure, ...] = ()
    flag: str | None = None
    done_by_reading: int | None = None
    moved_direction: MovedDirection | None = None
    earliest_from: datetime | None = None
    earliest_outside_hours: bool = False

    def __post_init__(self) -> None:
        # "book this by hand" and "done" together would contradict each other.
        if self.flag is not None and self.done_by_reading is not None:
            raise ValueError("a due item is either flagged for booking or done, not both")
        if (self.moved_from is None) != (self.moved_direction is None):
            raise ValueError("moved_from and moved_direction go together")

    def moved_text(
        self,
        show: Callable[[datetime], str] | None = None,
        show_day: Callable[[date], str] = _show_day,
    ) -> str | None:
        """The move in words, e.g. 'target moved later, from Fri 25 Dec 2026, past ...'.

        None when the target did not move. show formats a moment (default: the date for
        whole-day items, else date, time and zone); show_day formats a passed-over day.
        """
        if self.moved_from is None or self.moved_direction is None:
            return None
        fmt = show or _show_moment(self.all_day)
        text = f"target moved {self.moved_direction}, from {fmt(self.moved_from)}"
        if self.passed_over:
            days = ", ".join(f"{show_day(c.day)} ({c.reason})" for c in self.passed_over)
            text += f", past {days}"
        elif self.moved_direction == "later":
            text += ", which is outside clinic hours"
        return text

    def earliest_text(self, show: Callable[[datetime], str] | None = None) -> str | None:
        """Why the window starts when it does, when clinic hours changed or bear on it."""
        fmt = show or _show_moment(self.all_day)
        if self.earliest_from is not None:
            return (
                f"window starts at opening time, {fmt(self.earliest)}; the policy's earliest "
                f"time, {fmt(self.earliest_from)}, is outside clinic hours"
            )
        if self.earliest_outside_hours:
            return (
                f"the window's earliest time, {fmt(self.earliest)}, is outside clinic hours "
                "and the clinic does not open again before the target"
            )
        return None


def _shift(window: Window, target: int | None) -> tuple[int, int, int]:
    """The window moved so its target is the clinician's, keeping the policy's margins."""
    if target is None:
        return window.earliest, window.target, window.latest
    return (
        max(0, target - (window.target - window.earliest)),
        target,
        target + (window.latest - window.target),
    )


def _delta(unit: str, amount: int) -> timedelta:
    return timedelta(minutes=amount) if unit == "min" else timedelta(hours=amount)


def _open_at(calendar: ClinicCalendar, moment: datetime) -> bool:
    day = moment.date()
    return calendar.closed_because(day) is None and calendar.opens_at(
        day
    ) <= moment < calendar.closes_at(day)


def _first_open(
    calendar: ClinicCalendar, moment: datetime, until: datetime
) -> tuple[datetime | None, list[Closure]]:
    """The first open moment at or after moment and not after until (forward only), and
    the closed days passed over on the way."""
    passed: list[Closure] = []
    day = moment.date()
    while day <= until.date():
        shut = calendar.closed_because(day)
        if shut is not None:
            passed.append(Closure(day, shut))
        else:
            start = max(calendar.opens_at(day), moment)
            if start < calendar.closes_at(day):
                return (start if start <= until else None), passed
        day += timedelta(days=1)
    return None, passed


def _timed_window(
    kind: DueKind,
    window: Window,
    override: int | None,
    reference: datetime,
    calendar: ClinicCalendar,
    reasons: tuple[str, ...],
) -> DueItem:
    """A window in elapsed minutes or hours, before the calendar has a say."""
    low, mid, high = _shift(window, override)
    zone = calendar.zone
    return DueItem(
        kind,
        _TITLES[kind],
        (reference + _delta(window.unit, low)).astimezone(zone),
        (reference + _delta(window.unit, mid)).astimezone(zone),
        (reference + _delta(window.unit, high)).astimezone(zone),
        False,
        reasons,
        window.source,
    )


def _on_calendar(item: DueItem, calendar: ClinicCalendar) -> DueItem:
    """A timed item fitted to clinic hours: the target forward only, the earliest clamped."""
    fitted = item
    if not _open_at(calendar, item.target):
        to, passed = _first_open(calendar, item.target, item.latest)
        if to is not None:
            fitted = _moved(item, to, passed)
        else:
            anywhere, _ = _first_open(calendar, item.earliest, item.latest)
            fitted = _flagged(item, whole_window=anywhere is None)
    if _open_at(calendar, fitted.earliest):
        return fitted
    opening, _ = _first_open(calendar, fitted.earliest, fitted.target)
    if opening is not None:
        return replace(fitted, earliest=opening, earliest_from=fitted.earliest)
    return replace(fitted, earliest_outside_hours=True)


def _day_item(
    kind: DueKind,
    window: Window,
    override: int | None,
    reference: datetime,
    calendar: ClinicCalendar,
    reasons: tuple[str, ...],
) -> DueItem:
    """A due item measured in calendar days in the clinic's zone."""
    low, mid, high = _shift(window, override)
    base = reference.astimezone(calendar.zone).date()
    first, wanted, last = (base + timedelta(days=n) for n in (low, mid, high))
    item = DueItem(
        kind,
        _TITLES[kind],
        calendar.opens_at(first),
        calendar.opens_at(wanted),
        calendar.closes_at(last),
        True,
        reasons,
        window.source,
    )
    passed: list[Closure] = []
    day = wanted
    while day <= last:
        shut = calendar.closed_because(day)
        if shut is None:
            return item if day == wanted else _moved(item, calendar.opens_at(day), passed)
        passed.append(Closure(day, shut))
        day += timedelta(days=1)
    # Forward only: a review is never brought before its target, even to an open day inside
    # the window. A site setting to allow that would belong in the policy files, which this
    # module does not own; until then a person books it.
    open_before = any(
        calendar.closed_because(first + timedelta(days=n)) is None
        for n in range((wanted - first).days)
    )
    return _flagged(item, whole_window=not open_before)


def _moved(item: DueItem, to: datetime, passed: list[Closure]) -> DueItem:
    direction: MovedDirection = "later" if to > item.target else "earlier"
    return replace(
        item,
        target=to,
        moved_from=item.target,
        passed_over=tuple(passed),
        moved_direction=direction,
    )


def _flagged(item: DueItem, *, whole_window: bool) -> DueItem:
    return replace(item, flag=FLAG_WHOLE_WINDOW if whole_window else FLAG_AFTER_TARGET)


def recheck_done_by(
    readings: Sequence[TimedIopReading], needing: Sequence[int], item: DueItem
) -> int | None:
    """The reading that did the same-visit recheck, or None.

    needing holds the readings that need action, in time order (derive.pressure_pathway).
    The reading must lie inside the recheck window and not itself need action, and no later
    reading may need action: a reading that needed action has to be answered by a later one
    that does not. Of those, the earliest in time; readings may be in any order.
    """
    order = sorted(range(len(readings)), key=lambda i: (readings[i].measured_at, i))
    last_action = readings[needing[-1]].measured_at if needing else None
    flagged = set(needing)
    for i in order:
        at = readings[i].measured_at
        if not item.earliest <= at <= item.latest:
            continue
        if last_action is not None and at <= last_action:
            continue
        if i not in flagged:
            return i
    return None


def next_day_reasons(note: Note, derived: Derived, policy: Policy) -> tuple[str, ...]:
    """Why a next-day IOP check is due; empty when it is not.

    A glaucoma severity that is not recorded (None) is not read as "none": it simply gives
    no reason here (the rules say the item is missing).
    """
    reasons: list[str] = []
    glaucoma = note.before.risk_factors.glaucoma
    if glaucoma is not None and glaucoma in policy.schedule.next_day_iop.glaucoma_severities:
        reasons.append(f"glaucoma ({glaucoma})")
    if derived.iop.spike_grade == "severe":
        reasons.append("severe IOP rise after the laser")
    high = policy.thresholds.iop_high_mmhg.value
    if any(c.value_mmhg >= high for c in derived.iop.changes):
        reasons.append(f"IOP of {high:g} mmHg or more after the laser")
    return tuple(reasons)


def schedule(
    note: Note, derived: Derived, policy: Policy, calendar: ClinicCalendar
) -> list[DueItem]:
    """Every follow-up the note calls for, in time order."""
    windows = policy.schedule
    reference = session_reference(note)
    # Part of the visit: the calendar does not move or flag it (the clinic is open).
    recheck = _timed_window(
        "iop-recheck",
        windows.iop_recheck,
        note.plan.iop_recheck_minutes,
        reference,
        calendar,
        ("IOP peaks within hours of the laser",),
    )
    done = recheck_done_by(note.result.iop_after, derived.pathway.needs_action, recheck)
    items = [replace(recheck, done_by_reading=done)]
    why_next_day = next_day_reasons(note, derived, policy)
    if why_next_day:
        next_day = _timed_window(
            "next-day-iop", windows.next_day_iop, None, reference, calendar, why_next_day
        )
        items.append(_on_calendar(next_day, calendar))
    raised = derived.risk.level == "raised"
    review_window = windows.review_raised if raised else windows.review_routine
    review_reasons = (
        tuple(f"raised risk: {r.text}" for r in derived.risk.reasons)
        if raised
        else ("routine review after capsulotomy",)
    )
    items.append(
        _day_item(
            "review", review_window, note.plan.review_days, reference, calendar, review_reasons
        )
    )
    return sorted(items, key=lambda i: i.target)
