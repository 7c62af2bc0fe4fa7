"""Stage 2: totals up the hierarchy against pandas groupby on a small invented hierarchy."""

from __future__ import annotations

import calendar
from collections.abc import Callable
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import LEVELS, SMALL_UNITS

from digest.hierarchy import Hierarchy, load_hierarchy
from digest.loading import Dataset
from digest.periods import parse_period
from digest.rollup import level_totals, rollup

MONTHS = ["2024-02", "2024-03", "2024-04", "2024-05", "2024-06"]
NAN = np.nan

# anc1 per facility per month (NaN = not reported). F5 closed 1 May, F6 opened 15 March.
ANC = {
    "F1": [10, 11, NAN, 13, 14],
    "F2": [20, NAN, 22, 23, 0],
    "F3": [NAN, NAN, 5, NAN, NAN],
    "F4": [7, 8, 9, NAN, NAN],
    "F5": [3, 4, 4, NAN, NAN],
    "F6": [NAN, NAN, 2, NAN, NAN],
}


@pytest.fixture
def hierarchy(write_units: Callable[..., Path]) -> Hierarchy:
    return load_hierarchy(write_units(), LEVELS)


@pytest.fixture
def dataset(hierarchy: Hierarchy) -> Dataset:
    capture = hierarchy.at_level("facility")
    anc = np.array([ANC[hierarchy.ids[u]] for u in capture], dtype=float)
    periods = np.array([parse_period(m, "month") for m in MONTHS])
    return Dataset(hierarchy, "month", periods, capture, {"anc1_visits": anc})


def ancestor(uid: str, level: str) -> str:
    rows = {r[0]: r for r in SMALL_UNITS}
    while rows[uid][3] != level:
        uid = rows[uid][2]
    return uid


def long_frame() -> pd.DataFrame:
    records = [
        {"facility": f, "period": m, "value": v}
        for f, values in ANC.items()
        for m, v in zip(MONTHS, values, strict=True)
    ]
    return pd.DataFrame(records)


@pytest.mark.parametrize("level", LEVELS)
def test_totals_against_pandas_groupby(hierarchy: Hierarchy, dataset: Dataset, level: str) -> None:
    levels = rollup(dataset, dataset.values, LEVELS)
    data = levels[level]
    assert [hierarchy.ids[u] for u in data.units] == [r[0] for r in SMALL_UNITS if r[3] == level]
    frame = long_frame().assign(unit=lambda f: f["facility"].map(lambda x: ancestor(x, level)))
    grouped = frame.groupby(["unit", "period"])["value"]
    # sum(min_count=1): NaN when no child reported; count(): children with a value
    sums = (
        grouped.sum(min_count=1)
        .unstack()
        .reindex(index=[hierarchy.ids[u] for u in data.units], columns=MONTHS)
    )
    counts = grouped.count().unstack().reindex(index=sums.index, columns=MONTHS)
    totals = data.metrics["anc1_visits"]
    np.testing.assert_array_equal(totals.values, sums.to_numpy(dtype=float))
    np.testing.assert_array_equal(totals.reported, counts.to_numpy(dtype=np.int64))


def test_only_reporting_children_count(hierarchy: Hierarchy, dataset: Dataset) -> None:
    totals = rollup(dataset, dataset.values, LEVELS)["district"].metrics["anc1_visits"]
    d1 = list(hierarchy.at_level("district")).index(hierarchy.index["D1"])
    # 2024-03: F1 = 11, F2 and F3 missing -> total 11 from 1 child; not NaN, not 11 + 0 + 0 / 3
    assert totals.values[d1, 1] == 11.0 and totals.reported[d1, 1] == 1
    # 2024-06: F2 reported 0 -> a reported zero counts as reporting
    assert totals.values[d1, 4] == 14.0 and totals.reported[d1, 4] == 2


def test_total_is_nan_when_no_child_reported(hierarchy: Hierarchy, dataset: Dataset) -> None:
    levels = rollup(dataset, dataset.values, LEVELS)
    d3 = list(hierarchy.at_level("district")).index(hierarchy.index["D3"])
    district = levels["district"].metrics["anc1_visits"]
    assert np.isnan(district.values[d3, [0, 1, 3, 4]]).all()
    assert district.reported[d3, [0, 1, 3, 4]].tolist() == [0, 0, 0, 0]
    assert district.values[d3, 2] == 2.0
    # some facility reported in every month, so the country always has a total
    assert not np.isnan(levels["country"].metrics["anc1_visits"].values).any()


def _open_in(uid: str, month: str) -> bool:
    """Reference: open on at least one day of the month (closed = first day not open)."""
    row = {r[0]: r for r in SMALL_UNITS}[uid]
    opened = date.fromisoformat(row[4]) if row[4] else date.min
    closed = date.fromisoformat(row[5]) if row[5] else date.max
    year, m = map(int, month.split("-"))
    first, last = date(year, m, 1), date(year, m, calendar.monthrange(year, m)[1])
    return opened <= last and closed > first


@pytest.mark.parametrize("level", LEVELS)
def test_expected_children_are_the_open_ones(
    hierarchy: Hierarchy, dataset: Dataset, level: str
) -> None:
    data = rollup(dataset, dataset.values, LEVELS)[level]
    frame = pd.DataFrame(
        [
            {"unit": ancestor(f, level), "period": m, "open": _open_in(f, m)}
            for f in ANC
            for m in MONTHS
        ]
    )
    expected = (
        frame.groupby(["unit", "period"])["open"]
        .sum()
        .unstack()
        .reindex(index=[hierarchy.ids[u] for u in data.units], columns=MONTHS)
    )
    np.testing.assert_array_equal(data.expected, expected.to_numpy(dtype=np.int64))
    # spot checks by hand: D2 has F4 and F5 (closed 1 May); D3 has F6 (opened 15 March)
    if level == "district":
        rows = {hierarchy.ids[u]: i for i, u in enumerate(data.units)}
        assert data.expected[rows["D2"]].tolist() == [2, 2, 2, 1, 1]
        assert data.expected[rows["D3"]].tolist() == [0, 1, 1, 1, 1]


def test_capture_level_is_unchanged(hierarchy: Hierarchy, dataset: Dataset) -> None:
    anc = dataset.values["anc1_visits"]
    totals = level_totals(anc, hierarchy, dataset.capture, "facility")
    np.testing.assert_array_equal(totals.values, anc)
    np.testing.assert_array_equal(totals.reported, (~np.isnan(anc)).astype(int))


def test_zero_one_series_sum_to_a_count(hierarchy: Hierarchy, dataset: Dataset) -> None:
    flag = (dataset.values["anc1_visits"] > 8).astype(float)
    flag[np.isnan(dataset.values["anc1_visits"])] = np.nan
    country = level_totals(flag, hierarchy, dataset.capture, "country")
    # reference: pandas counts the facilities above 8 per month
    frame = long_frame()
    above = frame[frame["value"] > 8].groupby("period").size().reindex(MONTHS, fill_value=0)
    np.testing.assert_array_equal(country.values[0], above.to_numpy(dtype=float))
