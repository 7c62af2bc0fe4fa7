"""When the nightly job runs: a standard 5-field crontab expression in an IANA time zone.

APScheduler 3.x reads cron fields its own way (day-of-week 0 is Monday, day-of-month and
day-of-week together mean AND). :func:`make_trigger` translates standard crontab
day-of-week numbers (0 or 7 = Sunday, 1 = Monday) into names and refuses expressions that
restrict both day fields, so an expression means what it means in crontab(5).
Every function takes "now" as an argument; only the daemon reads the clock.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from apscheduler.triggers.cron import CronTrigger

DAY_NAMES = ("sun", "mon", "tue", "wed", "thu", "fri", "sat", "sun")


def check_timezone(name: str) -> ZoneInfo:
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise ValueError(
            f"unknown IANA time zone {name!r}; use a name like Africa/Nairobi or UTC"
        ) from None


def make_trigger(expression: str, timezone: str) -> CronTrigger:
    """A trigger for a standard crontab expression; ValueError says what is wrong."""
    fields = expression.split()
    if len(fields) != 5:
        raise ValueError(
            f"a crontab expression has 5 fields (minute hour day month weekday), got {len(fields)}: "
            f"{expression!r}"
        )
    minute, hour, day, month, weekday = fields
    if day != "*" and weekday != "*":
        raise ValueError(
            "restrict either the day of month or the day of week, not both "
            f"(the scheduler would require both at once): {expression!r}"
        )
    try:
        return CronTrigger(
            minute=minute,
            hour=hour,
            day=day,
            month=month,
            day_of_week=_weekday_names(weekday),
            timezone=check_timezone(timezone),
        )
    except ValueError as exc:
        raise ValueError(f"{expression!r}: {exc}") from None


def _weekday_names(field: str) -> str:
    """A standard crontab day-of-week field (0-7, Sunday = 0 or 7, names, ranges, steps)
    as an explicit list of day names, which APScheduler reads the same way."""
    if field == "*":
        return field
    days: set[int] = set()
    for item in field.lower().split(","):
        part, _, step_text = item.partition("/")
        step = int(step_text) if step_text else 1
        if step < 1:
            raise ValueError(f"step {step_text!r} in day of week must be 1 or more")
        if part == "*":
            first, last = 0, 6
        else:
            start, _, end = part.partition("-")
            first = _day_number(start)
            last = _day_number(end) if end else (6 if step_text else first)
            if end and last == 0:
                last = 7  # "5-0" is not a range; treat 0 at the end as 7 (Sunday)
            if last < first:
                raise ValueError(f"day-of-week range {part!r} runs backwards")
        days.update(d % 7 for d in range(first, last + 1, step))
    return ",".join(DAY_NAMES[d] for d in sorted(days))


def _day_number(text: str) -> int:
    if text.isdigit():
        number = int(text)
        if number > 7:
            raise ValueError(f"day of week {number} is not between 0 and 7")
        return number
    if text[:3] in DAY_NAMES:
        return DAY_NAMES.index(text[:3])
    raise ValueError(f"day of week {text!r} is not a number 0-7 or a name like mon")


def next_fire(trigger: CronTrigger, after: datetime) -> datetime | None:
    """The first scheduled time strictly after ``after``."""
    # step in UTC: wall-clock arithmetic inside a repeated DST hour loses the fold and would
    # find the same slot again
    return trigger.get_next_fire_time(None, after.astimezone(UTC) + timedelta(microseconds=1))


def missed_slot(
    trigger: CronTrigger, last_scheduled: datetime | None, now: datetime, grace: timedelta
) -> datetime | None:
    """The latest slot that should have run since ``last_scheduled`` but did not, if still
    within ``grace`` of ``now``; None when nothing is owed.

    With no record of any scheduled run (a new installation), nothing is owed.
    """
    if last_scheduled is None:
        return None
    slot = next_fire(trigger, last_scheduled)
    latest = None
    while slot is not None and slot <= now:
        latest = slot
        slot = next_fire(trigger, slot)
    if latest is not None and now - latest <= grace:
        return latest
    return None
