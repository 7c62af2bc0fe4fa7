"""SQL sources, write-back and the ledger on the real PostgreSQL server on 127.0.0.1:5432.

Every test uses tables (or a schema) with a fresh random name and drops them afterwards.
The tests skip, saying why, when psycopg is missing or no server answers (set
DIGEST_TEST_PG_URL to use another server). References: the CSV source of the same rows
(digest's file loader, itself checked against the csv module in test_loading); pandas
for the frames read back; the PostgreSQL manual on advisory locks (a second session's
pg_try_advisory_lock on a held key returns false) and on DECLARE (a server-side cursor
refuses data-modifying statements).
"""

from __future__ import annotations

import os
import shutil
import sys
import uuid
from collections.abc import Iterator
from datetime import UTC, date, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa
from conftest import LEVELS, write_csv

from digest import demo_data
from digest.config import Config, TableSource, config_from_dict, load_config
from digest.errors import DataError
from digest.hierarchy import load_hierarchy
from digest.ledger import Ledger, LockHeld
from digest.loading import load_values
from digest.pipeline import RunResult, run_pipeline
from digest.sources import read_sql_chunks, write_back

pytestmark = pytest.mark.postgres

PG_URL = os.environ.get("DIGEST_TEST_PG_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test")
REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "demo"))
from load_postgres import load as load_demo_tables  # noqa: E402

NOW = datetime(2026, 11, 3, 2, 15, tzinfo=UTC)


def _postgres_problem() -> str | None:
    try:
        import psycopg  # noqa: F401
    except ImportError:
        return "psycopg is not installed (pip install 'psycopg[binary]')"
    try:
        engine = sa.create_engine(PG_URL, connect_args={"connect_timeout": 3})
        with engine.connect() as conn:
            conn.execute(sa.text("SELECT 1"))
        engine.dispose()
    except Exception as exc:
        return f"PostgreSQL not reachable at {PG_URL}: {type(exc).__name__}: {exc}".splitlines()[0]
    return None


@pytest.fixture(scope="module")
def pg() -> Iterator[sa.Engine]:
    problem = _postgres_problem()
    if problem:
        pytest.skip(problem)
    engine = sa.create_engine(PG_URL)
    yield engine
    engine.dispose()


@pytest.fixture
def prefix(pg: sa.Engine) -> Iterator[str]:
    """A fresh table-name prefix; every table starting with it is dropped afterwards."""
    name = f"digest_t{uuid.uuid4().hex[:10]}"
    yield name
    _drop_prefixed(pg, name)


def _drop_prefixed(pg: sa.Engine, name: str) -> None:
    with pg.begin() as conn:
        tables = conn.execute(
            sa.text(
                "SELECT tablename FROM pg_tables WHERE schemaname = 'public' AND tablename LIKE :p"
            ),
            {"p": f"{name}%"},
        ).scalars()
        for table in list(tables):
            conn.exec_driver_sql(f'DROP TABLE IF EXISTS "{table}"')


# ---- values from a query, chunk by chunk ------------------------------------------------------


def _rows(n: int = 5000) -> list[tuple[str, str, str, Any]]:
    """Valid monthly reports of F1..F4 plus bad rows, in a fixed order."""
    rng = np.random.default_rng(11)
    rows: list[tuple[str, str, str, Any]] = []
    units, metrics = ["F1", "F2", "F3", "F4"], ["anc1_visits", "penta1_doses"]
    month = 0
    while len(rows) < n - 40:
        year, m = divmod(month, 12)
        for unit in units:
            for metric in metrics:
                rows.append((unit, metric, f"{2010 + year}-{m + 1:02d}", int(rng.integers(0, 90))))
        month += 1
    rows = rows[: n - 40]
    for i in range(10):  # bad rows spread over the chunks
        rows.insert(500 * i + 7, ("F9", "anc1_visits", "2010-01", 3))  # unknown unit
        rows.insert(500 * i + 9, ("F1", "nope", "2010-01", 3))  # unknown metric
        rows.insert(500 * i + 11, ("F2", "anc1_visits", "2010-02", -4))  # negative count
        rows.insert(500 * i + 13, ("F3", "anc1_visits", "2010-03", None))  # NULL value
    rows.append(rows[0])  # an exact duplicate of row 1, 4,961 rows later: collapsed
    first = rows[1]
    rows.append((first[0], first[1], first[2], first[3] + 1))  # conflicts with row 2
    return rows


def test_sql_values_in_chunks_equal_the_csv_source(
    pg: sa.Engine, prefix: str, tmp_path: Path, write_units: Any
) -> None:
    hierarchy = load_hierarchy(write_units(), LEVELS)
    rows = _rows()
    assert len(rows) == 5002
    with pg.begin() as conn:
        conn.exec_driver_sql(
            f"CREATE TABLE {prefix}_values (n integer, unit text, metric text, period date, "
            "value numeric)"
        )
        conn.execute(
            sa.text(f"INSERT INTO {prefix}_values VALUES (:n, :u, :m, :p, :v)"),
            [
                {"n": i, "u": u, "m": m, "p": date.fromisoformat(p + "-01"), "v": v}
                for i, (u, m, p, v) in enumerate(rows)
            ],
        )
    query = f"SELECT unit, metric, period, value FROM {prefix}_values ORDER BY n"
    table = TableSource(url=PG_URL, query=query)
    chunks = list(read_sql_chunks(table, "sql:values", 1000))
    assert [len(c) for c in chunks] == [1000, 1000, 1000, 1000, 1000, 2]
    assert chunks[1].index[0] == 1001 and isinstance(chunks[0]["period"].iloc[0], date)

    write_csv(tmp_path / "values.csv", ("unit", "metric", "period", "value"),
              [(u, m, p, "" if v is None else v) for u, m, p, v in rows])  # fmt: skip
    from_csv = load_values(_config(tmp_path, "values.csv"), hierarchy)
    config = _config(tmp_path, {"url": PG_URL, "query": query}, chunk_rows=1000)
    from_sql = load_values(config, hierarchy)

    assert from_sql.stats == from_csv.stats
    assert from_sql.stats.duplicates_collapsed == 1
    for code, arr in from_csv.dataset.values.items():
        np.testing.assert_array_equal(from_sql.dataset.values[code], arr)
    assert from_sql.dataset.period_labels == from_csv.dataset.period_labels
    got, want = from_sql.rejects, from_csv.rejects
    assert (got["source"] == "sql:values").all()
    assert got["line"].tolist() == [n - 1 for n in want["line"]]
    assert (
        got["reason"].str.split("(").str[0].tolist()
        == want["reason"].str.split("(").str[0].tolist()
    )
    assert got["value"].tolist() == want["value"].tolist()
    assert len(got) == 42 and "line 2: " in got["reason"].iloc[-1]


def _config(tmp_path: Path, values: Any, **data: Any) -> Config:
    raw = {
        "data": {"units": "units.csv", "values": values, "levels": list(LEVELS),
                 "max_reject_share": 1.0, **data},
        "metric": [{"code": "anc1_visits", "label": "ANC 1"},
                   {"code": "penta1_doses", "label": "Penta 1"}],
    }  # fmt: skip
    return config_from_dict(raw, tmp_path / "digest.toml")


def test_queries_cannot_write(pg: sa.Engine, prefix: str, tmp_path: Path, write_units: Any) -> None:
    hierarchy = load_hierarchy(write_units(), LEVELS)
    with pg.begin() as conn:
        conn.exec_driver_sql(
            f"CREATE TABLE {prefix}_v (unit text, metric text, period text, value text)"
        )
    sneaky = (
        f"WITH gone AS (DELETE FROM {prefix}_v RETURNING *) "
        "SELECT unit, metric, period, value FROM gone"
    )
    with pytest.raises(DataError, match="the query failed"):
        load_values(_config(tmp_path, {"url": PG_URL, "query": sneaky}), hierarchy)
    # a literal colon and a percent sign reach the server as written
    literal = (
        "SELECT 'F1' AS unit, 'anc1_visits' AS metric, '2024-01' AS period, "
        "CASE WHEN '10:30' LIKE '10%' THEN '1' END AS value"
    )
    loaded = load_values(_config(tmp_path, {"url": PG_URL, "query": literal}), hierarchy)
    assert loaded.dataset.values["anc1_visits"][0, 0] == 1.0


# ---- the demo from PostgreSQL -------------------------------------------------------------------


@pytest.fixture(scope="module")
def demo(pg: sa.Engine, tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict[str, Any]]:
    folder = tmp_path_factory.mktemp("pgdemo")
    shutil.copyfile(REPO / "demo" / "config.toml", folder / "config.toml")
    demo_data.generate(folder / "data")
    name = f"digest_t{uuid.uuid4().hex[:10]}"
    load_demo_tables(PG_URL, folder / "data", prefix=name)
    text = (REPO / "demo" / "config-postgres.toml").read_text()
    text = text.replace("127.0.0.1:5432/test", PG_URL.split("@", 1)[1])
    text = text.replace("demo_units", f"{name}_units").replace("demo_values", f"{name}_values")
    text = text.replace('"demo_bands"', f'"{name}_bands"').replace(
        '"demo_totals"', f'"{name}_totals"'
    )
    (folder / "config-postgres.toml").write_text(text)
    csv_config = load_config(folder / "config.toml")
    pg_config = load_config(folder / "config-postgres.toml")
    files = run_pipeline(csv_config, run_id="files")
    tables = run_pipeline(pg_config, run_id="tables")
    yield {"folder": folder, "prefix": name, "files": files, "tables": tables, "config": pg_config}
    _drop_prefixed(pg, name)


def test_demo_from_postgres_equals_the_csv_demo(demo: dict[str, Any]) -> None:
    files: RunResult = demo["files"]
    tables: RunResult = demo["tables"]
    pd.testing.assert_frame_equal(tables.alerts, files.alerts)
    assert len(files.alerts) > 0
    for code, arr in files.dataset.values.items():
        np.testing.assert_array_equal(tables.dataset.values[code], arr)
    assert list(tables.bands) == list(files.bands)
    for key, arrays in files.bands.items():
        np.testing.assert_array_equal(tables.bands[key].centre, arrays.centre)
        np.testing.assert_array_equal(tables.bands[key].high, arrays.high)
    assert tables.hierarchy.opened == files.hierarchy.opened  # date columns read as dates
    got, want = tables.loaded.rejects, files.loaded.rejects
    assert len(got) == len(want) > 0
    assert got["line"].tolist() == [n - 1 for n in want["line"]]  # ORDER BY the CSV line
    assert (
        got["reason"].str.split("(").str[0].tolist()
        == want["reason"].str.split("(").str[0].tolist()
    )


# ---- write-back ------------------------------------------------------------------------------


def test_write_back_replaces_the_period_and_is_idempotent(
    demo: dict[str, Any], pg: sa.Engine
) -> None:
    config: Config = demo["config"]
    assert config.output.table is not None
    bands_table, totals_table = config.output.table.name, config.output.table.totals
    latest: RunResult = demo["tables"]
    earlier = run_pipeline(config, run_id="earlier", as_of="2026-09")

    first = write_back(latest, config.output.table)
    again = write_back(latest, config.output.table)
    assert first == again == {bands_table: len(latest.bands_frame()),
                              totals_table: len(latest.totals_frame())}  # fmt: skip
    write_back(earlier, config.output.table)
    with pg.connect() as conn:
        stored = pd.read_sql(f"SELECT * FROM {bands_table}", conn)
        totals = pd.read_sql(f"SELECT * FROM {totals_table}", conn)
    assert stored.groupby("period").size().to_dict() == {
        "2026-09": len(earlier.bands_frame()),
        "2026-10": len(latest.bands_frame()),
    }
    mine = stored[stored["period"] == "2026-10"].drop(columns="run_id")
    expected = latest.bands_frame()
    key = ["band", "level", "unit"]
    mine = mine.sort_values(key).reset_index(drop=True)
    expected = expected.sort_values(key).reset_index(drop=True)
    pd.testing.assert_frame_equal(mine, expected, check_dtype=False)
    assert set(stored.loc[stored["period"] == "2026-10", "run_id"]) == {"tables"}

    want = latest.totals_frame()
    got = totals[totals["period"] == "2026-10"].drop(columns="run_id")
    key = ["level", "metric", "unit"]
    pd.testing.assert_frame_equal(
        got.sort_values(key).reset_index(drop=True),
        want.sort_values(key).reset_index(drop=True),
        check_dtype=False,
    )
    # the district totals are the sums of their facilities (pandas groupby as reference)
    facility = want[(want["level"] == "facility") & want["value"].notna()].copy()
    h = latest.hierarchy
    facility["district"] = [h.ids[h.parent[h.index[u]]] for u in facility["unit"]]
    sums = facility.groupby(["district", "metric"])["value"].sum()
    district = want[want["level"] == "district"].set_index(["unit", "metric"])["value"]
    pd.testing.assert_series_equal(
        district.loc[sums.index].rename(None), sums.rename(None), check_names=False
    )


# ---- the ledger on PostgreSQL -------------------------------------------------------------------


@pytest.fixture
def schema_url(pg: sa.Engine) -> Iterator[str]:
    """The test database with a fresh schema first on the search_path (dropped afterwards)."""
    schema = f"digest_t{uuid.uuid4().hex[:10]}"
    with pg.begin() as conn:
        conn.exec_driver_sql(f'CREATE SCHEMA "{schema}"')
    yield f"{PG_URL}?options=-csearch_path%3D{schema}"
    with pg.begin() as conn:
        conn.exec_driver_sql(f'DROP SCHEMA "{schema}" CASCADE')


def test_a_second_ledger_connection_is_refused_the_lock(schema_url: str) -> None:
    with Ledger.open(schema_url) as first, Ledger.open(schema_url) as second:
        with first.lock():
            with pytest.raises(LockHeld) as info, second.lock():
                pass
            assert f"pid {os.getpid()}" in str(info.value)
        with second.lock():  # released: the other may take it now
            pass


def test_digest_run_records_alerts_in_a_postgres_ledger(
    demo: dict[str, Any], schema_url: str, tmp_path: Path
) -> None:
    from digest.jobs import run_job
    from digest.testing import read_maildir, relay_for, running_sink

    config: Config = demo["config"]
    mail = config.mail.model_copy(update={"charts": 0, "all_clear": False})
    output = config.output.model_copy(update={"table": None})
    with running_sink(tmp_path / "maildir") as sink:
        run_config = config.model_copy(
            update={
                "ledger": config.ledger.model_copy(update={"url": schema_url}),
                "relay": relay_for(sink),
                "mail": mail,
                "output": output,
            }
        )
        outcome = run_job(run_config, now=NOW, mode="relay", out_dir=tmp_path / "out")
        again = run_job(run_config, now=NOW, mode="relay", out_dir=tmp_path / "out")
    assert outcome.status == "succeeded" and outcome.digests
    assert all(r.status == "sent" for r in outcome.delivery)
    assert len(read_maildir(tmp_path / "maildir")) == len(outcome.digests) + len(again.digests)
    with Ledger.open(schema_url) as ledger:
        runs = ledger.last_runs()
        assert [r.status for r in runs] == ["succeeded", "succeeded"]
        assert runs[-1].counts["alerts"] == len(demo["tables"].alerts)
        assert ledger.outbox.depth().oldest_pending is None
    # nothing new the second time: the same alerts are open and not yet due for a reminder
    assert again.status == "succeeded" and again.digests == []
