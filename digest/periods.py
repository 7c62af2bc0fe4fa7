"""Reporting periods: ISO 8601 months (``2026-10``) and ISO weeks (``2026-W42``).

A period is held as an integer ordinal so that consecutive periods differ by one:
months count from year 0, weeks count Mondays from 0001-01-01.
"""

from __future__ import annotations

import re
from datetime import date, timedelta
from typing import Literal

PeriodKind = Literal["month", "week"]

_MONTH = re.compile(r"^(\d{4})-(\d{2})$", re.ASCII)  # ASCII digits only
_WEEK = re.compile(r"^(\d{4})-?W(\d{2})$", re.ASCII)


def parse_period(text: str, kind: PeriodKind) -> int:
    """Return the ordinal of ``text``; raise ValueError naming the expected form."""
    text = text.strip()
    if kind == "month":
        m = _MONTH.match(text)
        if not m or not 1 <= int(m.group(2)) <= 12:
            raise ValueError(f"not an ISO 8601 month like 2026-10: {text!r}")
        return int(m.group(1)) * 12 + int(m.group(2)) - 1
    m = _WEEK.match(text)
    if not m:
        raise ValueError(f"not an ISO 8601 week like 2026-W42: {text!r}")
    year, week = int(m.group(1)), int(m.group(2))
    if not 1 <= week <= weeks_in_year(year):
        raise ValueError(f"ISO year {year} has no week {week}: {text!r}")
    return _monday(year, week).toordinal() // 7


def format_period(ordinal: int, kind: PeriodKind) -> str:
    """Inverse of :func:`parse_period`."""
    if kind == "month":
        year, month0 = divmod(int(ordinal), 12)
        return f"{year:04d}-{month0 + 1:02d}"
    year, week, _ = date.fromordinal(int(ordinal) * 7 + 1).isocalendar()
    return f"{year:04d}-W{week:02d}"


def weeks_in_year(year: int) -> int:
    """52 or 53: 28 December always lies in the last ISO week of its year."""
    return date(year, 12, 28).isocalendar()[1]


def period_dates(ordinal: int, kind: PeriodKind) -> tuple[date, date]:
    """First and last calendar day of a period."""
    if kind == "month":
        year, month0 = divmod(int(ordinal), 12)
        first = date(year, month0 + 1, 1)
        nxt = date(year + (month0 + 1) // 12, (month0 + 1) % 12 + 1, 1)
        return first, nxt - timedelta(days=1)
    first = date.fromordinal(int(ordinal) * 7 + 1)
    return first, first + timedelta(days=6)


def periods_per_year(kind: PeriodKind) -> int:
    """Nominal periods in a year (52 for weeks; week 53 is handled by the caller)."""
    return 12 if kind == "month" else 52


def _monday(year: int, week: int) -> date:
    return date.fromisocalendar(year, week, 1)
