"""Data sources without a server: SQL through SQLite, the ``where`` language of counting
rules, chunked Parquet, and the configuration of sources, engine and write-back.

References: Python's ``sqlite3`` module to build the databases read back through
SQLAlchemy; pandas (``read_csv``) for the expected rows; SQL's three-valued logic for a
comparison with NULL (ISO/IEC 9075, as described in the PostgreSQL manual, "Comparison
Functions and Operators": ordinary comparison operators yield null when either input is
null) for missing record attributes.
"""

from __future__ import annotations

import sqlite3
import tomllib
from collections.abc import Callable
from datetime import date
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import LEVELS, SMALL_UNITS, UNITS_HEADER, write_csv

from digest.config import Config, EngineConfig, TableSource, config_from_dict
from digest.errors import ConfigError, DataError
from digest.hierarchy import Hierarchy, load_hierarchy
from digest.loading import load_values
from digest.sources import WhereError, date_ordinals, load_units, parse_where

REPO = Path(__file__).resolve().parents[1]
HEADER = ("unit", "metric", "period", "value")
ROWS: list[tuple[str, str, str, str]] = [
    ("F1", "anc1_visits", "2024-01", "10"),
    ("F2", "anc1_visits", "2024-01", "20"),
    ("F9", "anc1_visits", "2024-01", "5"),  # unknown unit
    ("D1", "anc1_visits", "2024-01", "5"),  # not a facility
    ("F1", "anc9_visits", "2024-01", "5"),  # unknown metric
    ("F1", "anc1_visits", "2024-13", "5"),  # bad period
    ("F3", "anc1_visits", "2024-02", ""),  # empty value
    ("F3", "anc1_visits", "2024-03", "ten"),  # not a number
    ("F4", "anc1_visits", "2024-01", "-3"),  # negative count
    ("F1", "penta1_doses", "2024-02", "7"),
    ("F1", "penta1_doses", "2024-02", "7"),  # exact duplicate: collapsed
    ("F2", "penta1_doses", "2024-02", "8"),  # conflicting pair
    ("F2", "penta1_doses", "2024-02", "9"),
    (" F2 ", " anc1_visits", "2024-03 ", " 21.5 "),
    ("F6", "anc1_visits", "2024-03", "1e2"),
    ("F5", "penta1_doses", "2024-04", "3"),
    ("F4", "penta1_doses", "2024-04", "4"),
]


def raw_config(values: Any, units: Any = "units.csv", **data: Any) -> dict[str, Any]:
    return {
        "data": {
            "units": units,
            "values": values,
            "levels": list(LEVELS),
            "max_reject_share": 1.0,
            **data,
        },
        "metric": [
            {"code": "anc1_visits", "label": "First antenatal visits"},
            {"code": "penta1_doses", "label": "Pentavalent dose 1"},
        ],
    }


def make(tmp_path: Path, values: Any, units: Any = "units.csv", **data: Any) -> Config:
    return config_from_dict(raw_config(values, units, **data), tmp_path / "digest.toml")


@pytest.fixture
def hierarchy(write_units: Callable[..., Path]) -> Hierarchy:
    return load_hierarchy(write_units(), LEVELS)


def sqlite_table(path: Path, table: str, header: tuple[str, ...], rows: list[tuple]) -> str:
    with sqlite3.connect(path) as db:
        db.execute(f"CREATE TABLE {table} ({', '.join(header)})")
        db.executemany(f"INSERT INTO {table} VALUES ({', '.join('?' * len(header))})", rows)
    return f"sqlite:///{path}"


# ---- SQL through SQLite ------------------------------------------------------------------


def test_sql_values_give_the_csv_dataset_and_rejects_by_row_number(
    tmp_path: Path, hierarchy: Hierarchy
) -> None:
    write_csv(tmp_path / "values.csv", HEADER, ROWS)
    from_csv = load_values(make(tmp_path, "values.csv"), hierarchy)
    url = sqlite_table(tmp_path / "hmis.sqlite", "reports", ("n", *HEADER), [
        (i, *row) for i, row in enumerate(ROWS)
    ])  # fmt: skip
    table = {"url": url, "query": "SELECT unit, metric, period, value FROM reports ORDER BY n"}
    # chunk_rows = 4: the 17 rows come in five chunks; a duplicate pair spans two of them
    from_sql = load_values(make(tmp_path, table, chunk_rows=4), hierarchy)

    for code, arr in from_csv.dataset.values.items():
        np.testing.assert_array_equal(from_sql.dataset.values[code], arr)
    assert from_sql.dataset.period_labels == from_csv.dataset.period_labels
    assert from_sql.stats == from_csv.stats
    csv_rejects, sql_rejects = from_csv.rejects, from_sql.rejects
    assert (sql_rejects["source"] == "sql:values").all()
    # the row number in the query's result (1-based) is the CSV line minus the header
    assert sql_rejects["line"].tolist() == [n - 1 for n in csv_rejects["line"]]
    for column in ("unit", "metric", "period", "value"):
        assert sql_rejects[column].tolist() == csv_rejects[column].tolist()
    assert sql_rejects["reason"].str.split("(").str[0].tolist() == (
        csv_rejects["reason"].str.split("(").str[0].tolist()
    )
    conflict = sql_rejects[sql_rejects["reason"].str.startswith("conflicting")]
    assert conflict["line"].tolist() == [12, 13]
    assert "line 12: 8; line 13: 9" in conflict["reason"].iloc[0]


def test_sql_numbers_nulls_and_dates(tmp_path: Path, hierarchy: Hierarchy) -> None:
    # typed columns: a REAL value and a NULL value (dates as periods: test_postgres)
    rows = [
        ("F1", "anc1_visits", "2024-01-01", 10.0),
        ("F1", "anc1_visits", "2024-02-15", None),
        ("F2", "anc1_visits", "2024-02-01", 4.5),
    ]
    with sqlite3.connect(tmp_path / "typed.sqlite", detect_types=sqlite3.PARSE_DECLTYPES) as db:
        db.execute("CREATE TABLE v (unit TEXT, metric TEXT, period DATE, value REAL)")
        db.executemany(
            "INSERT INTO v VALUES (?, ?, ?, ?)",
            [(u, m, date.fromisoformat(p), v) for u, m, p, v in rows],
        )
    table = {
        "url": f"sqlite:///{tmp_path / 'typed.sqlite'}",
        "query": "SELECT unit, metric, substr(period, 1, 7) AS period, value FROM v",
    }
    loaded = load_values(make(tmp_path, table), hierarchy)
    assert loaded.dataset.period_labels == ["2024-01", "2024-02"]
    assert loaded.rejects["reason"].tolist() == [
        "value is empty; leave out a missing report"
    ]  # NULL
    assert loaded.rejects["line"].tolist() == [2]
    f2 = list(loaded.dataset.capture).index(hierarchy.index["F2"])
    assert loaded.dataset.values["anc1_visits"][f2, 1] == 4.5


def test_sql_units_with_dates_give_the_csv_hierarchy(
    tmp_path: Path, write_units: Callable[..., Path]
) -> None:
    from_csv = load_hierarchy(write_units(), LEVELS)
    rows = [tuple(v or None for v in row) for row in SMALL_UNITS]
    url = sqlite_table(tmp_path / "units.sqlite", "units", UNITS_HEADER, rows)
    table = {"url": url, "query": "SELECT * FROM units"}
    from_sql = load_units(make(tmp_path, "values.csv", units=table))
    for name in ("ids", "names", "levels", "opened", "closed"):
        assert getattr(from_sql, name) == getattr(from_csv, name)
    np.testing.assert_array_equal(from_sql.parent, from_csv.parent)


def test_sql_units_problems_name_the_row(tmp_path: Path) -> None:
    rows = [("C", "Country", None, "country"), ("P1", "North", "C", "province"),
            ("P1", "Again", "C", "province")]  # fmt: skip
    url = sqlite_table(tmp_path / "u.sqlite", "units", ("id", "name", "parent", "level"), rows)
    with pytest.raises(
        ConfigError, match=r"sql:units line 3: duplicate id 'P1' \(first on line 2\)"
    ):
        load_units(make(tmp_path, "values.csv", units={"url": url, "query": "SELECT * FROM units"}))
    bad = {"url": url, "query": "SELECT id, name FROM units"}
    with pytest.raises(DataError, match="sql:units: missing column"):
        load_units(make(tmp_path, "values.csv", units=bad))


def test_sql_query_failures_and_read_only(tmp_path: Path, hierarchy: Hierarchy) -> None:
    url = sqlite_table(tmp_path / "h.sqlite", "reports", HEADER, [ROWS[0]])
    broken = {"url": url, "query": "SELECT unit, metric FROM nowhere"}
    with pytest.raises(
        DataError, match=r"sql:values \(sqlite:///.*\): the query failed: .*nowhere"
    ):
        load_values(make(tmp_path, broken), hierarchy)
    few = {"url": url, "query": "SELECT unit, metric FROM reports"}
    with pytest.raises(DataError, match=r"missing column.*period, value"):
        load_values(make(tmp_path, few), hierarchy)
    # the query runs read-only: a statement that writes is refused by the database
    writes = {"url": url, "query": "WITH x AS (SELECT 1) SELECT * FROM x; DELETE FROM reports"}
    with pytest.raises(DataError):
        load_values(make(tmp_path, writes), hierarchy)
    with sqlite3.connect(tmp_path / "h.sqlite") as db:
        assert db.execute("SELECT count(*) FROM reports").fetchone() == (1,)
    missing = {"url": f"sqlite:///{tmp_path / 'absent.sqlite'}", "query": "SELECT 1"}
    with pytest.raises(DataError, match="does not exist"):
        load_values(make(tmp_path, missing), hierarchy)


def test_relative_sqlite_url_follows_the_config_file(tmp_path: Path) -> None:
    config = make(tmp_path, {"url": "sqlite:///data/h.sqlite", "query": "SELECT 1"})
    assert isinstance(config.data.values, TableSource)
    assert config.data.values.url == f"sqlite:///{(tmp_path / 'data' / 'h.sqlite').resolve()}"


def test_chunked_parquet_equals_whole_csv(tmp_path: Path, hierarchy: Hierarchy) -> None:
    write_csv(tmp_path / "values.csv", HEADER, ROWS)
    from_csv = load_values(make(tmp_path, "values.csv"), hierarchy)
    pd.DataFrame(ROWS, columns=list(HEADER)).to_parquet(tmp_path / "values.parquet")
    from_parquet = load_values(make(tmp_path, "values.parquet", chunk_rows=3), hierarchy)
    for code, arr in from_csv.dataset.values.items():
        np.testing.assert_array_equal(from_parquet.dataset.values[code], arr)
    rejects = from_parquet.rejects.assign(source=from_csv.rejects["source"])
    pd.testing.assert_frame_equal(rejects, from_csv.rejects)


# ---- configuration --------------------------------------------------------------------------


def test_table_config_errors_never_echo_a_password(tmp_path: Path) -> None:
    secret = "s3cr3t-value"
    bad = {"url": f"postgresql+psycopg://digest:{secret}@db/hmis", "query": "SELECT 1"}
    with pytest.raises(ConfigError) as info:
        make(tmp_path, bad)
    assert secret not in str(info.value)
    assert "data.values.table: Value error, url: must not contain a password" in str(info.value)
    with pytest.raises(ConfigError, match="query: Value error, must be a query starting"):
        make(tmp_path, {"url": "sqlite:///x.sqlite", "query": "DELETE FROM reports"})
    with pytest.raises(ConfigError, match=r"data\.values\.table\.url: required key is missing"):
        make(tmp_path, {"query": "SELECT 1"})
    with pytest.raises(ConfigError, match=r"data\.values\.table\.colour: unknown key"):
        make(tmp_path, {"url": "sqlite:///x", "query": "SELECT 1", "colour": "red"})


def test_password_comes_from_the_environment(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    table = {"url": "postgresql+psycopg://digest@db:5432/hmis", "query": "SELECT 1",
             "password_env": "HMIS_PASSWORD"}  # fmt: skip
    source = make(tmp_path, table).data.values
    assert isinstance(source, TableSource)
    monkeypatch.delenv("HMIS_PASSWORD", raising=False)
    with pytest.raises(ConfigError, match=r"HMIS_PASSWORD .* is not set"):
        source.sqlalchemy_url()
    monkeypatch.setenv("HMIS_PASSWORD", "p@ss:word/1")
    url = source.sqlalchemy_url()
    assert url.password == "p@ss:word/1" and url.username == "digest"
    assert "p@ss" not in source.shown_url and "p@ss" not in repr(source)


def test_engine_and_output_table_config(tmp_path: Path) -> None:
    assert EngineConfig().kind == "local"
    with pytest.raises(ValueError, match="workers: only read with kind = 'dask'"):
        EngineConfig(workers=4)
    with pytest.raises(ValueError, match="only for a local cluster"):
        EngineConfig(kind="dask", scheduler="tcp://10.0.0.5:8786", workers=2)
    with pytest.raises(ValueError, match="tcp://"):
        EngineConfig(kind="dask", scheduler="10.0.0.5")
    raw = raw_config("values.csv")
    raw["output"] = {"table": {"url": "sqlite:///out.sqlite", "name": "dash.bands"}}
    config = config_from_dict(raw, tmp_path / "digest.toml")
    assert config.output.table is not None
    assert (
        config.output.table.name == "dash.bands" and config.output.table.totals == "digest_totals"
    )
    assert config.output.table.url == f"sqlite:///{(tmp_path / 'out.sqlite').resolve()}"
    raw["output"]["table"]["name"] = "bands; DROP TABLE x"
    with pytest.raises(ConfigError, match=r"output\.table\.name"):
        config_from_dict(raw, tmp_path / "digest.toml")


def test_postgres_demo_config_is_the_demo_config_reading_from_tables() -> None:
    with (REPO / "demo" / "config.toml").open("rb") as fh:
        files = tomllib.load(fh)
    with (REPO / "demo" / "config-postgres.toml").open("rb") as fh:
        tables = tomllib.load(fh)
    for key in sorted(set(files) | set(tables)):
        if key not in {"data", "ledger", "output"}:
            assert tables.get(key) == files.get(key), (
                f"[{key}] differs; update config-postgres.toml"
            )
    assert {
        k: v for k, v in tables["data"].items() if k not in {"units", "values", "chunk_rows"}
    } == {k: v for k, v in files["data"].items() if k not in {"units", "values"}}
    assert tables["data"]["values"]["url"].startswith("postgresql+psycopg://")


# ---- the where language ----------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "why"),
    [
        ("age.real < 5", "attribute access is not allowed"),
        ("result.lower() == 'positive'", "calls are not allowed"),
        ("len(result) > 3", "calls are not allowed"),
        ("__import__('os') == 1", "calls are not allowed"),
        ("age[0] < 5", "subscripts are not allowed"),
        ("age + 1 < 5", "arithmetic is not allowed"),
        ("age < 5 + 1", "arithmetic is not allowed"),
        ("age < weight", "compare a column with a constant, not with another column"),
        ("5 < 6", "compares two constants"),
        ("age is None", "comparison not allowed"),
        ("result == None", "only numbers and text are allowed as constants"),
        ("flag == True", "only numbers and text are allowed as constants"),
        ("result < 'b'", "text compares only with ==, != and in"),
        ("result in ()", "the list after in is empty"),
        ("result in ('a', 1)", "mixes numbers and text"),
        ("result in other", "in needs a tuple or list of constants"),
        ("result in (other,)", "constants only, not columns"),
        ("result.x in (1,)", "attribute access is not allowed"),
        ("_secret == 1", "names starting with _ are not allowed"),
        ("age", "a column alone is not a condition"),
        ("not age", "a column alone is not a condition"),
        ("lambda: 1", "not allowed in a condition"),
        ("[x for x in y]", "not allowed in a condition"),
        ("f'{age}' == '1'", "only column names and constants may be compared"),
        ("age < 5 if x == 1 else 0", "not allowed in a condition"),
        ("age < ", "cannot parse"),
        ("(age := 5) == 5", "only column names and constants may be compared"),
        ("age < 1e999", "numbers must be finite"),
        ("x == 1 or " * 300 + "x == 1", "simplify the condition"),
    ],
)
def test_where_refuses_everything_else(text: str, why: str) -> None:
    with pytest.raises(WhereError) as info:
        parse_where(text)
    assert why in str(info.value)


def test_where_evaluates_with_sql_three_valued_logic() -> None:
    frame = pd.DataFrame(
        {
            "age": ["3", "7", "", "abc", "4.5", None, "-1"],
            "result": ["positive", "positive", "positive", "negative", "", "positive", "neg"],
        }
    )
    truth = {
        "age < 5": [1, 0, None, None, 1, None, 1],
        "not age < 5": [0, 1, None, None, 0, None, 0],
        "age < 5 and result == 'positive'": [1, 0, None, 0, None, None, 0],
        "age < 5 or result == 'positive'": [1, 1, 1, None, 1, 1, 1],
        "0 <= age < 5": [1, 0, None, None, 1, None, 0],
        "-2 < age": [1, 1, None, None, 1, None, 1],
        "result in ('positive', 'neg')": [1, 1, 1, 0, None, 1, 1],
        "result not in ['positive']": [0, 0, 0, 1, None, 0, 1],
        "result != 'positive'": [0, 0, 0, 1, None, 0, 1],
        "age in (3, 7)": [1, 1, None, None, 0, None, 0],
    }
    for text, expected in truth.items():
        got = parse_where(text).evaluate(frame)
        want = np.array([np.nan if e is None else e for e in expected], dtype=float)
        np.testing.assert_array_equal(got.truth, want, err_msg=text)
        # "abc" is not a number: any numeric comparison on age flags that row
        flagged = [i for i, e in enumerate(got.error) if e is not None]
        assert flagged == ([3] if "age" in parse_where(text).names else []), text
        assert all(e in (None, "age") for e in got.error)


def test_where_on_typed_columns() -> None:
    frame = pd.DataFrame({"age": [1.0, np.nan, 9.0], "pregnant": [True, False, True]})
    assert parse_where("age < 5").evaluate(frame).truth.tolist()[::2] == [1.0, 0.0]
    assert np.isnan(parse_where("age < 5").evaluate(frame).truth[1])
    assert parse_where("pregnant == 1").evaluate(frame).truth.tolist() == [1.0, 0.0, 1.0]
    with pytest.raises(DataError, match="column age holds numbers"):
        parse_where("age == '1'").evaluate(frame)


def test_dates_to_periods_against_datetime() -> None:
    days = ["2026-10-05", "2026-12-31T23:59:00", "2021-01-03", "", None, "05/10/2026", "2024-02-30"]
    months, missing, bad = date_ordinals(pd.Series(days, dtype=object), "month")
    weeks, _, _ = date_ordinals(pd.Series(days, dtype=object), "week")
    assert missing.tolist() == [False, False, False, True, True, False, False]
    assert bad.tolist() == [False, False, False, False, False, True, True]
    from digest.periods import format_period

    assert [format_period(int(o), "month") for o in months[:3]] == ["2026-10", "2026-12", "2021-01"]
    # ISO weeks from the standard library's isocalendar (3 January 2021 is in 2020-W53)
    for text, ordinal in zip(days[:3], weeks[:3], strict=True):
        year, week, _ = date.fromisoformat(text[:10]).isocalendar()
        assert format_period(int(ordinal), "week") == f"{year}-W{week:02d}"
