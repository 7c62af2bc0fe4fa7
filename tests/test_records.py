"""Individual records counted per unit, metric and period, against a pandas groupby.

The reference counts are made independently of digest: ``pd.to_datetime`` and
``Series.dt.to_period`` for the month (``dt.isocalendar`` for ISO weeks),
``pd.to_numeric`` for ages, boolean masks and ``groupby(...).sum()`` / ``size()``. A unit
with at least one valid record in a period has reported there, so a rule that matches
none of its records gives 0, not missing. Missing attributes follow SQL's rule (a
comparison with NULL is not true), so such a record counts for no rule that needs it.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import LEVELS, write_csv

from digest.config import Config, config_from_dict
from digest.errors import ConfigError, DataError
from digest.hierarchy import Hierarchy, load_hierarchy
from digest.loading import Loaded, load_values
from digest.periods import format_period

FACILITIES = ["F1", "F2", "F3", "F4", "F5", "F6"]
RULES = [
    {"metric": "malaria_cases_u5", "where": "age_years < 5 and test_result == 'positive'"},
    {"metric": "malaria_cases_5plus", "where": "age_years >= 5 and test_result == 'positive'"},
    {"metric": "malaria_tests_done", "where": "test_result in ('positive', 'negative')"},
    {"metric": "opd_visits"},
]


def make_config(tmp_path: Path, records: list[dict[str, Any]], **data: Any) -> Config:
    raw: dict[str, Any] = {
        "data": {
            "units": "units.csv",
            "values": "values.csv",
            "levels": list(LEVELS),
            "max_reject_share": 1.0,
            **data,
        },
        "metric": [
            {"code": code, "label": code}
            for code in (
                "malaria_cases_u5",
                "malaria_cases_5plus",
                "malaria_tests_done",
                "opd_visits",
                "anc1_visits",
            )
        ],
        "derived": [{"code": "any_malaria", "label": "x", "expr": "malaria_cases_u5 > 0"}],
        "records": records,
    }
    return config_from_dict(raw, tmp_path / "digest.toml")


@pytest.fixture
def hierarchy(write_units: Callable[..., Path]) -> Hierarchy:
    return load_hierarchy(write_units(), LEVELS)


def visits(n: int = 5000, seed: int = 7) -> pd.DataFrame:
    """Invented visit records with a few of every kind of bad row."""
    rng = np.random.default_rng(seed)
    units = rng.choice([*FACILITIES, "F9", "D1"], size=n, p=[0.16] * 6 + [0.02, 0.02])
    days = pd.Timestamp("2024-01-01") + pd.to_timedelta(rng.integers(0, 180, n), unit="D")
    date = days.strftime("%Y-%m-%d").to_numpy(dtype=object)
    date[rng.random(n) < 0.01] = "2024-02-30"  # no such day
    date[rng.random(n) < 0.01] = ""
    age = rng.integers(0, 80, n).astype(str).astype(object)
    age[rng.random(n) < 0.03] = ""  # age not recorded
    age[rng.random(n) < 0.01] = "unknown"  # not a number
    result = rng.choice(["positive", "negative", "", "invalid"], size=n, p=[0.3, 0.5, 0.15, 0.05])
    return pd.DataFrame(
        {"facility": units, "visit_date": date, "age_years": age, "test_result": result}
    )


def reference_counts(frame: pd.DataFrame, kind: str = "month") -> pd.DataFrame:
    """(unit, period) x metric counts with pandas, for the valid records only."""
    when = pd.to_datetime(frame["visit_date"], format="%Y-%m-%d", errors="coerce")
    ok = frame["facility"].isin(FACILITIES) & when.notna()
    df = frame[ok].copy()
    if kind == "month":
        df["period"] = when[ok].dt.to_period("M").astype(str)
    else:
        iso = when[ok].dt.isocalendar()
        df["period"] = [f"{y}-W{w:02d}" for y, w in zip(iso["year"], iso["week"], strict=True)]
    age = pd.to_numeric(df["age_years"], errors="coerce")
    positive = df["test_result"] == "positive"
    df["malaria_cases_u5"] = (age < 5) & positive
    df["malaria_cases_5plus"] = (age >= 5) & positive
    df["malaria_tests_done"] = df["test_result"].isin(["positive", "negative"])
    df["opd_visits"] = True
    metrics = ["malaria_cases_u5", "malaria_cases_5plus", "malaria_tests_done", "opd_visits"]
    return df.groupby(["facility", "period"])[metrics].sum()


def dense_frame(loaded: Loaded, hierarchy: Hierarchy, metrics: list[str]) -> pd.DataFrame:
    """The dataset's reported cells as (unit, period) x metric, like the reference."""
    ds = loaded.dataset
    rows = []
    for r, unit in enumerate(ds.capture):
        for c, label in enumerate(ds.period_labels):
            cells = [ds.values[m][r, c] for m in metrics]
            if not all(np.isnan(cells)):
                rows.append((hierarchy.ids[unit], label, *cells))
    frame = pd.DataFrame(rows, columns=["facility", "period", *metrics])
    return frame.set_index(["facility", "period"]).sort_index()


@pytest.mark.parametrize("form", ["csv", "parquet", "sqlite"])
def test_counts_match_a_pandas_groupby_chunk_by_chunk(
    tmp_path: Path, hierarchy: Hierarchy, form: str
) -> None:
    frame = visits()
    write_csv(tmp_path / "values.csv", ("unit", "metric", "period", "value"), [])
    spec: dict[str, Any] = {"name": "opd", "unit": "facility", "date": "visit_date", "count": RULES}
    if form == "csv":
        frame.to_csv(tmp_path / "visits.csv", index=False)
        spec["path"] = "visits.csv"
    elif form == "parquet":
        frame.to_parquet(tmp_path / "visits.parquet", index=False)
        spec["path"] = "visits.parquet"
    else:
        with sqlite3.connect(tmp_path / "visits.sqlite") as db:
            frame.assign(n=range(len(frame))).to_sql("visits", db, index=False)
        spec["table"] = {
            "url": f"sqlite:///{tmp_path / 'visits.sqlite'}",
            "query": "SELECT * FROM visits ORDER BY n",
        }
    config = make_config(tmp_path, [spec], chunk_rows=1000)  # 5,000 records in 5 chunks
    loaded = load_values(config, hierarchy)

    expected = reference_counts(frame).astype(float).sort_index()
    got = dense_frame(loaded, hierarchy, list(expected.columns))
    pd.testing.assert_frame_equal(got, expected, check_names=False)
    assert np.isnan(loaded.dataset.values["anc1_visits"]).all()  # not counted by these records

    # every bad record is in the rejects with its line (file line, or row number)
    rejects = loaded.rejects
    assert (rejects["source"] == "records:opd").all()
    first_line = 2 if form != "sqlite" else 1
    when = pd.to_datetime(frame["visit_date"], format="%Y-%m-%d", errors="coerce")
    bad_unit = ~frame["facility"].isin(FACILITIES)
    whole = rejects[rejects["metric"] == ""]
    assert sorted(whole["line"]) == sorted(np.flatnonzero(bad_unit | when.isna()) + first_line)
    assert set(whole["reason"].str.split(";").str[0]) == {
        "unknown unit",
        "unit is not a facility",
        "visit_date is empty",
        "visit_date cannot be read",
    }
    # "unknown" ages: rejected for the two age rules only, still counted for the others
    typed = rejects[rejects["metric"] != ""]
    unknown = np.flatnonzero((frame["age_years"] == "unknown") & ~bad_unit & when.notna())
    for metric in ("malaria_cases_u5", "malaria_cases_5plus"):
        mine = typed[typed["metric"] == metric]
        assert sorted(mine["line"]) == sorted(unknown + first_line)
        assert (mine["value"] == "unknown").all()
        assert mine["reason"].str.startswith("age_years is 'unknown', not a number").all()
    assert set(typed["metric"]) == {"malaria_cases_u5", "malaria_cases_5plus"}
    assert rejects["line"].is_monotonic_increasing
    assert loaded.stats.rows_read == len(frame)
    assert loaded.stats.rows_rejected == len(rejects)


def test_weekly_counts_and_a_period_column(tmp_path: Path, hierarchy: Hierarchy) -> None:
    frame = visits(1500, seed=3)
    write_csv(tmp_path / "values.csv", ("unit", "metric", "period", "value"), [])
    frame.to_csv(tmp_path / "visits.csv", index=False)
    spec = {"name": "opd", "path": "visits.csv", "unit": "facility", "date": "visit_date",
            "count": RULES}  # fmt: skip
    loaded = load_values(make_config(tmp_path, [spec], period="week"), hierarchy)
    expected = reference_counts(frame, "week").astype(float).sort_index()
    pd.testing.assert_frame_equal(
        dense_frame(loaded, hierarchy, list(expected.columns)), expected, check_names=False
    )
    # the same records with a ready-made period column
    good = frame[pd.to_datetime(frame["visit_date"], errors="coerce").notna()]
    labelled = good.assign(
        month=pd.to_datetime(good["visit_date"]).dt.to_period("M").astype(str)
    ).drop(columns="visit_date")
    labelled.to_csv(tmp_path / "labelled.csv", index=False)
    by_period = {"name": "opd", "path": "labelled.csv", "unit": "facility", "period": "month",
                 "count": RULES}  # fmt: skip
    loaded = load_values(make_config(tmp_path, [by_period]), hierarchy)
    expected = reference_counts(good).astype(float).sort_index()
    pd.testing.assert_frame_equal(
        dense_frame(loaded, hierarchy, list(expected.columns)), expected, check_names=False
    )


def test_the_same_key_from_values_and_records_is_a_conflict(
    tmp_path: Path, hierarchy: Hierarchy
) -> None:
    records = [
        ("F1", "2024-03-02", "3", "positive"),
        ("F1", "2024-03-09", "30", "positive"),
        ("F2", "2024-03-04", "2", "negative"),
    ]
    write_csv(tmp_path / "visits.csv", ("facility", "visit_date", "age_years", "test_result"),
              records)  # fmt: skip
    values = [
        ("F1", "malaria_cases_u5", "2024-03", "1"),  # the same value as the records give
        ("F2", "malaria_cases_u5", "2024-03", "5"),
        ("F3", "malaria_cases_u5", "2024-03", "4"),  # no records for F3: kept
        ("F1", "anc1_visits", "2024-03", "12"),
    ]
    write_csv(tmp_path / "values.csv", ("unit", "metric", "period", "value"), values)
    spec = {"name": "opd", "path": "visits.csv", "unit": "facility", "date": "visit_date",
            "count": RULES[:1]}  # fmt: skip
    loaded = load_values(make_config(tmp_path, [spec]), hierarchy)
    rejects = loaded.rejects
    assert len(rejects) == 4  # both sources for F1 and F2
    assert rejects["reason"].str.startswith("conflicting sources").all()
    f1 = rejects[(rejects["unit"] == "F1") & (rejects["source"] == "records:opd")]
    assert f1["line"].tolist() == [2]  # the first record behind the count
    assert "records:opd (2 records from line 2): 1" in f1["reason"].iloc[0]
    assert f"{tmp_path / 'values.csv'} line 2: 1" in f1["reason"].iloc[0]
    ds = loaded.dataset
    u5 = ds.values["malaria_cases_u5"][:, 0]
    row = {hierarchy.ids[u]: i for i, u in enumerate(ds.capture)}
    assert np.isnan(u5[row["F1"]]) and np.isnan(u5[row["F2"]]) and u5[row["F3"]] == 4
    assert ds.values["anc1_visits"][row["F1"], 0] == 12


def test_records_configuration_is_checked(tmp_path: Path) -> None:
    base = {"name": "opd", "path": "v.csv", "date": "d", "count": [{"metric": "opd_visits"}]}
    with pytest.raises(ConfigError, match="give either path"):
        make_config(tmp_path, [{**base, "table": {"url": "sqlite:///x", "query": "SELECT 1"}}])
    with pytest.raises(ConfigError, match="give either date"):
        make_config(tmp_path, [{**base, "period": "p"}])
    derived = {**base, "count": [{"metric": "any_malaria"}]}
    with pytest.raises(
        ConfigError, match=r"records\[0\]\.count\[0\]\.metric: 'any_malaria' is a derived"
    ):
        make_config(tmp_path, [derived])
    twice = {
        **base,
        "count": [{"metric": "opd_visits"}, {"metric": "opd_visits", "where": "a == 1"}],
    }
    with pytest.raises(ConfigError, match="already counted by this source"):
        make_config(tmp_path, [twice])
    unsafe = {**base, "count": [{"metric": "opd_visits", "where": "__import__('os') == 1"}]}
    with pytest.raises(
        ConfigError, match=r"records\[0\]\.count\[0\]\.where: .*calls are not allowed"
    ):
        make_config(tmp_path, [unsafe])
    with pytest.raises(ConfigError, match="records name 'opd' is used twice"):
        make_config(tmp_path, [base, base])


def test_missing_columns_and_numbers_compared_with_text(
    tmp_path: Path, hierarchy: Hierarchy
) -> None:
    write_csv(tmp_path / "values.csv", ("unit", "metric", "period", "value"), [])
    write_csv(tmp_path / "v.csv", ("facility", "visit_date", "age"), [("F1", "2024-01-02", "3")])
    spec = {"name": "opd", "path": "v.csv", "unit": "facility", "date": "visit_date",
            "count": [{"metric": "opd_visits", "where": "age_years < 5"}]}  # fmt: skip
    with pytest.raises(DataError, match=r"records:opd: missing column.*age_years"):
        load_values(make_config(tmp_path, [spec]), hierarchy)
    pd.DataFrame({"facility": ["F1"], "visit_date": ["2024-01-02"], "age_years": [3]}).to_parquet(
        tmp_path / "v.parquet"
    )
    typed = {**spec, "path": "v.parquet",
             "count": [{"metric": "opd_visits", "where": "age_years == '3'"}]}  # fmt: skip
    with pytest.raises(DataError, match="rule for opd_visits: column age_years holds numbers"):
        load_values(make_config(tmp_path, [typed]), hierarchy)


def test_counts_flow_through_the_pipeline_periods(tmp_path: Path, hierarchy: Hierarchy) -> None:
    # a unit with records in a period reports 0 for a rule that matched nothing there
    write_csv(tmp_path / "values.csv", ("unit", "metric", "period", "value"), [])
    write_csv(tmp_path / "v.csv", ("facility", "visit_date", "age_years", "test_result"),
              [("F1", "2024-01-05", "40", "negative"), ("F2", "2024-03-01", "2", "positive")])  # fmt: skip
    spec = {"name": "opd", "path": "v.csv", "unit": "facility", "date": "visit_date",
            "count": RULES}  # fmt: skip
    loaded = load_values(make_config(tmp_path, [spec]), hierarchy)
    ds = loaded.dataset
    assert [format_period(int(p), "month") for p in ds.periods] == ["2024-01", "2024-02", "2024-03"]
    row = {hierarchy.ids[u]: i for i, u in enumerate(ds.capture)}
    assert ds.values["malaria_cases_u5"][row["F1"]].tolist()[0] == 0.0
    assert np.isnan(ds.values["malaria_cases_u5"][row["F1"], 1:]).all()
    assert ds.values["malaria_cases_u5"][row["F2"], 2] == 1.0
    assert ds.values["opd_visits"][row["F1"], 0] == 1.0
