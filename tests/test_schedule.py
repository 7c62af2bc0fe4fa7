"""Schedules mean what crontab(5) says they mean (day of week 0 and 7 are Sunday, 1 is
Monday), whatever the scheduler library numbers internally; DST changes do not hang or
double-count the catch-up search."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest

from digest.schedule import make_trigger, missed_slot, next_fire


def _weekday_of_next_fire(field: str) -> set[int]:
    trigger = make_trigger(f"0 6 * * {field}", "UTC")
    t = datetime(2026, 11, 30, tzinfo=UTC)  # a Monday
    days = set()
    for _ in range(14):
        t = next_fire(trigger, t)
        days.add(t.isoweekday() % 7)  # crontab numbering: Sunday 0 ... Saturday 6
    return days


@pytest.mark.parametrize(
    ("field", "days"),
    [
        ("0", {0}),  # crontab(5): 0 or 7 is Sunday
        ("7", {0}),
        ("1-5", {1, 2, 3, 4, 5}),  # Monday to Friday
        ("sat,sun", {6, 0}),
        ("*/2", {0, 2, 4, 6}),  # every other day counted from Sunday
        ("5-7", {5, 6, 0}),
    ],
)
def test_weekdays_follow_crontab(field: str, days: set[int]) -> None:
    assert _weekday_of_next_fire(field) == days


@pytest.mark.parametrize(
    "expression",
    ["30 2 * *", "30 2 * * * *", "30 2 1 * mon", "61 2 * * *", "0 2 * * 8", "@daily"],
)
def test_bad_expressions_are_refused(expression: str) -> None:
    with pytest.raises(ValueError):
        make_trigger(expression, "UTC")


def test_missed_slot_in_a_fall_back_night_returns() -> None:
    # Europe/London repeats 01:00-02:00 local on 2026-10-25 (BST ends, common knowledge of
    # the EU/UK summer-time rule: last Sunday of October at 01:00 UTC).
    trigger = make_trigger("30 1 * * *", "Europe/London")
    last = datetime(2026, 10, 24, 0, 30, tzinfo=UTC)
    now = datetime(2026, 10, 25, 12, 0, tzinfo=UTC)
    slot = missed_slot(trigger, last, now, timedelta(hours=24))
    assert slot is not None and slot <= now and slot > last


def test_nothing_owed_without_history_or_beyond_grace() -> None:
    trigger = make_trigger("0 5 * * *", "UTC")
    now = datetime(2026, 12, 2, 12, tzinfo=UTC)
    assert missed_slot(trigger, None, now, timedelta(hours=24)) is None
    assert missed_slot(trigger, now - timedelta(days=5), now, timedelta(hours=2)) is None
    assert missed_slot(trigger, now - timedelta(days=2), now, timedelta(hours=24)) == datetime(
        2026, 12, 2, 5, tzinfo=UTC
    )
