"""Load reported values into a :class:`Dataset`, keeping a record of every rejected row.

Values come in long form, ``unit,metric,period,value`` (optional ``reported_at``), from
CSV or Parquet. A row is rejected, with its source file, line and reason, when its unit
is unknown or not at the capture level, its metric is unknown or derived, its period or
value cannot be read, a count is negative, or another row gives a different value for
the same (unit, metric, period). Exact duplicates are collapsed and counted. Line numbers
count the header as line 1 (files with quoted line breaks inside fields will be off).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv

from digest.config import Config
from digest.errors import DataError
from digest.hierarchy import Hierarchy
from digest.periods import PeriodKind, format_period, parse_period

VALUE_COLUMNS = ("unit", "metric", "period", "value")
REJECT_COLUMNS = ("source", "line", "unit", "metric", "period", "value", "reason")


@dataclass(frozen=True)
class Dataset:
    """Dense values per metric: float arrays [capture units x periods], NaN = not reported."""

    hierarchy: Hierarchy
    kind: PeriodKind
    periods: np.ndarray  # contiguous ascending period ordinals
    capture: np.ndarray  # hierarchy indices of the capture-level units, row order
    values: dict[str, np.ndarray]

    @property
    def period_labels(self) -> list[str]:
        return [format_period(int(p), self.kind) for p in self.periods]

    def column(self, period: int) -> int:
        """Column of a period ordinal; ValueError when outside the data."""
        col = int(period - self.periods[0])
        if not 0 <= col < len(self.periods):
            raise ValueError(
                f"period {format_period(period, self.kind)} is outside the data "
                f"({self.period_labels[0]} to {self.period_labels[-1]})"
            )
        return col


@dataclass(frozen=True)
class LoadStats:
    rows_read: int
    rows_rejected: int
    duplicates_collapsed: int
    rows_loaded: int

    @property
    def reject_share(self) -> float:
        return self.rows_rejected / self.rows_read if self.rows_read else 0.0


@dataclass(frozen=True)
class Loaded:
    dataset: Dataset
    rejects: pd.DataFrame
    stats: LoadStats


def read_values_file(path: Path) -> pd.DataFrame:
    """Raw rows with the four value columns as text (value may stay numeric from Parquet)."""
    if not path.exists():
        raise DataError(f"{path}: file not found; check [data] values in the config")
    if path.suffix.lower() in {".parquet", ".pq"}:
        frame = pd.read_parquet(path)
    else:
        options = pacsv.ConvertOptions(
            column_types={c: pa.string() for c in (*VALUE_COLUMNS, "reported_at")},
            strings_can_be_null=False,
        )
        try:
            frame = pacsv.read_csv(path, convert_options=options).to_pandas()
        except pa.ArrowInvalid as exc:
            raise DataError(f"{path}: cannot read as CSV: {exc}") from None
        frame.index = _csv_line_index(path, len(frame))
    missing = [c for c in VALUE_COLUMNS if c not in frame.columns]
    if missing:
        raise DataError(
            f"{path}: missing column(s) {', '.join(missing)}; "
            "values need the header unit,metric,period,value[,reported_at]"
        )
    return frame


def load_values(config: Config, hierarchy: Hierarchy) -> Loaded:
    """Read ``[data] values`` and build the dataset; fail when too many rows are rejected."""
    path = config.data.values
    loaded = build_dataset(read_values_file(path), str(path), config, hierarchy)
    share = loaded.stats.reject_share
    if share > config.data.max_reject_share:
        raise DataError(
            f"{path}: {loaded.stats.rows_rejected} of {loaded.stats.rows_read} rows rejected "
            f"({share:.1%}), more than max_reject_share = {config.data.max_reject_share:.1%}; "
            "see rejects.csv for each row and its reason"
        )
    return loaded


def build_dataset(frame: pd.DataFrame, source: str, config: Config, hierarchy: Hierarchy) -> Loaded:
    kind = config.data.period
    n = len(frame)
    line = frame.index.to_numpy() if frame.index.name == "line" else np.arange(2, n + 2)
    unit_text = _text(frame["unit"])
    metric_text = _text(frame["metric"])
    period_text = _text(frame["period"])
    capture = hierarchy.at_level(hierarchy.capture_level)
    reason = np.full(n, "", dtype=object)

    unit_all = pd.Index(hierarchy.ids).get_indexer(unit_text)
    row_of_unit = np.full(hierarchy.size, -1, dtype=np.int64)
    row_of_unit[capture] = np.arange(len(capture))
    unit_row = np.where(unit_all >= 0, row_of_unit[np.maximum(unit_all, 0)], -1)
    _mark(reason, unit_all < 0, "unknown unit; add it to units.csv or fix the id")
    _mark(
        reason,
        (unit_all >= 0) & (unit_row < 0),
        f"unit is not a {hierarchy.capture_level}; values are captured at that level only",
    )

    raw_codes = [m.code for m in config.metric]
    derived_codes = {d.code for d in config.derived}
    metric_idx = pd.Index(raw_codes).get_indexer(metric_text)
    is_derived = pd.Series(metric_text).isin(derived_codes).to_numpy()
    _mark(reason, is_derived, "metric is derived and computed by the tool; leave it out")
    _mark(reason, (metric_idx < 0) & ~is_derived, "unknown metric; declare it under [[metric]]")

    ordinal, bad_period = _parse_periods(period_text, kind)
    expected = "an ISO month like 2026-10" if kind == "month" else "an ISO week like 2026-W42"
    _mark(reason, bad_period, f"period cannot be read; expected {expected}")

    value, value_text = _parse_values(frame["value"])
    _mark(
        reason, np.isnan(value) & (value_text == ""), "value is empty; leave out a missing report"
    )
    _mark(reason, np.isnan(value) & (value_text != ""), "value is not a number")
    counts = np.array([m.count for m in config.metric] + [False])  # last slot: unknown metric
    is_count = counts[np.where(metric_idx >= 0, metric_idx, len(raw_codes))]
    _mark(reason, is_count & (value < 0), "negative count; counts cannot be below 0")

    valid = reason == ""
    keys = pd.DataFrame(
        {"u": unit_row[valid], "m": metric_idx[valid], "p": ordinal[valid], "v": value[valid]}
    )
    collapsed, conflicting = _duplicates(keys)
    valid_lines = line[valid]
    conflict_reason = _conflict_reasons(keys, conflicting, valid_lines)
    reason_valid = reason[valid]
    reason_valid[conflicting] = conflict_reason
    reason[valid] = reason_valid

    keep = np.flatnonzero(valid)[~conflicting & ~collapsed]
    rejected = reason != ""
    rejects = pd.DataFrame(
        {
            "source": source,
            "line": line[rejected],
            "unit": unit_text[rejected],
            "metric": metric_text[rejected],
            "period": period_text[rejected],
            "value": value_text[rejected],
            "reason": reason[rejected].astype(str),
        },
        columns=list(REJECT_COLUMNS),
    )
    dataset = _dense(
        hierarchy,
        kind,
        capture,
        raw_codes,
        unit_row[keep],
        metric_idx[keep],
        ordinal[keep],
        value[keep],
    )
    stats = LoadStats(
        rows_read=n,
        rows_rejected=int(rejected.sum()),
        duplicates_collapsed=int(collapsed.sum()),
        rows_loaded=len(keep),
    )
    return Loaded(dataset, rejects, stats)


def _csv_line_index(path: Path, rows: int) -> pd.Index:
    """File line of each data row (header = 1), counting the empty lines the reader skips."""
    data = path.read_bytes()
    if data[:1] in {b"\n", b"\r"} or b"\n\n" in data or b"\r\n\r\n" in data:
        lines = [n for n, text in enumerate(data.splitlines(), start=1) if text]
        if len(lines) > rows:
            return pd.Index(lines[1 : rows + 1], name="line")
    return pd.RangeIndex(2, rows + 2, name="line")


def _text(column: pd.Series) -> np.ndarray:
    return column.astype(str).str.strip().to_numpy(dtype=object)


def _mark(reason: np.ndarray, mask: np.ndarray, why: str) -> None:
    """Give ``why`` to rows in ``mask`` that have no reason yet (first reason wins)."""
    reason[mask & (reason == "")] = why


def _parse_periods(text: np.ndarray, kind: PeriodKind) -> tuple[np.ndarray, np.ndarray]:
    codes, uniques = pd.factorize(text)
    parsed = np.empty(len(uniques), dtype=np.int64)
    bad = np.zeros(len(uniques), dtype=bool)
    for i, label in enumerate(uniques):
        try:
            parsed[i] = parse_period(str(label), kind)
        except ValueError:
            parsed[i], bad[i] = 0, True
    return parsed[codes], bad[codes]


def _parse_values(column: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    if pd.api.types.is_numeric_dtype(column):
        value = np.array(column.to_numpy(dtype=float, na_value=np.nan))
        text = np.where(np.isnan(value), "", column.astype(str).to_numpy(dtype=object))
        return value, text.astype(object)
    text = _text(column)
    value = np.array(pd.to_numeric(pd.Series(text), errors="coerce"), dtype=float)
    value[~np.isfinite(value)] = np.nan
    return value, text


def _duplicates(keys: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """(collapsed: later copies of an identical row, conflicting: every row of a disputed key)."""
    key_cols = ["u", "m", "p"]
    same_key = keys.duplicated(key_cols, keep=False).to_numpy()
    if not same_key.any():
        return np.zeros(len(keys), bool), np.zeros(len(keys), bool)
    distinct_values = keys[same_key].groupby(key_cols)["v"].transform("nunique").to_numpy()
    conflicting = np.zeros(len(keys), bool)
    conflicting[np.flatnonzero(same_key)[distinct_values > 1]] = True
    collapsed = keys.duplicated(key_cols, keep="first").to_numpy() & ~conflicting
    return collapsed, conflicting


def _conflict_reasons(keys: pd.DataFrame, conflicting: np.ndarray, lines: np.ndarray) -> np.ndarray:
    if not conflicting.any():
        return np.array([], dtype=object)
    sub = keys[conflicting].assign(line=lines[conflicting])
    listing = sub.groupby(["u", "m", "p"])[["line", "v"]].apply(
        lambda g: "; ".join(f"line {ln}: {v:g}" for ln, v in zip(g["line"], g["v"], strict=True))
    )
    joined = sub.join(listing.rename("others"), on=["u", "m", "p"])["others"]
    return (
        "conflicting duplicate: the same unit, metric and period has different values ("
        + joined.astype(str)
        + "); keep one row"
    ).to_numpy(dtype=object)


def _dense(
    hierarchy: Hierarchy,
    kind: PeriodKind,
    capture: np.ndarray,
    codes: list[str],
    rows: np.ndarray,
    metrics: np.ndarray,
    ordinals: np.ndarray,
    values: np.ndarray,
) -> Dataset:
    if len(ordinals):
        periods = np.arange(ordinals.min(), ordinals.max() + 1)
    else:
        periods = np.array([], dtype=np.int64)
    cols = ordinals - (periods[0] if len(periods) else 0)
    dense: dict[str, np.ndarray] = {}
    for m, code in enumerate(codes):
        arr = np.full((len(capture), len(periods)), np.nan)
        mine = metrics == m
        arr[rows[mine], cols[mine]] = values[mine]
        dense[code] = arr
    return Dataset(hierarchy, kind, periods, capture, dense)
