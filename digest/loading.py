"""Load reported values into a :class:`Dataset`, keeping a record of every rejected row.

Values come in long form, ``unit,metric,period,value`` (optional ``reported_at``), from
CSV or Parquet. A row is rejected, with its source file, line and reason, when its unit
is unknown or not at the capture level, its metric is unknown or derived, its period or
value cannot be read, a count is negative, or another row gives a different value for
the same (unit, metric, period). Exact duplicates are collapsed and counted. Line numbers
count the header as line 1 (files with quoted line breaks inside fields will be off).
"""

from __future__ import annotations

from collections.abc import Callable
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
    """Read ``[data] values`` (file or query, chunk by chunk) and every ``[[records]]``
    source, build the dataset; fail when too many rows are rejected."""
    from digest import sources

    parts = [
        check_rows(frame, label, config, hierarchy) for label, frame in sources.value_chunks(config)
    ]
    parts += sources.records_parts(config, hierarchy)
    loaded = assemble(parts, config, hierarchy)
    share = loaded.stats.reject_share
    if share > config.data.max_reject_share:
        where = sources.source_label(config.data.values, "values")
        if config.records:
            where += " and " + ", ".join(f"records:{r.name}" for r in config.records)
        raise DataError(
            f"{where}: {loaded.stats.rows_rejected} of {loaded.stats.rows_read} rows rejected "
            f"({share:.1%}), more than max_reject_share = {config.data.max_reject_share:.1%}; "
            "see rejects.csv for each row and its reason"
        )
    return loaded


def build_dataset(frame: pd.DataFrame, source: str, config: Config, hierarchy: Hierarchy) -> Loaded:
    """The dataset of one frame of value rows (see :func:`check_rows` and :func:`assemble`)."""
    return assemble([check_rows(frame, source, config, hierarchy)], config, hierarchy)


@dataclass(frozen=True)
class Checked:
    """One chunk of rows after the row checks: valid rows as compact arrays, the rest rejected.

    Rows of one ``origin`` may repeat exactly (later copies are collapsed); the same
    (unit, metric, period) from two origins is a conflict. ``records`` is set for counts
    made from individual records: how many records each count covers.
    """

    source: str
    origin: str
    rows_read: int
    line: np.ndarray  # int64
    unit: np.ndarray  # int32: row among the capture-level units
    metric: np.ndarray  # int32: index into the raw metrics
    period: np.ndarray  # int64: period ordinal
    value: np.ndarray  # float64
    rejects: pd.DataFrame
    records: np.ndarray | None = None


class Reasons:
    """A small int per row instead of a string; the first reason given wins."""

    def __init__(self, n: int) -> None:
        self.code = np.zeros(n, dtype=np.uint8)
        self.texts = [""]

    def mark(self, mask: np.ndarray, why: str) -> None:
        if why not in self.texts:
            self.texts.append(why)
        self.code[mask & (self.code == 0)] = self.texts.index(why)

    def text(self, rows: np.ndarray) -> np.ndarray:
        return np.array(self.texts, dtype=object)[self.code[rows]]


def distinct_labels(column: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """(code per row, stripped text per distinct value): each distinct value is read once."""
    codes, uniques = pd.factorize(column, use_na_sentinel=False)
    return codes, _text(pd.Series(uniques, dtype=object))


def unit_rows(unit_text: np.ndarray, hierarchy: Hierarchy) -> tuple[np.ndarray, np.ndarray]:
    """(hierarchy index or -1, row among the capture-level units or -1) of each unit id."""
    capture = hierarchy.at_level(hierarchy.capture_level)
    unit_all = pd.Index(hierarchy.ids).get_indexer(unit_text)
    row_of_unit = np.full(hierarchy.size, -1, dtype=np.int64)
    row_of_unit[capture] = np.arange(len(capture))
    return unit_all, np.where(unit_all >= 0, row_of_unit[np.maximum(unit_all, 0)], -1)


def mark_units(reasons: Reasons, unit_all: np.ndarray, unit_row: np.ndarray, level: str) -> None:
    reasons.mark(unit_all < 0, "unknown unit; add it to units.csv or fix the id")
    reasons.mark(
        (unit_all >= 0) & (unit_row < 0),
        f"unit is not a {level}; values are captured at that level only",
    )


def check_rows(frame: pd.DataFrame, source: str, config: Config, hierarchy: Hierarchy) -> Checked:
    """Check each value row of ``frame``; lines come from an index named ``line`` (else 2, 3 ...)."""
    kind = config.data.period
    n = len(frame)
    line = (
        frame.index.to_numpy(dtype=np.int64)
        if frame.index.name == "line"
        else np.arange(2, n + 2, dtype=np.int64)
    )
    reasons = Reasons(n)

    unit_codes, unit_labels = distinct_labels(frame["unit"])
    label_all, label_row = unit_rows(unit_labels, hierarchy)
    unit_row = label_row[unit_codes]
    mark_units(reasons, label_all[unit_codes], unit_row, hierarchy.capture_level)

    raw_codes = [m.code for m in config.metric]
    derived_codes = {d.code for d in config.derived}
    metric_codes, metric_labels = distinct_labels(frame["metric"])
    metric_idx = pd.Index(raw_codes).get_indexer(metric_labels)[metric_codes]
    is_derived = pd.Series(metric_labels).isin(derived_codes).to_numpy()[metric_codes]
    reasons.mark(is_derived, "metric is derived and computed by the tool; leave it out")
    reasons.mark((metric_idx < 0) & ~is_derived, "unknown metric; declare it under [[metric]]")

    period_codes, period_labels = distinct_labels(frame["period"])
    label_ordinal, label_bad = _parse_periods(period_labels, kind)
    ordinal, bad_period = label_ordinal[period_codes], label_bad[period_codes]
    expected = "an ISO month like 2026-10" if kind == "month" else "an ISO week like 2026-W42"
    reasons.mark(bad_period, f"period cannot be read; expected {expected}")

    value, empty, value_shown = _parse_values(frame["value"])
    reasons.mark(empty, "value is empty; leave out a missing report")
    reasons.mark(np.isnan(value) & ~empty, "value is not a number")
    counts = np.array([m.count for m in config.metric] + [False])  # last slot: unknown metric
    is_count = counts[np.where(metric_idx >= 0, metric_idx, len(raw_codes))]
    with np.errstate(invalid="ignore"):
        reasons.mark(is_count & (value < 0), "negative count; counts cannot be below 0")

    valid = reasons.code == 0
    rejected = np.flatnonzero(~valid)
    shown = value_shown(rejected)
    rejects = pd.DataFrame(
        {
            "source": source,
            "line": line[rejected],
            "unit": unit_labels[unit_codes[rejected]],
            "metric": metric_labels[metric_codes[rejected]],
            "period": period_labels[period_codes[rejected]],
            "value": shown,
            "reason": reasons.text(rejected).astype(str),
        },
        columns=list(REJECT_COLUMNS),
    )
    return Checked(
        source=source,
        origin="values",
        rows_read=n,
        line=line[valid],
        unit=unit_row[valid].astype(np.int32),
        metric=metric_idx[valid].astype(np.int32),
        period=ordinal[valid],
        value=value[valid],
        rejects=rejects,
    )


def assemble(parts: list[Checked], config: Config, hierarchy: Hierarchy) -> Loaded:
    """Find duplicates and conflicts across every part, then build the dense arrays.

    Within one origin, exact copies of a row are collapsed and different values for the
    same (unit, metric, period) reject every row of that key; the same key from two
    origins (values and records, or two records sources) is always a conflict.
    """
    kind = config.data.period
    capture = hierarchy.at_level(hierarchy.capture_level)
    codes = [m.code for m in config.metric]
    sizes = np.array([len(p.value) for p in parts], dtype=np.int64)
    part_of = np.repeat(np.arange(len(parts), dtype=np.int32), sizes)
    origins = list(dict.fromkeys(p.origin for p in parts))
    origin = np.repeat(np.array([origins.index(p.origin) for p in parts], dtype=np.int32), sizes)

    def joined(name: str, dtype: type) -> np.ndarray:
        arrays = [getattr(p, name) for p in parts]
        return np.concatenate(arrays).astype(dtype, copy=False) if arrays else np.array([], dtype)

    unit, metric = joined("unit", np.int64), joined("metric", np.int64)
    period, value = joined("period", np.int64), joined("value", np.float64)
    n_units, n_metrics = len(capture), len(codes)
    first = int(period.min()) if len(period) else 0
    n_periods = int(period.max()) - first + 1 if len(period) else 0
    key = (metric * n_units + unit) * n_periods + (period - first)
    collapsed = np.zeros(len(key), dtype=bool)
    conflicting = np.zeros(len(key), dtype=bool)
    if len(key):
        seen = np.bincount(key, minlength=n_metrics * n_units * n_periods)
        shared = np.flatnonzero(seen[key] > 1)  # ascending: the first row of a key comes first
        del seen
        if len(shared):
            sub = pd.DataFrame({"k": key[shared], "v": value[shared], "o": origin[shared]})
            groups = sub.groupby("k", sort=False)
            disputed = (
                (groups["v"].transform("nunique") > 1) | (groups["o"].transform("nunique") > 1)
            ).to_numpy()
            conflicting[shared[disputed]] = True
            later = sub.duplicated("k", keep="first").to_numpy()
            collapsed[shared[later & ~disputed]] = True
    conflict_rejects = _conflict_rejects(
        parts,
        np.flatnonzero(conflicting),
        part_of,
        key,
        unit,
        metric,
        period,
        value,
        hierarchy,
        codes,
        kind,
    )
    keep = np.flatnonzero(~conflicting & ~collapsed)
    rejects = _sorted_rejects(parts, conflict_rejects)
    dataset = _dense(
        hierarchy, kind, capture, codes, unit[keep], metric[keep], period[keep], value[keep]
    )
    stats = LoadStats(
        rows_read=int(sum(p.rows_read for p in parts)),
        rows_rejected=len(rejects),
        duplicates_collapsed=int(collapsed.sum()),
        rows_loaded=len(keep),
    )
    return Loaded(dataset, rejects, stats)


def _conflict_rejects(
    parts: list[Checked],
    rows: np.ndarray,
    part_of: np.ndarray,
    key: np.ndarray,
    unit: np.ndarray,
    metric: np.ndarray,
    period: np.ndarray,
    value: np.ndarray,
    hierarchy: Hierarchy,
    codes: list[str],
    kind: PeriodKind,
) -> pd.DataFrame:
    """One reject per row of a disputed key, listing every row of that key."""
    if not len(rows):
        return pd.DataFrame(columns=[*REJECT_COLUMNS, "_part"])
    lines = np.concatenate([p.line for p in parts])[rows]
    records = np.concatenate(
        [p.records if p.records is not None else np.zeros(len(p.value), np.int64) for p in parts]
    )[rows]
    sub = pd.DataFrame(
        {
            "k": key[rows],
            "part": part_of[rows],
            "source": [parts[i].source for i in part_of[rows]],
            "line": lines,
            "v": value[rows],
            "records": records,
        }
    )

    def listing(group: pd.DataFrame) -> str:
        if group["source"].nunique() == 1 and not group["records"].any():
            entries = [f"line {ln}: {v:g}" for ln, v in zip(group["line"], group["v"], strict=True)]
            return (
                "conflicting duplicate: the same unit, metric and period has different values ("
                + "; ".join(entries)
                + "); keep one row"
            )
        entries = [
            f"{src} ({r} records from line {ln}): {v:g}" if r else f"{src} line {ln}: {v:g}"
            for src, ln, v, r in zip(
                group["source"], group["line"], group["v"], group["records"], strict=True
            )
        ]
        return (
            "conflicting sources: the same unit, metric and period comes from more than one "
            "source (" + "; ".join(entries) + "); give each metric and unit one source"
        )

    reasons = sub.groupby("k", sort=False)[["source", "line", "v", "records"]].apply(listing)
    ids = np.array(hierarchy.ids, dtype=object)[hierarchy.at_level(hierarchy.capture_level)]
    labels = {int(p): format_period(int(p), kind) for p in np.unique(period[rows])}
    return pd.DataFrame(
        {
            "source": sub["source"].to_numpy(dtype=object),
            "line": lines,
            "unit": ids[unit[rows]],
            "metric": np.array(codes, dtype=object)[metric[rows]],
            "period": [labels[int(p)] for p in period[rows]],
            "value": [_number_text(v) for v in value[rows]],
            "reason": sub["k"].map(reasons).to_numpy(dtype=object).astype(str),
            "_part": sub["part"].to_numpy(),
        }
    )


def _number_text(value: float) -> str:
    return "" if np.isnan(value) else np.format_float_positional(value, trim="-")


def _sorted_rejects(parts: list[Checked], conflicts: pd.DataFrame) -> pd.DataFrame:
    """Every reject, in source order and then by line (rows of one line keep their order)."""
    frames = [p.rejects.assign(_part=i) for i, p in enumerate(parts) if len(p.rejects)]
    if len(conflicts):
        frames.append(conflicts)
    if not frames:
        first = parts[0].rejects if parts else None
        if first is not None:
            return first.iloc[:0].reset_index(drop=True)
        return pd.DataFrame(columns=list(REJECT_COLUMNS))
    rejects = pd.concat(frames, ignore_index=True)
    rejects = rejects.sort_values(["_part", "line"], kind="stable")
    return rejects.drop(columns="_part").reset_index(drop=True)


def _csv_line_index(path: Path, rows: int) -> pd.Index:
    """File line of each data row (header = 1), counting the empty lines the reader skips."""
    data = path.read_bytes()
    if data[:1] in {b"\n", b"\r"} or b"\n\n" in data or b"\r\n\r\n" in data:
        lines = [n for n, text in enumerate(data.splitlines(), start=1) if text]
        if len(lines) > rows:
            return pd.Index(lines[1 : rows + 1], name="line")
    return pd.RangeIndex(2, rows + 2, name="line")


def _text(column: pd.Series) -> np.ndarray:
    """Stripped text of each cell; a missing cell (NULL, None, NaN) is empty text."""
    return column.astype(str).str.strip().fillna("").to_numpy(dtype=object)


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


def _parse_values(
    column: pd.Series,
) -> tuple[np.ndarray, np.ndarray, Callable[[np.ndarray], np.ndarray]]:
    """(number per row or NaN, the cell is empty, ``shown(rows)``: the values as written).

    A text column is parsed once per distinct value. A numeric column (Parquet, SQL) is
    shown as a CSV would write it: 3, not 3.0; a missing number is an empty cell.
    """
    if pd.api.types.is_numeric_dtype(column):
        value = np.array(column.to_numpy(dtype=float, na_value=np.nan))

        def shown_number(rows: np.ndarray) -> np.ndarray:
            return np.array([_number_text(v) for v in value[rows]], dtype=object)

        return value, np.isnan(value), shown_number
    codes, labels = distinct_labels(column)
    parsed = np.array(pd.to_numeric(pd.Series(labels), errors="coerce"), dtype=float)
    parsed[~np.isfinite(parsed)] = np.nan

    def shown_text(rows: np.ndarray) -> np.ndarray:
        return labels[codes[rows]]

    return parsed[codes], (labels == "")[codes], shown_text


def _conflict_reasons(keys: pd.DataFrame, conflicting: np.ndarray, lines: np.ndarray) -> np.ndarray:
    """The conflict reasons of one frame (kept for bench/proposal_loading.py)."""
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
    # one block [metrics x units x periods], one scatter; each metric is a contiguous view
    block = np.full((len(codes), len(capture), len(periods)), np.nan)
    block[metrics, rows, cols] = values
    dense = {code: block[m] for m, code in enumerate(codes)}
    return Dataset(hierarchy, kind, periods, capture, dense)
