"""When the clinic is open: its time zone, working days and hours, holidays and closures.

The scheduler talks to the small ClinicCalendar protocol, so tests can pass a fixed calendar;
PolicyCalendar is the real one, with public holidays from the ``holidays`` package.
"""

from __future__ import annotations

from collections.abc import Iterable
from datetime import date, datetime, time
from typing import Protocol
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import holidays

from capnote.errors import PolicyError
from capnote.policy.model import WEEKDAYS, CalendarPolicy, Weekday


class ClinicCalendar(Protocol):
    """What the scheduler needs to know about the clinic's days."""

    @property
    def zone(self) -> ZoneInfo:
        """The clinic's IANA time zone."""
        ...

    def closed_because(self, day: date) -> str | None:
        """Why the clinic is shut on this day, or None when it is open."""
        ...

    def opens_at(self, day: date) -> datetime:
        """Opening time on this day, in the clinic's zone."""
        ...

    def closes_at(self, day: date) -> datetime:
        """Closing time on this day, in the clinic's zone."""
        ...


class PolicyCalendar:
    """The clinic calendar a site policy describes."""

    def __init__(
        self,
        zone: ZoneInfo,
        working_days: Iterable[Weekday],
        opens: time,
        closes: time,
        public_holidays: holidays.HolidayBase | None = None,
        closures: Iterable[date] = (),
    ) -> None:
        self._zone = zone
        self._working = {WEEKDAYS.index(d) for d in working_days}
        self._opens = opens
        self._closes = closes
        self._holidays = public_holidays
        self._closures = frozenset(closures)

    @classmethod
    def from_policy(cls, policy: CalendarPolicy) -> PolicyCalendar:
        """Build the calendar; an unknown zone or country is the operator's error."""
        try:
            zone = ZoneInfo(policy.timezone)
        except (ZoneInfoNotFoundError, ValueError) as exc:
            raise PolicyError(f"calendar.timezone {policy.timezone!r} is not an IANA zone") from exc
        public: holidays.HolidayBase | None = None
        if policy.holiday_country:
            # Asked first rather than caught: the package signals an unknown region with a
            # generic exception type.
            supported = holidays.list_supported_countries()
            subdivisions = supported.get(policy.holiday_country)
            subdivision = policy.holiday_subdivision
            if subdivisions is None or (
                subdivision is not None and subdivision not in subdivisions
            ):
                raise PolicyError(
                    f"calendar.holiday_country {policy.holiday_country!r} with subdivision "
                    f"{subdivision!r} is not known to the holidays package"
                )
            public = holidays.country_holidays(policy.holiday_country, subdiv=subdivision)
        return cls(zone, policy.working_days, policy.opens, policy.closes, public, policy.closures)

    @property
    def zone(self) -> ZoneInfo:
        """The clinic's IANA time zone."""
        return self._zone

    def closed_because(self, day: date) -> str | None:
        """Why the clinic is shut on this day, or None when it is open."""
        if day in self._closures:
            return "clinic closure"
        if self._holidays is not None:
            name = self._holidays.get(day)
            if name:
                return str(name)
        if day.weekday() not in self._working:
            return "not a working day"
        return None

    def opens_at(self, day: date) -> datetime:
        """Opening time on this day, in the clinic's zone."""
        return datetime.combine(day, self._opens, self._zone)

    def closes_at(self, day: date) -> datetime:
        """Closing time on this day, in the clinic's zone."""
        return datetime.combine(day, self._closes, self._zone)
