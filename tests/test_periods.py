"""ISO 8601 months and weeks, checked against datetime and the worked examples in methods.md §6."""

from __future__ import annotations

import calendar
import re
from datetime import date, timedelta

import pytest
from hypothesis import assume, given
from hypothesis import strategies as st
from strategies import month_labels, week_labels

from digest.periods import format_period, parse_period, period_dates, weeks_in_year

# Worked examples: methods.md §6 table. Each row is re-derived below with
# datetime.date.isocalendar (general-purpose library), so a wrong row fails too.
# (calendar date, ISO week-year, ISO week, ISO weekday, source of the row)
ISO_EXAMPLES = [
    (date(2003, 12, 29), 2004, 1, 1, "Python docs: ISO 2004 starts Mon 29 Dec 2003"),
    (date(2004, 1, 4), 2004, 1, 7, "Python docs: week 1 of 2004 ends Sun 4 Jan"),
    (date(2006, 12, 31), 2006, 52, 7, "methods.md §6, liquisearch page"),
    (date(2008, 12, 29), 2009, 1, 1, "methods.md §6 (computed)"),
    (date(2010, 1, 3), 2009, 53, 7, "methods.md §6: 2009 is a 53-week year"),
    (date(2012, 12, 31), 2013, 1, 1, "methods.md §6: week 1 of 2013 starts 2012-12-31"),
    (date(2014, 12, 29), 2015, 1, 1, "methods.md §6: 2015 has 53 weeks"),
    (date(2019, 12, 30), 2020, 1, 1, "methods.md §6"),
    (date(2021, 1, 1), 2020, 53, 5, "methods.md §6: 1 January in previous year's week 53"),
    (date(2022, 12, 31), 2022, 52, 6, "methods.md §6: regression, NOT 2023-W01"),
    (date(2023, 1, 1), 2022, 52, 7, "methods.md §6"),
    (date(2024, 12, 30), 2025, 1, 1, "methods.md §6: late December in next year's week 1"),
    (date(2026, 1, 1), 2026, 1, 4, "methods.md §6"),
    (date(2027, 1, 1), 2026, 53, 5, "methods.md §6: 2026 is a 53-week year"),
]


@pytest.mark.parametrize(("day", "year", "week", "weekday", "source"), ISO_EXAMPLES)
def test_iso_week_examples(day: date, year: int, week: int, weekday: int, source: str) -> None:
    # the table row itself agrees with Python's datetime
    assert tuple(day.isocalendar()) == (year, week, weekday), source
    label = f"{year:04d}-W{week:02d}"
    ordinal = parse_period(label, "week")
    first, last = period_dates(ordinal, "week")
    # the parsed week is the Monday..Sunday that contains the calendar date
    assert first == day - timedelta(days=weekday - 1)
    assert last == first + timedelta(days=6)
    assert first <= day <= last
    assert first.isoweekday() == 1 and last.isoweekday() == 7
    assert format_period(ordinal, "week") == label
    # round trip through datetime's own inverse
    assert date.fromisocalendar(year, week, weekday) == day


def test_first_of_january_2021_is_in_2020_w53() -> None:
    # ISO 8601 worked example, methods.md §6; cross-checked with datetime
    assert date(2021, 1, 1).isocalendar()[:2] == (2020, 53)
    first, last = period_dates(parse_period("2020-W53", "week"), "week")
    assert first <= date(2021, 1, 1) <= last


def test_2022_12_31_is_2022_w52_not_2023_w01() -> None:
    # methods.md §6: one encyclopedia page wrongly says 2023-W01-6
    assert date(2022, 12, 31).isocalendar()[:2] == (2022, 52)
    first, last = period_dates(parse_period("2022-W52", "week"), "week")
    assert first <= date(2022, 12, 31) <= last
    assert period_dates(parse_period("2023-W01", "week"), "week")[0] == date(2023, 1, 2)


@pytest.mark.parametrize("label", ["2026-W53", "2020W53", "2020-W53", "2015-W53", "2009-W53"])
def test_week_53_valid_in_53_week_years(label: str) -> None:
    year = int(label[:4])
    assert date(year, 12, 28).isocalendar()[1] == 53  # datetime: 28 Dec is in the last week
    ordinal = parse_period(label, "week")
    assert period_dates(ordinal, "week")[0] == date.fromisocalendar(year, 53, 1)


@pytest.mark.parametrize("label", ["2021-W53", "2025-W53", "2022-W53", "2026-W54", "2026-W00"])
def test_week_out_of_range_refused(label: str) -> None:
    year, week = int(label[:4]), int(label[-2:])
    with pytest.raises(ValueError):  # datetime refuses the same week
        date.fromisocalendar(year, week, 1)
    with pytest.raises(ValueError, match=re.escape(label)):
        parse_period(label, "week")


def _long_year_rule(year: int) -> bool:
    """ISO rule (methods.md §6, from memory of the standard): a year has 53 weeks when
    1 January is a Thursday, or a Wednesday in a leap year."""
    jan1 = date(year, 1, 1).isoweekday()
    return jan1 == 4 or (jan1 == 3 and calendar.isleap(year))


def test_53_week_years() -> None:
    long_years = [y for y in range(2015, 2040) if weeks_in_year(y) == 53]
    assert long_years == [2015, 2020, 2026, 2032, 2037]  # methods.md §6 (computed list)
    assert long_years == [y for y in range(2015, 2040) if _long_year_rule(y)]
    # 71 of every 400 years have 53 weeks (methods.md §6, liquisearch page)
    count = 0
    for year in range(2000, 2400):
        try:
            parse_period(f"{year}-W53", "week")
        except ValueError:
            continue
        count += 1
    assert count == 71


def test_months() -> None:
    oct_2026 = parse_period("2026-10", "month")
    assert format_period(oct_2026, "month") == "2026-10"
    assert parse_period("2026-12", "month") + 1 == parse_period("2027-01", "month")
    assert parse_period("2027-01", "month") - parse_period("2026-01", "month") == 12
    # calendar.monthrange (standard library) for the last day, leap February included
    for label, year, month in [("2024-02", 2024, 2), ("2023-02", 2023, 2), ("2026-12", 2026, 12)]:
        first, last = period_dates(parse_period(label, "month"), "month")
        assert first == date(year, month, 1)
        assert last == date(year, month, calendar.monthrange(year, month)[1])
    assert period_dates(parse_period("2024-02", "month"), "month")[1].day == 29


@pytest.mark.parametrize(
    ("text", "kind"),
    [
        ("2026-13", "month"),
        ("2026-00", "month"),
        ("26-10", "month"),
        ("2026/10", "month"),
        ("2026-1", "month"),
        ("2026-W42", "month"),
        ("2026-10", "week"),
        ("2026-w42", "week"),
        ("2026-W4", "week"),
        ("", "week"),
        ("", "month"),
        ("２０２６-10", "month"),  # full-width digits are not ISO 8601 digits
        ("٢٠٢٦-W05", "week"),  # nor are Arabic-Indic digits
    ],
)
def test_garbage_refused(text: str, kind: str) -> None:
    with pytest.raises(ValueError, match="ISO"):
        parse_period(text, kind)  # type: ignore[arg-type]


@given(week_labels())
def test_week_round_trip(label: str) -> None:
    assert format_period(parse_period(label, "week"), "week") == label


@given(month_labels())
def test_month_round_trip(label: str) -> None:
    assert format_period(parse_period(label, "month"), "month") == label


@given(week_labels())
def test_consecutive_week_ordinals_are_seven_days_apart(label: str) -> None:
    ordinal = parse_period(label, "week")
    monday = date.fromisocalendar(int(label[:4]), int(label[-2:]), 1)
    assert period_dates(ordinal, "week")[0] == monday
    nxt = monday + timedelta(days=7)  # date arithmetic as the reference
    year, week, _ = nxt.isocalendar()
    assert format_period(ordinal + 1, "week") == f"{year:04d}-W{week:02d}"
    assert parse_period(f"{year:04d}-W{week:02d}", "week") == ordinal + 1
    assert period_dates(ordinal + 1, "week")[0] == nxt


@given(month_labels())
def test_consecutive_month_ordinals(label: str) -> None:
    ordinal = parse_period(label, "month")
    first, last = period_dates(ordinal, "month")
    assert first == date(int(label[:4]), int(label[5:]), 1)
    nxt_first = last + timedelta(days=1)  # the day after the month ends starts the next one
    assert nxt_first.day == 1
    assert period_dates(ordinal + 1, "month")[0] == nxt_first
    assert format_period(ordinal + 1, "month") == f"{nxt_first.year:04d}-{nxt_first.month:02d}"


_LOOKS_VALID = re.compile(r"\s*[0-9]{4}-?W[0-9]{2}\s*|\s*[0-9]{4}-[0-9]{2}\s*", re.ASCII)


@given(
    st.one_of(
        st.text(max_size=12),
        st.text(alphabet="0123456789-W/ ٢２", max_size=10),
    )
)
def test_parse_rejects_garbage(text: str) -> None:
    assume(not _LOOKS_VALID.fullmatch(text))
    for kind in ("month", "week"):
        with pytest.raises(ValueError):
            parse_period(text, kind)  # type: ignore[arg-type]
