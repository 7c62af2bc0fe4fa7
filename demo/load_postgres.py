"""Load the invented demo data into PostgreSQL: tables demo_units and demo_values.

Used by ``make demo-postgres`` before ``digest run --config demo/config-postgres.toml``.
Generates the demo data first when demo/data has none. Both tables keep the CSV line of
each row in ``line`` (the queries in config-postgres.toml order by it, so a reject's row
number is its CSV line minus one). ``value`` and ``period`` are text, so the demo's
deliberately bad rows (a value "ten", a period 2026-13 ...) reach digest and are rejected
as they are from the CSV; ``opened`` and ``closed`` are dates.

    python demo/load_postgres.py [--url URL] [--data demo/data] [--password-env NAME]
"""

from __future__ import annotations

import argparse
import csv
import os
import sys
from pathlib import Path

import sqlalchemy as sa

from digest import demo_data

DEFAULT_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/test"
TABLES = {
    "units": (
        "line integer PRIMARY KEY, id text, name text, parent text, level text, "
        "opened date, closed date",
        ("id", "name", "parent", "level", "opened", "closed"),
    ),
    "values": (
        "line integer PRIMARY KEY, unit text, metric text, period text, value text",
        ("unit", "metric", "period", "value"),
    ),
}


def rows_with_lines(path: Path, columns: tuple[str, ...]) -> list[tuple[object, ...]]:
    """Each data row with its line in the file (header = 1); empty text becomes NULL."""
    with path.open(newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        return [(reader.line_num, *((row.get(c) or None) for c in columns)) for row in reader]


def load(url: str | sa.URL, data: Path, prefix: str = "demo") -> dict[str, int]:
    """Write ``{prefix}_units`` and ``{prefix}_values``; return the rows written per table."""
    if not ((data / "units.csv").exists() and (data / "values.csv").exists()):
        print(f"generating the invented demo scenario into {data} ...")
        demo_data.generate(data)
    engine = sa.create_engine(url)
    counts = {}
    try:
        with engine.begin() as conn:
            raw = conn.connection.driver_connection
            for what, (ddl, columns) in TABLES.items():
                table = f"{prefix}_{what}"
                source = data / f"{what}.csv"
                rows = rows_with_lines(source, columns)
                conn.exec_driver_sql(f"DROP TABLE IF EXISTS {table}")
                conn.exec_driver_sql(f"CREATE TABLE {table} ({ddl})")
                listed = ", ".join(("line", *columns))
                with raw.cursor() as cur, cur.copy(f"COPY {table} ({listed}) FROM STDIN") as copy:
                    for row in rows:
                        copy.write_row(row)
                counts[table] = len(rows)
    finally:
        engine.dispose()
    return counts


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument(
        "--url", default=DEFAULT_URL, help=f"SQLAlchemy URL (default {DEFAULT_URL})"
    )
    parser.add_argument("--data", type=Path, default=Path(__file__).parent / "data")
    parser.add_argument("--password-env", help="environment variable holding the password")
    args = parser.parse_args(argv)
    url = sa.make_url(args.url)
    if args.password_env:
        url = url.set(password=os.environ[args.password_env])
    try:
        counts = load(url, args.data)
    except sa.exc.OperationalError as exc:
        print(
            f"cannot reach PostgreSQL at {url.render_as_string(hide_password=True)}: {exc.orig}",
            file=sys.stderr,
        )
        return 1
    shown = url.render_as_string(hide_password=True)
    print(", ".join(f"{table}: {n} rows" for table, n in counts.items()) + f" loaded into {shown}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
