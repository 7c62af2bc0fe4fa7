"""Where the data come from: files or SQL queries for units and values, individual records
turned into counts, and bands and totals written back to a database.

SQL (any SQLAlchemy URL): a query is run in a read-only transaction and read in chunks of
``[data] chunk_rows`` rows (a server-side cursor on PostgreSQL), so memory stays bounded;
each chunk goes through the same row checks as a file (:func:`digest.loading.check_rows`).
Rejects from a query name their source ``sql:values`` (``sql:units``) and, as ``line``,
the row number in the query's result, counting from 1. The password is read from the
environment variable named by ``password_env`` and never appears in a message.

Records (``[[records]]``): one row per case or visit, with a unit column, a date or
period column and counting rules ``[[records.count]] metric = ..., where = ...``. A unit
that has at least one record in a period has reported that period: every rule gives it a
count there, 0 when no record matches. A rule's ``where`` is a small safe language
(:func:`parse_where`) evaluated with numpy on each chunk, with SQL's three-valued logic:
a comparison with a missing value is unknown, and only a record for which the whole
condition is true is counted. Bad records (unknown unit, a date that cannot be read, a
column that should hold a number but holds text) are rejected with their row number like
any other row; a text in a numeric comparison rejects the record for that rule only.
"""

from __future__ import annotations

import ast
import csv
import logging
import math
import re
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from datetime import date, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import sqlalchemy as sa
from sqlalchemy.engine import Engine

from digest.config import Config, DatabaseConfig, RecordsConfig, TableOutput, TableSource
from digest.errors import DataError
from digest.hierarchy import REQUIRED_COLUMNS, Hierarchy, build_hierarchy, load_hierarchy
from digest.loading import (
    REJECT_COLUMNS,
    VALUE_COLUMNS,
    Checked,
    Reasons,
    _csv_line_index,
    _parse_periods,
    distinct_labels,
    mark_units,
    read_values_file,
    unit_rows,
)
from digest.periods import PeriodKind

if TYPE_CHECKING:
    from digest.pipeline import RunResult

log = logging.getLogger("digest.sources")


def source_label(source: Path | TableSource, what: str) -> str:
    """How messages and rejects name a source: the file path, or ``sql:<what>``."""
    return f"sql:{what}" if isinstance(source, TableSource) else str(source)


# ---- SQL --------------------------------------------------------------------------------


def open_database(db: DatabaseConfig) -> Engine:
    """An engine for ``db`` (password from the environment); DataError when it cannot be made."""
    url = db.sqlalchemy_url()
    if url.get_backend_name() == "sqlite":
        database = url.database or ""
        on_disk = database not in ("", ":memory:") and not database.startswith("file:")
        if on_disk and not Path(database).exists():
            raise DataError(f"{db.shown_url}: the SQLite file {database} does not exist")
    try:
        return sa.create_engine(url, poolclass=sa.pool.NullPool)
    except ModuleNotFoundError as exc:
        raise DataError(
            f"{db.shown_url}: the database driver {exc.name!r} is not installed "
            "(for PostgreSQL: pip install 'psycopg[binary]')"
        ) from None
    except sa.exc.ArgumentError as exc:
        raise DataError(f"{db.shown_url}: {exc}") from None


def _read_only(conn: sa.Connection) -> None:
    """The query may only read: a read-only transaction (PostgreSQL) or query_only (SQLite)."""
    if conn.dialect.name == "postgresql":
        conn.exec_driver_sql("SET TRANSACTION READ ONLY")
    elif conn.dialect.name == "sqlite":
        conn.exec_driver_sql("PRAGMA query_only = ON")


def read_sql_chunks(table: TableSource, label: str, chunk_rows: int) -> Iterator[pd.DataFrame]:
    """The query's rows, ``chunk_rows`` at a time, indexed by row number (1-based, "line").

    At least one frame is yielded (empty, with the columns, when the query returns no row).
    """
    engine = open_database(table)
    where = f"{label} ({table.shown_url})"
    try:
        with engine.connect() as conn:
            _read_only(conn)
            conn = conn.execution_options(stream_results=True, max_row_buffer=chunk_rows)
            try:
                result = conn.execute(_literal_sql(table.query))
            except sa.exc.SQLAlchemyError as exc:
                raise DataError(f"{where}: the query failed: {_db_message(exc)}") from None
            columns = list(result.keys())
            start, yielded = 1, False
            while True:
                try:
                    rows = result.fetchmany(chunk_rows)
                except sa.exc.SQLAlchemyError as exc:
                    raise DataError(
                        f"{where}: reading the rows failed: {_db_message(exc)}"
                    ) from None
                if not rows and yielded:
                    break
                frame = pd.DataFrame.from_records(rows, columns=columns, coerce_float=True)
                frame.index = pd.RangeIndex(start, start + len(frame), name="line")
                start += len(frame)
                yielded = True
                yield frame
                if len(rows) < chunk_rows:
                    break
    except sa.exc.OperationalError as exc:
        raise DataError(f"{where}: cannot connect: {_db_message(exc)}") from None
    finally:
        engine.dispose()


def _literal_sql(query: str) -> sa.TextClause:
    """The query as written: no bind parameters (a lone colon is escaped; SQLAlchemy doubles
    % for drivers that need it), so '10:30' and LIKE 'F%' mean what they say."""
    return sa.text(re.sub(r"(?<!:):(?!:)", r"\\:", query))


def _db_message(exc: sa.exc.SQLAlchemyError) -> str:
    """The driver's message without SQLAlchemy's statement and background-link lines."""
    cause = getattr(exc, "orig", None) or exc
    return " ".join(str(cause).split())


def _require_columns(
    frame: pd.DataFrame, needed: tuple[str, ...] | list[str], where: str, hint: str
) -> None:
    missing = [c for c in needed if c not in frame.columns]
    if missing:
        raise DataError(f"{where}: missing column(s) {', '.join(missing)}; {hint}")


# ---- units --------------------------------------------------------------------------------


def load_units(config: Config) -> Hierarchy:
    """The hierarchy from ``[data] units``: a CSV file or a query returning its columns."""
    units = config.data.units
    if not isinstance(units, TableSource):
        return load_hierarchy(units, config.data.levels)
    label = "sql:units"
    rows: list[tuple[int, dict[str, str]]] = []
    for frame in read_sql_chunks(units, label, config.data.chunk_rows):
        _require_columns(
            frame,
            REQUIRED_COLUMNS,
            label,
            f"the query must return {', '.join(REQUIRED_COLUMNS)} [, opened, closed]",
        )
        names = list(frame.columns)
        for line, values in zip(frame.index, frame.itertuples(index=False), strict=True):
            rows.append((int(line), {k: _cell_text(v) for k, v in zip(names, values, strict=True)}))
    return build_hierarchy(label, rows, config.data.levels)


def _cell_text(value: Any) -> str:
    """A database value as the text a CSV file would hold (NULL is empty, dates ISO)."""
    if value is None or (isinstance(value, float) and math.isnan(value)) or value is pd.NaT:
        return ""
    if isinstance(value, datetime):
        return value.date().isoformat()
    if isinstance(value, date):
        return value.isoformat()
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


# ---- values -------------------------------------------------------------------------------

VALUES_HINT = "the query must return unit, metric, period, value (name them with AS)"


def value_chunks(config: Config) -> Iterator[tuple[str, pd.DataFrame]]:
    """(source label, frame of value rows) chunk by chunk; lines in an index named "line".

    A query and a Parquet file are read ``chunk_rows`` rows at a time; a CSV file whole
    (its line numbers need the file's bytes).
    """
    values = config.data.values
    if isinstance(values, TableSource):
        label = "sql:values"
        for frame in read_sql_chunks(values, label, config.data.chunk_rows):
            _require_columns(frame, VALUE_COLUMNS, label, VALUES_HINT)
            if _holds_dates(frame["period"]):
                frame = frame.assign(period=_dates_as_periods(frame["period"], config.data.period))
            yield label, frame
    elif values.suffix.lower() in {".parquet", ".pq"}:
        yield from ((str(values), f) for f in _parquet_chunks(values, config.data.chunk_rows))
    else:
        yield str(values), read_values_file(values)


def _parquet_chunks(path: Path, chunk_rows: int) -> Iterator[pd.DataFrame]:
    if not path.exists():
        raise DataError(f"{path}: file not found; check [data] values in the config")
    file = _parquet_file(path, dictionary=("unit", "metric", "period"))
    missing = [c for c in VALUE_COLUMNS if c not in file.schema_arrow.names]
    if missing:
        raise DataError(
            f"{path}: missing column(s) {', '.join(missing)}; "
            "values need the columns unit,metric,period,value[,reported_at]"
        )
    start = 2  # as for CSV: the first row is "line 2"
    for batch in file.iter_batches(batch_size=chunk_rows, columns=list(VALUE_COLUMNS)):
        frame = batch.to_pandas()
        frame.index = pd.RangeIndex(start, start + len(frame), name="line")
        start += len(frame)
        yield frame


def _parquet_file(path: Path, dictionary: Sequence[str] = ()) -> pq.ParquetFile:
    """Open a Parquet file; a broken one fails the load stage, the message naming the file.

    Columns named in ``dictionary`` (when present) are read dictionary-encoded: each distinct
    label is then checked once, which is most of the loading time on large files.
    """
    try:
        file = pq.ParquetFile(path)
        wanted = [c for c in dictionary if c in file.schema_arrow.names]
        return pq.ParquetFile(path, read_dictionary=wanted) if wanted else file
    except (pa.ArrowInvalid, OSError) as exc:
        raise type(exc)(f"{path}: {exc}") from exc


def _holds_dates(column: pd.Series) -> bool:
    if pd.api.types.is_datetime64_any_dtype(column):
        return True
    first = column.dropna().head(1)
    return bool(len(first)) and isinstance(first.iloc[0], date)


def _dates_as_periods(column: pd.Series, kind: PeriodKind) -> pd.Series:
    """A date column (e.g. the first day of the month in SQL) as period labels."""
    from digest.periods import format_period

    ordinal, missing, bad = date_ordinals(column, kind)
    labels = [
        "" if m else ("?" if b else format_period(int(o), kind))
        for o, m, b in zip(ordinal, missing, bad, strict=True)
    ]
    return pd.Series(labels, index=column.index, dtype=object)


def date_ordinals(column: pd.Series, kind: PeriodKind) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(period ordinal, missing, unreadable) of each date; ISO text, date or datetime values.

    A timestamp counts on its calendar date as written (a time zone is not converted).
    """
    codes, uniques = pd.factorize(column, use_na_sentinel=True)
    ordinal = np.zeros(len(uniques) + 1, dtype=np.int64)
    missing = np.zeros(len(uniques) + 1, dtype=bool)
    bad = np.zeros(len(uniques) + 1, dtype=bool)
    missing[-1] = True  # code -1: NULL / NaN / NaT
    for i, value in enumerate(uniques):
        day = _as_date(value)
        if day is None:
            missing[i] = isinstance(value, str) and not value.strip()
            bad[i] = not missing[i]
            continue
        ordinal[i] = (
            day.year * 12 + day.month - 1 if kind == "month" else (day.toordinal() - 1) // 7
        )
    return ordinal[codes], missing[codes], bad[codes]


def _as_date(value: Any) -> date | None:
    if isinstance(value, pd.Timestamp):
        return None if pd.isna(value) else value.date()
    if isinstance(value, datetime):
        return value.date()
    if isinstance(value, date):
        return value
    if isinstance(value, np.datetime64):
        return None if np.isnat(value) else pd.Timestamp(value).date()
    if not isinstance(value, str):
        return None
    text = value.strip()
    if not text:
        return None
    try:
        return date.fromisoformat(text)
    except ValueError:
        pass
    try:
        return datetime.fromisoformat(text).date()
    except ValueError:
        return None


# ---- the where language of counting rules ---------------------------------------------------

MAX_WHERE_LENGTH = 2000
MAX_WHERE_NODES = 400
_NUMERIC_OPS: dict[type[ast.cmpop], str] = {
    ast.Lt: "<",
    ast.LtE: "<=",
    ast.Gt: ">",
    ast.GtE: ">=",
    ast.Eq: "==",
    ast.NotEq: "!=",
}
_FLIPPED = {"<": ">", "<=": ">=", ">": "<", ">=": "<=", "==": "==", "!=": "!="}
_OPERATORS: dict[str, Callable[[Any, Any], Any]] = {
    "<": np.less,
    "<=": np.less_equal,
    ">": np.greater,
    ">=": np.greater_equal,
    "==": np.equal,
    "!=": np.not_equal,
}


class WhereError(ValueError):
    """A ``where`` text outside the allowed language; the message names the part and why."""


class WhereTypeError(DataError):
    """A rule compares a column with text although the column holds numbers (or the like)."""


Constant = float | str


@dataclass(frozen=True)
class _Compare:
    column: str
    op: str  # one of _OPERATORS, the column on the left
    constant: Constant


@dataclass(frozen=True)
class _In:
    column: str
    constants: tuple[Constant, ...]
    negated: bool


@dataclass(frozen=True)
class _Bool:
    op: str  # "and", "or", "not"
    parts: tuple[Any, ...]


@dataclass(frozen=True)
class Where:
    """A parsed, checked condition over record columns; :meth:`evaluate` it on a frame."""

    text: str
    names: frozenset[str]
    tree: Any

    def evaluate(self, frame: pd.DataFrame, cache: dict[str, Any] | None = None) -> WhereResult:
        """Truth per row (1 true, 0 false, NaN unknown) and the column that could not be read."""
        if cache is None or "columns" not in cache:
            columns = _Columns(frame)
            if cache is not None:
                cache["columns"] = columns
        else:
            columns = cache["columns"]
        error = np.full(len(frame), None, dtype=object)
        truth = _evaluate(self.tree, columns, error, self.text)
        return WhereResult(np.broadcast_to(truth, (len(frame),)).astype(float), error)


@dataclass(frozen=True)
class WhereResult:
    truth: np.ndarray  # float: 1.0 true, 0.0 false, NaN unknown (a missing value decided it)
    error: np.ndarray  # object: None, or the column whose text is not a number


def parse_where(text: str) -> Where:
    """Parse and check ``text``; raise WhereError naming the refused part.

    Allowed: record column names, number and text constants, comparisons (chains too)
    between one column and one constant, ``in`` / ``not in`` a tuple or list of
    constants, and ``and`` / ``or`` / ``not``. Text compares with ``==``, ``!=`` and ``in``
    only. Nothing else: no attribute access, calls, subscripts, arithmetic, ``is``.
    """
    if len(text) > MAX_WHERE_LENGTH:
        raise WhereError(f"is longer than {MAX_WHERE_LENGTH} characters; simplify the condition")
    try:
        tree = ast.parse(text.strip(), mode="eval")
    except SyntaxError as exc:
        raise WhereError(f"cannot parse {text!r}: {exc.msg}") from None
    if sum(1 for _ in ast.walk(tree)) > MAX_WHERE_NODES:
        raise WhereError(f"has more than {MAX_WHERE_NODES} parts; simplify the condition")
    names: set[str] = set()
    compiled = _condition(tree.body, text, names)
    return Where(text.strip(), frozenset(names), compiled)


def _refuse(node: ast.AST, text: str, why: str) -> WhereError:
    part = ast.unparse(node) if isinstance(node, ast.expr) else type(node).__name__
    return WhereError(f"{why}: {part!r} in {text!r}")


def _condition(node: ast.expr, text: str, names: set[str]) -> Any:
    if isinstance(node, ast.BoolOp):
        op = "and" if isinstance(node.op, ast.And) else "or"
        return _Bool(op, tuple(_condition(v, text, names) for v in node.values))
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, ast.Not):
        return _Bool("not", (_condition(node.operand, text, names),))
    if isinstance(node, ast.Compare):
        return _comparison(node, text, names)
    if isinstance(node, ast.Name):
        raise _refuse(node, text, "a column alone is not a condition; compare it, e.g. x == 'yes'")
    if isinstance(node, ast.Attribute):
        raise _refuse(node, text, "attribute access is not allowed")
    if isinstance(node, ast.Call):
        raise _refuse(node, text, "calls are not allowed")
    raise _refuse(node, text, "not allowed in a condition (use comparisons with and/or/not)")


def _comparison(node: ast.Compare, text: str, names: set[str]) -> Any:
    operands = [node.left, *node.comparators]
    parts = []
    for op_node, left, right in zip(node.ops, operands, operands[1:], strict=False):
        parts.append(_pair(node, op_node, left, right, text, names))
    return parts[0] if len(parts) == 1 else _Bool("and", tuple(parts))


def _pair(
    node: ast.Compare,
    op_node: ast.cmpop,
    left: ast.expr,
    right: ast.expr,
    text: str,
    names: set[str],
) -> Any:
    if isinstance(op_node, ast.In | ast.NotIn):
        column = _column(left, text, names)
        if not isinstance(right, ast.Tuple | ast.List):
            raise _refuse(right, text, "in needs a tuple or list of constants, e.g. ('a', 'b')")
        constants = tuple(_constant(e, text) for e in right.elts)
        if not constants:
            raise _refuse(right, text, "the list after in is empty")
        if len({isinstance(c, str) for c in constants}) > 1:
            raise _refuse(right, text, "the list mixes numbers and text")
        return _In(column, constants, isinstance(op_node, ast.NotIn))
    op = _NUMERIC_OPS.get(type(op_node))
    if op is None:
        raise _refuse(node, text, "comparison not allowed (use <, <=, >, >=, ==, !=, in)")
    for side in (left, right):
        if not (isinstance(side, ast.Name | ast.Constant) or _signed_number(side)):
            raise _refuse(side, text, _why_not_operand(side))
    left_is_column = isinstance(left, ast.Name)
    right_is_column = isinstance(right, ast.Name)
    if left_is_column and right_is_column:
        raise _refuse(node, text, "compare a column with a constant, not with another column")
    if not (left_is_column or right_is_column):
        raise _refuse(node, text, "compares two constants; name a record column")
    if left_is_column:
        column, constant = _column(left, text, names), _constant(right, text)
    else:
        column, constant = _column(right, text, names), _constant(left, text)
        op = _FLIPPED[op]
    if isinstance(constant, str) and op not in ("==", "!="):
        raise _refuse(node, text, "text compares only with ==, != and in")
    return _Compare(column, op, constant)


def _signed_number(node: ast.expr) -> bool:
    return isinstance(node, ast.UnaryOp) and isinstance(node.op, ast.USub | ast.UAdd)


def _why_not_operand(node: ast.expr) -> str:
    if isinstance(node, ast.Attribute):
        return "attribute access is not allowed"
    if isinstance(node, ast.Call):
        return "calls are not allowed"
    if isinstance(node, ast.Subscript):
        return "subscripts are not allowed"
    if isinstance(node, ast.BinOp):
        return "arithmetic is not allowed; compare a column with a constant"
    return "only column names and constants may be compared"


def _column(node: ast.expr, text: str, names: set[str]) -> str:
    if not isinstance(node, ast.Name):
        raise _refuse(node, text, _why_not_operand(node))
    if node.id.startswith("_"):
        raise _refuse(node, text, "names starting with _ are not allowed")
    names.add(node.id)
    return node.id


def _constant(node: ast.expr, text: str) -> Constant:
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, ast.USub | ast.UAdd):
        value = _constant(node.operand, text)
        if isinstance(value, str):
            raise _refuse(node, text, "a sign goes with numbers only")
        return -value if isinstance(node.op, ast.USub) else value
    if isinstance(node, ast.Constant):
        value = node.value
        if isinstance(value, bool) or value is None or not isinstance(value, int | float | str):
            raise _refuse(node, text, "only numbers and text are allowed as constants")
        if isinstance(value, float) and not math.isfinite(value):
            raise _refuse(node, text, "numbers must be finite")
        return value if isinstance(value, str) else float(value)
    if isinstance(node, ast.Name):
        raise _refuse(node, text, "the list after in holds constants only, not columns")
    if isinstance(node, ast.Constant | ast.UnaryOp):
        raise _refuse(node, text, "only numbers and text are allowed as constants")
    raise _refuse(node, text, _why_not_operand(node))


class _Columns:
    """Each column of a chunk read once: its distinct values as text and as numbers."""

    def __init__(self, frame: pd.DataFrame) -> None:
        self.frame = frame
        self._labels: dict[str, tuple[np.ndarray, np.ndarray]] = {}
        self._numbers: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}

    def numeric_dtype(self, name: str) -> bool:
        column = self.frame[name]
        return bool(pd.api.types.is_bool_dtype(column) or pd.api.types.is_numeric_dtype(column))

    def labels(self, name: str) -> tuple[np.ndarray, np.ndarray]:
        """(code per row, stripped text per distinct value; a missing cell is empty text)."""
        if name not in self._labels:
            self._labels[name] = distinct_labels(self.frame[name])
        return self._labels[name]

    def numbers(self, name: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(values, missing, not a number) of a column compared with numbers."""
        if name not in self._numbers:
            if self.numeric_dtype(name):
                values = self.frame[name].to_numpy(dtype=float, na_value=np.nan)
                missing = np.isnan(values)
                self._numbers[name] = (values, missing, np.zeros(len(values), dtype=bool))
            else:
                codes, labels = self.labels(name)
                parsed = np.asarray(pd.to_numeric(pd.Series(labels), errors="coerce"), float)
                empty = labels == ""
                self._numbers[name] = (
                    parsed[codes],
                    empty[codes],
                    (np.isnan(parsed) & ~empty)[codes],
                )
        return self._numbers[name]


def _evaluate(node: Any, columns: _Columns, error: np.ndarray, text: str) -> np.ndarray:
    if isinstance(node, _Bool):
        parts = [_evaluate(p, columns, error, text) for p in node.parts]
        if node.op == "not":
            return 1.0 - parts[0]
        result = parts[0]
        for part in parts[1:]:
            result = _and(result, part) if node.op == "and" else _or(result, part)
        return result
    constants = (node.constant,) if isinstance(node, _Compare) else node.constants
    if isinstance(constants[0], str):
        if columns.numeric_dtype(node.column):
            raise WhereTypeError(
                f"column {node.column} holds numbers, but {text!r} compares it with text; "
                "compare it with a number (no quotes)"
            )
        codes, labels = columns.labels(node.column)
        if isinstance(node, _Compare):
            hit = labels == node.constant if node.op == "==" else labels != node.constant
        else:
            hit = pd.Series(labels).isin(constants).to_numpy() != node.negated
        return np.where(labels == "", np.nan, hit.astype(float))[codes]
    values, missing, not_number = columns.numbers(node.column)
    unset = not_number & (error == None)  # noqa: E711 -- element-wise on an object array
    error[unset] = node.column
    with np.errstate(invalid="ignore"):
        if isinstance(node, _Compare):
            hit = _OPERATORS[node.op](values, node.constant)
        else:
            hit = np.isin(values, np.array(constants, dtype=float)) != node.negated
    return np.where(missing | not_number, np.nan, hit.astype(float))


def _and(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    both = np.where(np.isnan(a) | np.isnan(b), np.nan, a * b)
    return np.where((a == 0) | (b == 0), 0.0, both)


def _or(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    either = np.where(np.isnan(a) | np.isnan(b), np.nan, np.maximum(a, b))
    return np.where((a == 1) | (b == 1), 1.0, either)


# ---- records -> counts ---------------------------------------------------------------------


def records_parts(config: Config, hierarchy: Hierarchy) -> list[Checked]:
    """Every ``[[records]]`` source as count rows (one per unit, metric and period)."""
    return [records_part(spec, config, hierarchy) for spec in config.records]


def _record_chunks(spec: RecordsConfig, config: Config, label: str) -> Iterator[pd.DataFrame]:
    if spec.table is not None:
        yield from read_sql_chunks(spec.table, label, config.data.chunk_rows)
        return
    path = spec.path
    assert path is not None  # RecordsConfig guarantees path or table
    if not path.exists():
        raise DataError(f"{path}: file not found; check [[records]] {spec.name} path")
    if path.suffix.lower() in {".parquet", ".pq"}:
        file = _parquet_file(path)
        start = 2
        for batch in file.iter_batches(batch_size=config.data.chunk_rows):
            frame = batch.to_pandas()
            frame.index = pd.RangeIndex(start, start + len(frame), name="line")
            start += len(frame)
            yield frame
        return
    with path.open(newline="", encoding="utf-8") as fh:
        header = next(csv.reader(fh), [])
    options = pacsv.ConvertOptions(
        column_types={c: pa.string() for c in header}, strings_can_be_null=False
    )
    try:
        frame = pacsv.read_csv(path, convert_options=options).to_pandas()
    except pa.ArrowInvalid as exc:
        raise DataError(f"{path}: cannot read as CSV: {exc}") from None
    frame.index = _csv_line_index(path, len(frame))
    for start in range(0, max(len(frame), 1), config.data.chunk_rows):
        yield frame.iloc[start : start + config.data.chunk_rows]


def records_part(spec: RecordsConfig, config: Config, hierarchy: Hierarchy) -> Checked:
    """Count the records of one source per (unit, metric, period); reject the bad ones."""
    label = f"records:{spec.name}"
    kind = config.data.period
    raw_codes = [m.code for m in config.metric]
    rules = [
        (raw_codes.index(r.metric), r.metric, parse_where(r.where) if r.where else None)
        for r in spec.count
    ]
    time_column = spec.date or spec.period or ""
    needed = list(
        dict.fromkeys(
            [
                spec.unit,
                time_column,
                *sorted({n for _, _, w in rules if w is not None for n in w.names}),
            ]
        )
    )
    sums: list[pd.DataFrame] = []
    rejects: list[pd.DataFrame] = []
    rows_read = 0
    for frame in _record_chunks(spec, config, label):
        _require_columns(
            frame,
            needed,
            label,
            f"the records have the columns {', '.join(map(str, frame.columns))}; "
            "check unit, date/period and the names in where",
        )
        rows_read += len(frame)
        part_sums, part_rejects = _count_chunk(frame, spec, rules, label, kind, hierarchy)
        sums.append(part_sums)
        rejects.append(part_rejects)
    counts = [f"c{k}" for k in range(len(rules))]
    if sums and any(len(s) for s in sums):
        total = (
            pd.concat(sums, ignore_index=True)
            .groupby(["u", "p"], sort=True)
            .agg(n=("n", "sum"), first=("first", "min"), **{c: (c, "sum") for c in counts})
            .reset_index()
        )
    else:
        total = pd.DataFrame({c: np.array([], np.int64) for c in ["u", "p", "n", "first", *counts]})
    n = len(total)
    k = len(rules)
    reject_frame = (
        pd.concat(rejects, ignore_index=True)
        if rejects
        else pd.DataFrame(columns=list(REJECT_COLUMNS))
    )
    return Checked(
        source=label,
        origin=label,
        rows_read=rows_read,
        line=np.tile(total["first"].to_numpy(np.int64), k),
        unit=np.tile(total["u"].to_numpy(np.int32), k),
        metric=np.repeat(np.array([m for m, _, _ in rules], dtype=np.int32), n),
        period=np.tile(total["p"].to_numpy(np.int64), k),
        value=np.concatenate([total[c].to_numpy(np.float64) for c in counts])
        if k
        else np.array([], float),
        rejects=reject_frame,
        records=np.tile(total["n"].to_numpy(np.int64), k),
    )


def _count_chunk(
    frame: pd.DataFrame,
    spec: RecordsConfig,
    rules: list[tuple[int, str, Where | None]],
    label: str,
    kind: PeriodKind,
    hierarchy: Hierarchy,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    n = len(frame)
    line = frame.index.to_numpy(dtype=np.int64)
    reasons = Reasons(n)
    unit_codes, unit_labels = distinct_labels(frame[spec.unit])
    label_all, label_row = unit_rows(unit_labels, hierarchy)
    unit_row = label_row[unit_codes]
    mark_units(reasons, label_all[unit_codes], unit_row, hierarchy.capture_level)
    time_codes, time_labels = distinct_labels(frame[spec.date or spec.period])
    if spec.date is not None:
        ordinal, missing, bad = date_ordinals(frame[spec.date], kind)
        reasons.mark(missing, f"{spec.date} is empty; every record needs its date")
        reasons.mark(bad, f"{spec.date} cannot be read; expected an ISO date like 2026-10-05")
    else:
        label_ordinal, label_bad = _parse_periods(time_labels, kind)
        ordinal, bad = label_ordinal[time_codes], label_bad[time_codes]
        expected = "an ISO month like 2026-10" if kind == "month" else "an ISO week like 2026-W42"
        reasons.mark(bad, f"{spec.period} cannot be read; expected {expected}")
    valid = reasons.code == 0
    rejected = np.flatnonzero(~valid)
    parts = [
        pd.DataFrame(
            {
                "source": label,
                "line": line[rejected],
                "unit": unit_labels[unit_codes[rejected]],
                "metric": "",
                "period": time_labels[time_codes[rejected]],
                "value": "",
                "reason": reasons.text(rejected).astype(str),
            },
            columns=list(REJECT_COLUMNS),
        )
    ]
    sums = pd.DataFrame({"u": unit_row[valid], "p": ordinal[valid], "line": line[valid]})
    cache: dict[str, Any] = {}
    for k, (_, metric, where) in enumerate(rules):
        if where is None:
            sums[f"c{k}"] = np.ones(int(valid.sum()), dtype=np.int64)
            continue
        try:
            result = where.evaluate(frame, cache)
        except WhereTypeError as exc:
            raise DataError(f"{label}: the rule for {metric}: {exc}") from None
        error = result.error
        bad_rows = np.flatnonzero(valid & (error != None))  # noqa: E711
        if len(bad_rows):
            columns = error[bad_rows]
            shown = np.empty(len(bad_rows), dtype=object)
            for name in set(columns):
                mine = columns == name
                codes, labels = cache["columns"].labels(name)
                shown[mine] = labels[codes[bad_rows[mine]]]
            parts.append(
                pd.DataFrame(
                    {
                        "source": label,
                        "line": line[bad_rows],
                        "unit": unit_labels[unit_codes[bad_rows]],
                        "metric": metric,
                        "period": time_labels[time_codes[bad_rows]],
                        "value": shown,
                        "reason": [
                            f"{c} is {v!r}, not a number, so {where.text!r} cannot be decided; "
                            f"the record is not counted for {metric}; fix the record"
                            for c, v in zip(columns, shown, strict=True)
                        ],
                    },
                    columns=list(REJECT_COLUMNS),
                )
            )
        counted = (result.truth == 1.0) & (error == None)  # noqa: E711
        sums[f"c{k}"] = counted[valid].astype(np.int64)
    grouped = (
        sums.groupby(["u", "p"], sort=False)
        .agg(
            n=("line", "size"),
            first=("line", "min"),
            **{f"c{k}": (f"c{k}", "sum") for k in range(len(rules))},
        )
        .reset_index()
    )
    rejects = pd.concat([p for p in parts if len(p)] or parts[:1], ignore_index=True)
    return grouped, rejects.sort_values("line", kind="stable")


# ---- bands and totals written back -----------------------------------------------------------

BAND_COLUMNS: tuple[tuple[str, Any], ...] = (
    ("unit", sa.String(128)),
    ("unit_name", sa.Text),
    ("level", sa.String(64)),
    ("band", sa.String(128)),
    ("metric", sa.String(128)),
    ("period", sa.String(16)),
    ("centre", sa.Float),
    ("low", sa.Float),
    ("high", sa.Float),
    ("spread", sa.Float),
    ("points", sa.Integer),
    ("method", sa.String(64)),
    ("run_id", sa.String(64)),
)
TOTAL_COLUMNS: tuple[tuple[str, Any], ...] = (
    ("unit", sa.String(128)),
    ("level", sa.String(64)),
    ("metric", sa.String(128)),
    ("period", sa.String(16)),
    ("value", sa.Float),
    ("reported", sa.Integer),
    ("expected", sa.Integer),
    ("run_id", sa.String(64)),
)


def _table(metadata: sa.MetaData, qualified: str, columns: tuple[tuple[str, Any], ...]) -> sa.Table:
    schema, _, name = qualified.rpartition(".")
    table = sa.Table(name, metadata, *(sa.Column(c, t) for c, t in columns), schema=schema or None)
    sa.Index(f"{name}_period", table.c.period)
    return table


def write_back(result: RunResult, output: TableOutput) -> dict[str, int]:
    """Replace the evaluated period's rows of the bands and totals tables, in one transaction.

    Tables are created when missing. Returns the rows written per table name.
    """
    frames = {
        output.name: (BAND_COLUMNS, result.bands_frame()),
        output.totals: (TOTAL_COLUMNS, result.totals_frame()),
    }
    metadata = sa.MetaData()
    engine = open_database(output)
    written: dict[str, int] = {}
    try:
        with engine.begin() as conn:
            for name, (columns, frame) in frames.items():
                table = _table(metadata, name, columns)
                table.create(conn, checkfirst=True)
                conn.execute(sa.delete(table).where(table.c.period == result.period))
                rows = _rows(frame.assign(run_id=result.run_id), [c for c, _ in columns])
                _insert(conn, table, rows)
                written[name] = len(rows)
    except sa.exc.SQLAlchemyError as exc:
        raise DataError(
            f"[output] table {output.shown_url}: bands and totals could not be written: "
            f"{_db_message(exc)}"
        ) from None
    finally:
        engine.dispose()
    log.info(
        "wrote %s to %s",
        ", ".join(f"{n} rows to {t}" for t, n in written.items()),
        output.shown_url,
    )
    return written


def _rows(frame: pd.DataFrame, columns: list[str]) -> list[tuple[Any, ...]]:
    """Plain Python values (drivers do not all take numpy scalars); NaN becomes NULL."""
    out = frame.reindex(columns=columns).astype(object)
    out = out.where(pd.notna(out), None)
    return [tuple(_plain(v) for v in row) for row in out.itertuples(index=False, name=None)]


def _plain(value: Any) -> Any:
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return float(value)
    return value


def _insert(conn: sa.Connection, table: sa.Table, rows: list[tuple[Any, ...]]) -> None:
    if not rows:
        return
    names = [c.name for c in table.columns]
    if conn.dialect.name == "postgresql" and conn.dialect.driver == "psycopg":
        target = conn.dialect.identifier_preparer.format_table(table)
        listed = ", ".join(conn.dialect.identifier_preparer.quote(n) for n in names)
        raw = conn.connection.driver_connection
        with raw.cursor() as cursor, cursor.copy(f"COPY {target} ({listed}) FROM STDIN") as copy:
            for row in rows:
                copy.write_row(row)
        return
    for start in range(0, len(rows), 10_000):
        chunk = rows[start : start + 10_000]
        conn.execute(sa.insert(table), [dict(zip(names, r, strict=True)) for r in chunk])
