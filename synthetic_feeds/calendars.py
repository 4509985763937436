"""Trading calendars of the fictional venues: weekdays minus each venue's own holidays.

A holiday rule is either a fixed day of the year (moved to the Friday before when it falls on
a Saturday and to the Monday after when it falls on a Sunday) or the n-th given weekday of a
month (n = -1 for the last one). Every name here is invented.
"""

from __future__ import annotations

import calendar
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np
import pandas as pd
from numpy.typing import NDArray

_WEEKDAYS = ("Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday")
_ORDINALS = MappingProxyType({1: "first", 2: "second", 3: "third", 4: "fourth", -1: "last"})


@dataclass(frozen=True, slots=True)
class HolidayRule:
    """One recurring closure of a venue.

    Attributes
    ----------
    name : str
        The holiday's (invented) name.
    month : int
        Month 1-12.
    day : int or None
        Day of the month for a fixed-date holiday.
    weekday, nth : int or None
        For a floating holiday: weekday (0 = Monday) and its ordinal in the month (1-4, or -1
        for the last).
    """

    name: str
    month: int
    day: int | None = None
    weekday: int | None = None
    nth: int | None = None

    def __post_init__(self) -> None:
        if not 1 <= self.month <= 12:
            raise ValueError(f"holiday {self.name!r}: month must be 1-12, got {self.month}")
        fixed = self.day is not None
        floating = self.weekday is not None and self.nth is not None
        if fixed == floating:
            raise ValueError(f"holiday {self.name!r}: give either day or (weekday, nth)")
        if floating and (self.nth not in _ORDINALS or not 0 <= self.weekday <= 4):
            raise ValueError(f"holiday {self.name!r}: nth must be 1-4 or -1, weekday 0-4")

    def date_in(self, year: int) -> pd.Timestamp:
        """The weekday on which the venue is closed for this holiday in ``year``."""
        if self.day is not None:
            d = pd.Timestamp(year=year, month=self.month, day=self.day)
            if d.day_of_week == 5:
                return d - pd.Timedelta(days=1)
            if d.day_of_week == 6:
                return d + pd.Timedelta(days=1)
            return d
        days = [day for week in calendar.monthcalendar(year, self.month)
                for i, day in enumerate(week) if i == self.weekday and day]
        index = self.nth - 1 if self.nth > 0 else -1
        return pd.Timestamp(year=year, month=self.month, day=days[index])

    def describe(self) -> str:
        """The rule in words, e.g. ``Lantern Monday: first Monday of June``."""
        month = calendar.month_name[self.month]
        if self.day is not None:
            return f"{self.name}: {self.day} {month} (Saturday -> Friday, Sunday -> Monday)"
        return f"{self.name}: {_ORDINALS[self.nth]} {_WEEKDAYS[self.weekday]} of {month}"


@dataclass(frozen=True, slots=True)
class Venue:
    """A trading venue of the fictional market and its recurring holidays.

    Attributes
    ----------
    name : str
        Short identifier (lower-case, hyphenated).
    description : str
        One line for people.
    holidays : tuple of HolidayRule
    """

    name: str
    description: str
    holidays: tuple[HolidayRule, ...]

    def holiday_dates(self, start: pd.Timestamp, end: pd.Timestamp) -> pd.DatetimeIndex:
        """Weekdays in [start, end] on which the venue is closed by one of its rules."""
        dates = {rule.date_in(year) for year in range(start.year - 1, end.year + 2)
                 for rule in self.holidays}
        return pd.DatetimeIndex(sorted(d for d in dates if start <= d <= end))

    def to_json(self) -> dict:
        """JSON-ready description of the venue."""
        return {"name": self.name, "description": self.description,
                "holiday_rules": [r.describe() for r in self.holidays]}


def business_days(start: str | pd.Timestamp, periods: int) -> pd.DatetimeIndex:
    """``periods`` consecutive weekdays (Monday to Friday) from the first one on/after ``start``.

    This is the master calendar of a scenario: copula regimes are laid out on it, and each
    asset trades on the part of it that its venue keeps open.
    """
    return pd.bdate_range(start=pd.Timestamp(start), periods=periods, name="date")


def trading_mask(dates: pd.DatetimeIndex, closed: pd.DatetimeIndex) -> NDArray[np.bool_]:
    """True on the master-calendar dates that are not in ``closed``."""
    return ~np.asarray(dates.isin(closed))
