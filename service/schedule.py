"""Follow-up due dates: policy windows and the clinic calendar in, due items out.

Offsets in minutes and hours are elapsed time (counted in UTC, so a clock change cannot
stretch a 60-minute recheck); offsets in days are calendar days in the clinic's zone. A
target that falls when the clinic is shut moves to the next open time inside its window,
else to the last open time before it; when neither exists the item keeps its target and
is flagged for a person to book by hand.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from datetime import date, datetime, timedelta
from typing import Literal

from schemas.note import Note
from service.clinic_calendar import ClinicCalendar
from service.derive import Derived, session_reference
from service.policy.model import Policy, Window

DueKind = Literal["iop-recheck", "next-day-iop", "review"]

_TITLES: dict[DueKind, str] = {
    "iop-recheck": "IOP recheck after the laser",
    "next-day-iop": "Next-day IOP check",
    "review": "Review visit",
}
# How far a day-granular search may look; windows are weeks at most, this is a safety stop.
_MAX_DAYS_SEARCHED = 400


@dataclass(frozen=True, slots=True)
class Closure:
    """A day the target passed over, and why the clinic was shut."""

    day: date
    reason: str


@dataclass(frozen=True, slots=True)
class DueItem:
    """One follow-up to book: its window, target and why it is due."""

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


def _timed_item(
    kind: DueKind,
    window: Window,
    override: int | None,
    reference: datetime,
    calendar: ClinicCalendar,
    reasons: tuple[str, ...],
) -> DueItem:
    """A due item measured in elapsed minutes or hours."""
    low, mid, high = _shift(window, override)
    zone = calendar.zone
    earliest = (reference + _delta(window.unit, low)).astimezone(zone)
    target = (reference + _delta(window.unit, mid)).astimezone(zone)
    latest = (reference + _delta(window.unit, high)).astimezone(zone)
    item = DueItem(kind, _TITLES[kind], earliest, target, latest, False, reasons, window.source)
    if _open_at(calendar, target):
        return item
    passed: list[Closure] = []
    day = target.date()
    forward: datetime | None = None
    while day <= latest.date():
        shut = calendar.closed_because(day)
        if shut is not None:
            passed.append(Closure(day, shut))
        else:
            start = max(calendar.opens_at(day), target)
            if start < calendar.closes_at(day):
                forward = start if start <= latest else None
                break
        day += timedelta(days=1)
    if forward is not None:
        return _moved(item, forward, passed)
    backward = _last_open_before(calendar, target, earliest)
    if backward is not None:
        return _moved(item, backward, [])
    return _flagged(item)


def _last_open_before(
    calendar: ClinicCalendar, target: datetime, earliest: datetime
) -> datetime | None:
    """The latest open moment at or after earliest and before target, if any."""
    day = target.date()
    while day >= earliest.date():
        if calendar.closed_because(day) is None:
            # One minute before closing: the last time a check can still be done that day.
            last = min(calendar.closes_at(day) - timedelta(minutes=1), target)
            if last >= max(calendar.opens_at(day), earliest):
                return last
        day -= timedelta(days=1)
    return None


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
    while day <= last and len(passed) < _MAX_DAYS_SEARCHED:
        shut = calendar.closed_because(day)
        if shut is None:
            return item if day == wanted else _moved(item, calendar.opens_at(day), passed)
        passed.append(Closure(day, shut))
        day += timedelta(days=1)
    day = wanted - timedelta(days=1)
    while day >= first:
        if calendar.closed_because(day) is None:
            return _moved(item, calendar.opens_at(day), passed)
        day -= timedelta(days=1)
    return _flagged(item)


def _moved(item: DueItem, to: datetime, passed: list[Closure]) -> DueItem:
    return replace(item, target=to, moved_from=item.target, passed_over=tuple(passed))


def _flagged(item: DueItem) -> DueItem:
    return replace(item, flag="the clinic is shut for the whole window: book this by hand")


def _done_by(note: Note, item: DueItem) -> DueItem:
    """Mark a same-day recheck as done when a post-laser reading already lies in its window."""
    for i, reading in enumerate(note.result.iop_after):
        if item.earliest <= reading.measured_at <= item.latest:
            return replace(item, done_by_reading=i)
    return item


def next_day_reasons(note: Note, derived: Derived, policy: Policy) -> tuple[str, ...]:
    """Why a next-day IOP check is due; empty when it is not."""
    reasons: list[str] = []
    glaucoma = note.before.risk_factors.glaucoma
    if glaucoma in policy.schedule.next_day_iop.glaucoma_severities:
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
    recheck = _timed_item(
        "iop-recheck",
        windows.iop_recheck,
        note.plan.iop_recheck_minutes,
        reference,
        calendar,
        ("IOP peaks within hours of the laser",),
    )
    items = [_done_by(note, recheck)]
    why_next_day = next_day_reasons(note, derived, policy)
    if why_next_day:
        items.append(
            _timed_item(
                "next-day-iop", windows.next_day_iop, None, reference, calendar, why_next_day
            )
        )
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
