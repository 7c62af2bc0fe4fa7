"""Loading values: every reject reason with its line, valid rows flow, CSV and Parquet agree."""

from __future__ import annotations

import csv
from collections.abc import Callable
from datetime import date, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import LEVELS, write_csv

from digest.config import Config, config_from_dict
from digest.errors import DataError
from digest.hierarchy import Hierarchy, load_hierarchy
from digest.loading import Loaded, build_dataset, load_values, read_values_file
from digest.periods import parse_period

HEADER = ("unit", "metric", "period", "value")

# (unit, metric, period, value, why) -- why is "" for a row that must load
ROWS: list[tuple[str, str, str, str, str]] = [
    ("F1", "anc1_visits", "2024-01", "10", ""),
    ("F2", "anc1_visits", "2024-01", "20", ""),
    ("F9", "anc1_visits", "2024-01", "5", "unknown unit"),
    ("D1", "anc1_visits", "2024-01", "5", "unit is not a facility"),
    ("F1", "anc9_visits", "2024-01", "5", "unknown metric"),
    ("F1", "anc_any", "2024-01", "1", "metric is derived"),
    ("F1", "anc1_visits", "2024-13", "5", "period cannot be read"),
    ("F3", "anc1_visits", "2024-02", "", "value is empty"),
    ("F3", "anc1_visits", "2024-03", "ten", "value is not a number"),
    ("F4", "anc1_visits", "2024-01", "-3", "negative count"),
    ("F4", "stock_change", "2024-01", "-3", ""),  # not a count: negative is fine
    ("F1", "penta1_doses", "2024-02", "7", ""),
    ("F1", "penta1_doses", "2024-02", "7", "collapsed"),  # exact duplicate of the row above
    ("F2", "penta1_doses", "2024-02", "8", "conflicting duplicate"),
    ("F2", "penta1_doses", "2024-02", "9", "conflicting duplicate"),
    (" F2 ", " anc1_visits", "2024-03 ", " 21.5 ", ""),  # surrounding spaces are ignored
    ("F6", "anc1_visits", "2024-03", "1e2", ""),
]


def make_config(tmp_path: Path, *, max_reject_share: float = 1.0, period: str = "month") -> Config:
    raw: dict[str, Any] = {
        "data": {
            "units": "units.csv",
            "values": "values.csv",
            "period": period,
            "levels": list(LEVELS),
            "max_reject_share": max_reject_share,
        },
        "metric": [
            {"code": "anc1_visits", "label": "First antenatal visits"},
            {"code": "penta1_doses", "label": "Pentavalent dose 1"},
            {"code": "stock_change", "label": "Change in stock", "count": False},
        ],
        "derived": [{"code": "anc_any", "label": "Any ANC", "expr": "anc1_visits > 0"}],
    }
    return config_from_dict(raw, tmp_path / "digest.toml")


@pytest.fixture
def hierarchy(write_units: Callable[..., Path]) -> Hierarchy:
    return load_hierarchy(write_units(), LEVELS)


def csv_lines(path: Path) -> list[int]:
    """Reference line numbers: the standard csv module's line counter for each data row."""
    with path.open(newline="", encoding="utf-8") as fh:
        reader = csv.reader(fh)
        next(reader)
        return [reader.line_num for row in reader if row]


def load_rows(tmp_path: Path, hierarchy: Hierarchy, **config: Any) -> tuple[Loaded, Path]:
    path = write_csv(tmp_path / "values.csv", HEADER, [r[:4] for r in ROWS])
    loaded = load_values(make_config(tmp_path, **config), hierarchy)
    return loaded, path


def test_every_reject_reason_with_its_line(tmp_path: Path, hierarchy: Hierarchy) -> None:
    loaded, path = load_rows(tmp_path, hierarchy)
    lines = csv_lines(path)
    expected = {
        line: why for line, (*_, why) in zip(lines, ROWS, strict=True) if why and why != "collapsed"
    }
    rejects = loaded.rejects
    assert list(rejects.columns) == [
        "source",
        "line",
        "unit",
        "metric",
        "period",
        "value",
        "reason",
    ]
    assert (rejects["source"] == str(path)).all()
    got = dict(zip(rejects["line"].astype(int), rejects["reason"], strict=True))
    assert set(got) == set(expected)
    for line, why in expected.items():
        assert got[line].startswith(why), (line, got[line])
    # the rejected row is shown as it was written
    row = rejects.set_index("line").loc[lines[8]]
    assert (row["unit"], row["period"], row["value"]) == ("F3", "2024-03", "ten")


def test_conflicting_duplicates_name_both_lines(tmp_path: Path, hierarchy: Hierarchy) -> None:
    loaded, path = load_rows(tmp_path, hierarchy)
    lines = csv_lines(path)
    conflict_lines = [ln for ln, r in zip(lines, ROWS, strict=True) if r[4].startswith("conflict")]
    rejects = loaded.rejects.set_index("line")
    for line in conflict_lines:
        reason = rejects.loc[line, "reason"]
        assert f"line {conflict_lines[0]}: 8" in reason and f"line {conflict_lines[1]}: 9" in reason
    # neither value was kept
    f2 = list(loaded.dataset.capture).index(hierarchy.index["F2"])
    feb = loaded.dataset.period_labels.index("2024-02")
    assert np.isnan(loaded.dataset.values["penta1_doses"][f2, feb])


def test_counts_and_valid_rows_flow(tmp_path: Path, hierarchy: Hierarchy) -> None:
    loaded, _ = load_rows(tmp_path, hierarchy)
    whys = [r[4] for r in ROWS]
    stats = loaded.stats
    assert stats.rows_read == len(ROWS)
    assert stats.duplicates_collapsed == whys.count("collapsed")
    assert stats.rows_rejected == sum(1 for w in whys if w and w != "collapsed")
    assert stats.rows_loaded == whys.count("")
    assert stats.rows_read == stats.rows_rejected + stats.duplicates_collapsed + stats.rows_loaded
    assert stats.reject_share == stats.rows_rejected / stats.rows_read

    # reference: pandas, from the rows marked valid, stripped and pivoted
    valid = pd.DataFrame(
        [[x.strip() for x in r[:4]] for r in ROWS if r[4] == ""], columns=list(HEADER)
    ).astype({"value": float})
    ds = loaded.dataset
    months = pd.period_range(valid["period"].min(), "2024-03", freq="M")
    assert ds.period_labels == [str(p) for p in months]  # contiguous, ascending
    facilities = [hierarchy.ids[u] for u in ds.capture]
    assert facilities == ["F1", "F2", "F3", "F4", "F5", "F6"]
    for metric in ("anc1_visits", "penta1_doses", "stock_change"):
        table = (
            valid[valid["metric"] == metric]
            .pivot_table(index="unit", columns="period", values="value", aggfunc="first")
            .reindex(index=facilities, columns=ds.period_labels)
        )
        np.testing.assert_array_equal(ds.values[metric], table.to_numpy(dtype=float))
    assert set(ds.values) == {"anc1_visits", "penta1_doses", "stock_change"}


def test_too_many_rejects_fail_the_load(tmp_path: Path, hierarchy: Hierarchy) -> None:
    rejected = sum(1 for r in ROWS if r[4] and r[4] != "collapsed")
    share = rejected / len(ROWS)
    with pytest.raises(DataError) as info:
        load_rows(tmp_path, hierarchy, max_reject_share=0.05)
    message = str(info.value)
    assert str(tmp_path / "values.csv") in message
    assert f"{rejected} of {len(ROWS)} rows rejected" in message
    assert f"({share:.1%})" in message and "max_reject_share = 5.0%" in message
    assert "rejects.csv" in message
    # at exactly the share it still loads ("more than" the limit fails)
    assert load_rows(tmp_path, hierarchy, max_reject_share=share)[0].stats.rows_rejected == rejected


def test_empty_lines_do_not_shift_line_numbers(tmp_path: Path, hierarchy: Hierarchy) -> None:
    path = tmp_path / "values.csv"
    path.write_text(
        "unit,metric,period,value\n"
        "F1,anc1_visits,2024-01,10\n"
        "\n"
        "F1,anc1_visits,2024-02,x\n"
        "\n\n"
        "F9,anc1_visits,2024-02,3\n",
        encoding="utf-8",
    )
    loaded = load_values(make_config(tmp_path), hierarchy)
    assert loaded.rejects["line"].tolist() == csv_lines(path)[1:] == [4, 7]


def test_crlf_line_endings(tmp_path: Path, hierarchy: Hierarchy) -> None:
    path = tmp_path / "values.csv"
    path.write_bytes(
        b"unit,metric,period,value\r\nF1,anc1_visits,2024-01,10\r\nF7,anc1_visits,2024-01,1\r\n"
    )
    loaded = load_values(make_config(tmp_path), hierarchy)
    assert loaded.rejects["line"].tolist() == [3]
    assert loaded.dataset.values["anc1_visits"][0, 0] == 10.0


def test_missing_columns(tmp_path: Path, hierarchy: Hierarchy) -> None:
    path = write_csv(tmp_path / "values.csv", ("unit", "metric", "month", "count"), [])
    with pytest.raises(DataError) as info:
        read_values_file(path)
    message = str(info.value)
    assert str(path) in message and "period, value" in message
    assert "unit,metric,period,value[,reported_at]" in message
    with pytest.raises(DataError, match="file not found"):
        read_values_file(tmp_path / "absent.csv")


def test_parquet_gives_the_same_dataset(tmp_path: Path, hierarchy: Hierarchy) -> None:
    config = make_config(tmp_path)
    csv_path = write_csv(tmp_path / "values.csv", HEADER, [r[:4] for r in ROWS])
    from_csv = build_dataset(read_values_file(csv_path), "v", config, hierarchy)

    # the same rows as text columns in Parquet (written by pandas/pyarrow)
    text = pd.DataFrame([r[:4] for r in ROWS], columns=list(HEADER))
    text.to_parquet(tmp_path / "text.parquet", index=False)
    from_text = build_dataset(read_values_file(tmp_path / "text.parquet"), "v", config, hierarchy)

    # and with a numeric value column (rows whose value is not a number become missing)
    numeric = text.assign(value=pd.to_numeric(text["value"].str.strip(), errors="coerce"))
    numeric.to_parquet(tmp_path / "numeric.parquet", index=False)
    from_numeric = build_dataset(
        read_values_file(tmp_path / "numeric.parquet"), "v", config, hierarchy
    )

    for other in (from_text, from_numeric):
        assert other.dataset.period_labels == from_csv.dataset.period_labels
        np.testing.assert_array_equal(other.dataset.capture, from_csv.dataset.capture)
        for code, arr in from_csv.dataset.values.items():
            np.testing.assert_array_equal(other.dataset.values[code], arr)
        assert other.stats.rows_loaded == from_csv.stats.rows_loaded
    pd.testing.assert_frame_equal(from_text.rejects, from_csv.rejects)
    # "ten" cannot live in a float column: that row is reported as empty instead
    assert from_numeric.rejects["line"].tolist() == from_csv.rejects["line"].tolist()


def test_weeks_across_a_53_week_year(tmp_path: Path, hierarchy: Hierarchy) -> None:
    rows = [("F1", "anc1_visits", "2020-W52", "1"), ("F1", "anc1_visits", "2021-W02", "2")]
    write_csv(tmp_path / "values.csv", HEADER, rows)
    loaded = load_values(make_config(tmp_path, period="week"), hierarchy)
    # reference: step 7 days at a time with datetime from the Monday of 2020-W52
    day, labels = date.fromisocalendar(2020, 52, 1), []
    while day <= date.fromisocalendar(2021, 2, 1):
        year, week, _ = day.isocalendar()
        labels.append(f"{year}-W{week:02d}")
        day += timedelta(days=7)
    assert (
        loaded.dataset.period_labels == labels == ["2020-W52", "2020-W53", "2021-W01", "2021-W02"]
    )
    np.testing.assert_array_equal(loaded.dataset.values["anc1_visits"][0], [1, np.nan, np.nan, 2])
    assert loaded.rejects.empty


def test_column_lookup(tmp_path: Path, hierarchy: Hierarchy) -> None:
    loaded, _ = load_rows(tmp_path, hierarchy)
    ds = loaded.dataset
    assert ds.column(parse_period("2024-03", "month")) == 2
    with pytest.raises(ValueError, match="outside the data"):
        ds.column(parse_period("2024-04", "month"))
