"""Prototype of a faster ``digest.loading.build_dataset`` (not used by digest).

The current loader turns every column of the ~9 M rows into Python ``str`` objects
(``_text``), parses the value text with ``pd.to_numeric`` row by row, looks each row's
unit up in a pandas Index, keeps one reason *string* per row, finds duplicates with
``DataFrame.duplicated`` on three columns and fills the dense arrays with one full boolean
scan per metric. This prototype keeps the same rules and messages but:

* reads into an Arrow table and never builds per-row Python objects: each text column is
  dictionary-encoded in Arrow (C++), and stripping, id lookup, period parsing and value
  parsing (``pd.to_numeric`` exactly as before) run on the *distinct* labels only
  (10,000 units, 20 metrics, 48 periods, ~100,000 distinct values), then are spread back
  to the rows with a ``take``;
* keeps a small integer reason code per row, and builds reason text only for rejected rows;
* finds duplicate (unit, metric, period) keys by counting one integer key per row
  (``np.bincount`` over the dense grid) and only sorts the rows that share a key;
* fills one [metrics x units x periods] block with a single scatter.

Known differences: a null cell (possible in Parquet) is read as empty text here, where
``astype(str)`` gives "None"/"nan"/"<NA>" in the current loader. ``bench/loading_check.py``
compares both loaders on the benchmark data and on a small file with every kind of bad row.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from digest.config import Config
from digest.errors import DataError
from digest.hierarchy import Hierarchy
from digest.loading import (
    REJECT_COLUMNS,
    VALUE_COLUMNS,
    Dataset,
    Loaded,
    LoadStats,
    _conflict_reasons,
)
from digest.periods import parse_period


def read_values_table(path: Path) -> pa.Table:
    """As ``read_values_file`` but keeps the Arrow table (no pandas conversion)."""
    if not path.exists():
        raise DataError(f"{path}: file not found; check [data] values in the config")
    if path.suffix.lower() in {".parquet", ".pq"}:
        text = [
            f.name
            for f in pq.read_schema(path)
            if f.name in VALUE_COLUMNS
            and (pa.types.is_string(f.type) or pa.types.is_large_string(f.type))
        ]
        table = pq.read_table(path, read_dictionary=text)  # Parquet stores them as dictionaries
    else:
        options = pacsv.ConvertOptions(
            column_types={c: pa.string() for c in (*VALUE_COLUMNS, "reported_at")},
            strings_can_be_null=False,
        )
        try:
            table = pacsv.read_csv(path, convert_options=options)
        except pa.ArrowInvalid as exc:
            raise DataError(f"{path}: cannot read as CSV: {exc}") from None
    missing = [c for c in VALUE_COLUMNS if c not in table.column_names]
    if missing:
        raise DataError(
            f"{path}: missing column(s) {', '.join(missing)}; "
            "values need the header unit,metric,period,value[,reported_at]"
        )
    return table


def load_values_fast(config: Config, hierarchy: Hierarchy) -> Loaded:
    """As ``digest.loading.load_values``, with the prototype reader and builder."""
    path = config.data.values
    loaded = build_dataset_fast(read_values_table(path), str(path), config, hierarchy)
    share = loaded.stats.reject_share
    if share > config.data.max_reject_share:
        raise DataError(
            f"{path}: {loaded.stats.rows_rejected} of {loaded.stats.rows_read} rows rejected "
            f"({share:.1%}), more than max_reject_share = {config.data.max_reject_share:.1%}; "
            "see rejects.csv for each row and its reason"
        )
    return loaded


def _encode(column: pa.ChunkedArray) -> tuple[np.ndarray, np.ndarray]:
    """(codes per row, stripped text of each distinct label); null reads as ''."""
    if not pa.types.is_dictionary(column.type):
        column = pc.dictionary_encode(column.cast(pa.string()))
    encoded = column.unify_dictionaries().combine_chunks()
    labels = np.array(
        [s.strip() for s in encoded.dictionary.cast(pa.string()).to_pylist()] + [""],
        dtype=object,
    )
    codes = encoded.indices.fill_null(len(labels) - 1).to_numpy(zero_copy_only=False)
    return codes.astype(np.int64, copy=False), labels


class _Reasons:
    """One small int per row instead of one string; the first reason given wins."""

    def __init__(self, n: int) -> None:
        self.code = np.zeros(n, dtype=np.uint8)
        self.texts = [""]

    def mark(self, mask: np.ndarray, why: str) -> None:
        if why not in self.texts:
            self.texts.append(why)
        self.code[mask & (self.code == 0)] = self.texts.index(why)


def build_dataset_fast(
    table: pa.Table, source: str, config: Config, hierarchy: Hierarchy
) -> Loaded:
    kind = config.data.period
    n = table.num_rows
    capture = hierarchy.at_level(hierarchy.capture_level)
    reasons = _Reasons(n)

    unit_codes, unit_labels = _encode(table["unit"])
    label_unit = pd.Index(hierarchy.ids).get_indexer(unit_labels.astype(str))
    row_of_unit = np.full(hierarchy.size, -1, dtype=np.int64)
    row_of_unit[capture] = np.arange(len(capture))
    label_row = np.where(label_unit >= 0, row_of_unit[np.maximum(label_unit, 0)], -1)
    unit_all = label_unit[unit_codes]
    unit_row = label_row[unit_codes]
    reasons.mark(unit_all < 0, "unknown unit; add it to units.csv or fix the id")
    reasons.mark(
        (unit_all >= 0) & (unit_row < 0),
        f"unit is not a {hierarchy.capture_level}; values are captured at that level only",
    )

    raw_codes = [m.code for m in config.metric]
    derived_codes = {d.code for d in config.derived}
    metric_codes, metric_labels = _encode(table["metric"])
    label_metric = pd.Index(raw_codes).get_indexer(metric_labels.astype(str))
    label_derived = np.array([m in derived_codes for m in metric_labels], dtype=bool)
    metric_idx = label_metric[metric_codes]
    is_derived = label_derived[metric_codes]
    reasons.mark(is_derived, "metric is derived and computed by the tool; leave it out")
    reasons.mark((metric_idx < 0) & ~is_derived, "unknown metric; declare it under [[metric]]")

    period_codes, period_labels = _encode(table["period"])
    label_ordinal = np.zeros(len(period_labels), dtype=np.int64)
    label_bad = np.zeros(len(period_labels), dtype=bool)
    for i, label in enumerate(period_labels):
        try:
            label_ordinal[i] = parse_period(str(label), kind)
        except ValueError:
            label_bad[i] = True
    ordinal = label_ordinal[period_codes]
    expected = "an ISO month like 2026-10" if kind == "month" else "an ISO week like 2026-W42"
    reasons.mark(label_bad[period_codes], f"period cannot be read; expected {expected}")

    value_column = table["value"]
    if pa.types.is_integer(value_column.type) or pa.types.is_floating(value_column.type):
        # as in the current loader: NaN/null reads as empty text, inf stays a number
        value = value_column.cast(pa.float64()).to_numpy().copy()
        value_codes = value_labels = None
        empty = np.isnan(value)
    else:
        value_codes, value_labels = _encode(value_column)
        parsed = np.array(pd.to_numeric(pd.Series(value_labels), errors="coerce"), dtype=float)
        parsed[~np.isfinite(parsed)] = np.nan
        value = parsed[value_codes]
        empty = (value_labels == "")[value_codes]
    reasons.mark(np.isnan(value) & empty, "value is empty; leave out a missing report")
    reasons.mark(np.isnan(value) & ~empty, "value is not a number")
    counts = np.array([m.count for m in config.metric] + [False])
    is_count = counts[np.where(metric_idx >= 0, metric_idx, len(raw_codes))]
    reasons.mark(is_count & (value < 0), "negative count; counts cannot be below 0")

    valid = np.flatnonzero(reasons.code == 0)
    if len(valid):
        first = int(ordinal[valid].min())
        periods = np.arange(first, int(ordinal[valid].max()) + 1)
    else:
        first, periods = 0, np.array([], dtype=np.int64)
    n_units, n_metrics, n_periods = len(capture), len(raw_codes), len(periods)
    key = (metric_idx[valid] * n_units + unit_row[valid]) * n_periods + (ordinal[valid] - first)
    collapsed = np.zeros(len(valid), dtype=bool)
    conflicting = np.zeros(len(valid), dtype=bool)
    seen = np.bincount(key, minlength=n_units * n_metrics * n_periods)
    if len(valid) and seen.max() > 1:
        shared = np.flatnonzero(seen[key] > 1)  # rows (positions in valid) sharing a key
        order = shared[np.argsort(key[shared], kind="stable")]
        k, v = key[order], value[valid][order]
        starts = np.flatnonzero(np.r_[True, k[1:] != k[:-1]])
        group = np.repeat(np.arange(len(starts)), np.diff(np.r_[starts, len(k)]))
        differs = np.zeros(len(starts), dtype=bool)
        np.logical_or.at(differs, group, v != v[starts][group])
        conflicting[order] = differs[group]
        later = np.r_[False, k[1:] == k[:-1]]
        collapsed[order] = later & ~differs[group]
    lines = valid + 2
    if conflicting.any():
        keys = pd.DataFrame(
            {
                "u": unit_row[valid],
                "m": metric_idx[valid],
                "p": ordinal[valid],
                "v": value[valid],
            }
        )
        conflict_text = _conflict_reasons(keys, conflicting, lines)
    else:
        conflict_text = np.array([], dtype=object)

    kept = ~conflicting & ~collapsed
    keep = valid[kept]
    cube = np.full(n_metrics * n_units * n_periods, np.nan)
    cube[key[kept]] = value[keep]
    cube = cube.reshape(n_metrics, n_units, n_periods)
    if len(keep) and len(keep) < len(valid):  # periods span the kept rows only
        lo, hi = int(ordinal[keep].min()), int(ordinal[keep].max())
        if (lo, hi) != (periods[0], periods[-1]):
            cube = np.ascontiguousarray(cube[:, :, lo - first : hi - first + 1])
            periods = np.arange(lo, hi + 1)
    elif not len(keep):
        cube, periods = cube[:, :, :0], periods[:0]
    dense = {code: cube[m] for m, code in enumerate(raw_codes)}

    rejected = reasons.code != 0
    rejected[valid[conflicting]] = True
    rejected_rows = np.flatnonzero(rejected)
    reason_text = np.array(reasons.texts, dtype=object)[reasons.code[rejected_rows]]
    if conflicting.any():
        at = np.searchsorted(rejected_rows, valid[conflicting])
        reason_text[at] = conflict_text
    if value_codes is not None and value_labels is not None:
        value_text = value_labels[value_codes[rejected_rows]]
    else:
        picked = pd.Series(table["value"].take(pa.array(rejected_rows)).to_pandas())
        value_text = np.where(
            picked.isna().to_numpy(), "", picked.astype(str).to_numpy(dtype=object)
        ).astype(object)
    rejects = pd.DataFrame(
        {
            "source": source,
            "line": rejected_rows + 2,
            "unit": unit_labels[unit_codes[rejected_rows]],
            "metric": metric_labels[metric_codes[rejected_rows]],
            "period": period_labels[period_codes[rejected_rows]],
            "value": value_text,
            "reason": reason_text.astype(str),
        },
        columns=list(REJECT_COLUMNS),
    )
    stats = LoadStats(
        rows_read=n,
        rows_rejected=len(rejected_rows),
        duplicates_collapsed=int(collapsed.sum()),
        rows_loaded=len(keep),
    )
    dataset = Dataset(hierarchy, kind, periods, capture, dense)
    return Loaded(dataset, rejects, stats)
