"""Stage 3: run every declared check at its levels for one period and list the alerts.

A check whose inputs are missing for a unit and period does not apply there; ``when``
must hold (missing counts as not holding); "outside" is strict. Each alert carries the
value, what was expected, the limits, a score (how far outside; larger is worse) and a
short human sentence in ``detail``.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np
import pandas as pd

from digest import expressions
from digest.bands import BandArrays
from digest.config import (
    BandCheck,
    BoundsCheck,
    Check,
    Config,
    DropoutCheck,
    RelationCheck,
    SilenceCheck,
)
from digest.hierarchy import Hierarchy
from digest.rollup import LevelData

ALERT_COLUMNS = (
    "check",
    "kind",
    "unit",
    "unit_name",
    "level",
    "period",
    "value",
    "expected",
    "low",
    "high",
    "severity",
    "programme",
    "detail",
)
EXTRA_COLUMNS = (
    "unit_index",
    "score",
    "metric",
    "metric_label",
    "band",
    "advice",
    "children_reported",
    "children_expected",
)


@dataclass(frozen=True)
class Context:
    """What every check needs to look at one level in one period."""

    config: Config
    hierarchy: Hierarchy
    level: LevelData
    bands: dict[tuple[str, str], BandArrays]
    column: int
    period: str
    child_word: str  # e.g. "facilities"

    def values(self, col: int | None = None) -> dict[str, np.ndarray]:
        c = self.column if col is None else col
        return {code: totals.values[:, c] for code, totals in self.level.metrics.items()}

    def label(self, code: str) -> str:
        return self.config.metric_labels.get(code, code)


@dataclass
class Found:
    """Alerts of one check at one level, as parallel arrays over the flagged units."""

    rows: np.ndarray  # row positions within the level
    value: np.ndarray
    expected: np.ndarray
    low: np.ndarray
    high: np.ndarray
    score: np.ndarray
    detail: list[str]
    metric: str = ""
    band: str = ""


def evaluate(
    config: Config,
    hierarchy: Hierarchy,
    levels: dict[str, LevelData],
    bands: dict[tuple[str, str], BandArrays],
    column: int,
    period: str,
) -> pd.DataFrame:
    """Stage 3: every check at each of its levels for the period at ``column``."""
    records: list[pd.DataFrame] = []
    for check in config.check:
        for level_name in check.levels:
            context = Context(
                config,
                hierarchy,
                levels[level_name],
                bands,
                column,
                period,
                _child_word(hierarchy, level_name),
            )
            found = _apply_when(check, context, KINDS[check.kind](check, context))
            if len(found.rows):
                records.append(_frame(check, context, found))
    if not records:
        return pd.DataFrame(columns=[*ALERT_COLUMNS, *EXTRA_COLUMNS])
    return sort_alerts(pd.concat(records, ignore_index=True))


def sort_alerts(alerts: pd.DataFrame) -> pd.DataFrame:
    """Worst first: severity, then score, then unit and check name."""
    from digest.config import SEVERITY_RANK

    rank = alerts["severity"].map(SEVERITY_RANK)
    order = (
        alerts.assign(_rank=rank, _score=-alerts["score"].astype(float))
        .sort_values(["_rank", "_score", "unit", "check"], kind="stable")
        .drop(columns=["_rank", "_score"])
    )
    return order.reset_index(drop=True)


# ---- the check kinds -----------------------------------------------------------------


def band_check(check: BandCheck, ctx: Context) -> Found:
    band_cfg = ctx.config.band_named(check.band)
    arrays = ctx.bands[(check.band, ctx.level.level)]
    c = ctx.column
    value = ctx.level.metrics[band_cfg.metric].values[:, c]
    centre, spread = arrays.centre[:, c], arrays.spread[:, c]
    low, high = arrays.low[:, c], arrays.high[:, c]
    outside = ~np.isnan(centre) & ~np.isnan(value) & ((value > high) | (value < low))
    rows = np.flatnonzero(outside)
    with np.errstate(divide="ignore", invalid="ignore"):
        score = np.abs(value[rows] - centre[rows]) / spread[rows]
    label = ctx.label(band_cfg.metric)
    detail = [
        f"{label}: {fmt(v)} is {'above' if v > h else 'below'} the expected range "
        f"{fmt(lo)}–{fmt(h)} (usual level {fmt(m)}, learned from {n} past values"
        f"{_times_usual(v, m)})"
        for v, lo, h, m, n in zip(
            value[rows], low[rows], high[rows], centre[rows], arrays.points[rows, c], strict=True
        )
    ]
    return Found(
        rows,
        value[rows],
        centre[rows],
        low[rows],
        high[rows],
        score,
        detail,
        metric=band_cfg.metric,
        band=check.band,
    )


def bounds_check(check: BoundsCheck, ctx: Context) -> Found:
    expr = expressions.parse(check.expr)
    value = _full(expr.evaluate(ctx.values()), len(ctx.level.units))
    lo = -np.inf if check.low is None else check.low
    hi = np.inf if check.high is None else check.high
    outside = ~np.isnan(value) & ((value < lo) | (value > hi))
    rows = np.flatnonzero(outside)
    v = value[rows]
    limit = np.where(v > hi, hi, lo)
    score = np.abs(v - limit) / np.maximum(np.abs(limit), 1.0)
    detail = [
        f"{check.expr} = {fmt(x)}, {'above the upper' if x > hi else 'below the lower'} "
        f"limit {fmt(hi if x > hi else lo)}"
        for x in v
    ]
    return Found(
        rows,
        v,
        np.full(len(rows), np.nan),
        np.full(len(rows), _num(check.low)),
        np.full(len(rows), _num(check.high)),
        score,
        detail,
        metric=_primary(check.expr, ctx),
    )


def dropout_check(check: DropoutCheck, ctx: Context) -> Found:
    first = ctx.level.metrics[check.first].values[:, ctx.column]
    last = ctx.level.metrics[check.last].values[:, ctx.column]
    with np.errstate(divide="ignore", invalid="ignore"):
        # multiply before dividing: exact for counts, so 7 of 50 is 14.0 %, not 14.000000000000002
        dropout = np.where(first > 0, (first - last) * 100.0 / first, np.nan)
    lo = -np.inf if check.low is None else check.low
    hi = np.inf if check.high is None else check.high
    outside = ~np.isnan(dropout) & ((dropout < lo) | (dropout > hi))
    rows = np.flatnonzero(outside)
    d = dropout[rows]
    limit = np.where(d > hi, hi, lo)
    score = np.abs(d - limit) / 10.0
    detail = [
        f"dropout from {ctx.label(check.first)} ({fmt(f)}) to {ctx.label(check.last)} "
        f"({fmt(la)}) is {x:.1f} %, "
        + (f"above {fmt(hi)} %" if x > hi else f"below {fmt(lo)} %")
        + (" (more last doses than first doses)" if x < 0 else "")
        for x, f, la in zip(d, first[rows], last[rows], strict=True)
    ]
    return Found(
        rows,
        d,
        np.full(len(rows), np.nan),
        np.full(len(rows), _num(check.low)),
        np.full(len(rows), _num(check.high)),
        score,
        detail,
        metric=check.first,
    )


def relation_check(check: RelationCheck, ctx: Context) -> Found:
    expr = expressions.parse(check.expr)
    values = ctx.values()
    holds = _full(expr.evaluate(values), len(ctx.level.units))
    rows = np.flatnonzero(holds == 0.0)
    sides = expr.comparison
    n = len(rows)
    if sides is None:
        left = right = np.full(n, np.nan)
        detail = [f"{check.expr} does not hold" for _ in rows]
    else:
        left = _full(expressions.parse(sides[0]).evaluate(values), len(holds))[rows]
        right = _full(expressions.parse(sides[1]).evaluate(values), len(holds))[rows]
        detail = [
            f"{_describe(sides[0], ctx)} = {fmt(a)} but {_describe(sides[1], ctx)} = {fmt(b)}; "
            f"expected {check.expr}"
            for a, b in zip(left, right, strict=True)
        ]
    with np.errstate(divide="ignore", invalid="ignore"):
        score = np.abs(left - right) / np.maximum(np.abs(right), 1.0)
    score = np.where(np.isnan(score), 1.0, score)
    return Found(
        rows,
        left,
        right,
        np.full(n, np.nan),
        np.full(n, np.nan),
        score,
        detail,
        metric=_primary(check.expr, ctx),
    )


def silence_check(check: SilenceCheck, ctx: Context) -> Found:
    c = ctx.column
    totals = ctx.level.metrics[check.metric]
    recent_start = c - check.periods + 1
    history_start = recent_start - check.window
    if history_start < 0:
        return _nothing()
    reported = ~np.isnan(totals.values)
    recent = reported[:, recent_start : c + 1].sum(axis=1)
    history = reported[:, history_start:recent_start].sum(axis=1)
    still_open = ctx.level.expected[:, c] > 0
    rows = np.flatnonzero((recent == 0) & (history >= check.min_history) & still_open)
    past = totals.values[rows, history_start:recent_start]
    with np.errstate(invalid="ignore"):
        usual = np.nanmean(past, axis=1) if len(rows) else np.array([])
    word = "months" if ctx.config.data.period == "month" else "weeks"
    detail = [
        f"no {ctx.label(check.metric)} reported for the last {check.periods} {word}; "
        f"reported in {h} of the {check.window} {word} before (usual level {fmt(u)})"
        for h, u in zip(history[rows], usual, strict=True)
    ]
    n = len(rows)
    score = history[rows] / check.window
    return Found(
        rows,
        np.full(n, np.nan),
        usual,
        np.full(n, np.nan),
        np.full(n, np.nan),
        score.astype(float),
        detail,
        metric=check.metric,
    )


KINDS: dict[str, Callable[..., Found]] = {
    "band": band_check,
    "bounds": bounds_check,
    "dropout": dropout_check,
    "relation": relation_check,
    "silence": silence_check,
}


# ---- helpers --------------------------------------------------------------------------


def _apply_when(check: Check, ctx: Context, found: Found) -> Found:
    if check.when is None or not len(found.rows):
        return found
    holds = _full(expressions.parse(check.when).evaluate(ctx.values()), len(ctx.level.units))
    keep = holds[found.rows] == 1.0
    return Found(
        found.rows[keep],
        found.value[keep],
        found.expected[keep],
        found.low[keep],
        found.high[keep],
        found.score[keep],
        [d for d, k in zip(found.detail, keep, strict=True) if k],
        found.metric,
        found.band,
    )


def _frame(check: Check, ctx: Context, found: Found) -> pd.DataFrame:
    units = ctx.level.units[found.rows]
    h = ctx.hierarchy
    at_capture = ctx.level.level == h.capture_level
    children_reported = np.full(len(units), np.nan)
    children_expected = np.full(len(units), np.nan)
    detail = list(found.detail)
    if not at_capture and found.metric:
        children_reported = ctx.level.metrics[found.metric].reported[found.rows, ctx.column]
        children_expected = ctx.level.expected[found.rows, ctx.column]
        detail = [
            f"{d}; {r} of {e} {ctx.child_word} reported"
            for d, r, e in zip(detail, children_reported, children_expected, strict=True)
        ]
    return pd.DataFrame(
        {
            "check": check.name,
            "kind": check.kind,
            "unit": [h.ids[u] for u in units],
            "unit_name": [h.names[u] for u in units],
            "level": ctx.level.level,
            "period": ctx.period,
            "value": found.value,
            "expected": found.expected,
            "low": found.low,
            "high": found.high,
            "severity": check.severity,
            "programme": check.programme,
            "detail": detail,
            "unit_index": units,
            "score": found.score.astype(float),
            "metric": found.metric,
            "metric_label": ctx.label(found.metric) if found.metric else "",
            "band": found.band,
            "advice": check.advice or "",
            "children_reported": children_reported.astype(float),
            "children_expected": children_expected.astype(float),
        }
    )


def _nothing() -> Found:
    empty = np.array([], dtype=float)
    return Found(np.array([], dtype=np.int64), empty, empty, empty, empty, empty, [])


def _full(result: np.ndarray, n: int) -> np.ndarray:
    return np.broadcast_to(np.asarray(result, dtype=float), (n,)).copy()


def _num(x: float | None) -> float:
    return np.nan if x is None else float(x)


def _primary(text: str, ctx: Context) -> str:
    """The first metric code named in an expression (its children's reporting is shown)."""
    for name in _names_in_order(text):
        if name in ctx.level.metrics:
            return name
    return ""


def _names_in_order(text: str) -> Iterator[str]:
    yield from re.findall(r"[A-Za-z_][A-Za-z0-9_]*", text)


def _describe(side: str, ctx: Context) -> str:
    return ctx.label(side) if side in ctx.level.metrics else side


def _child_word(hierarchy: Hierarchy, level: str) -> str:
    index = hierarchy.levels.index(level)
    if index + 1 >= len(hierarchy.levels):
        return ""
    child = hierarchy.levels[index + 1]
    return _plural(child)


def _plural(word: str) -> str:
    if word.endswith("y") and word[-2:-1] not in "aeiou":
        return word[:-1] + "ies"
    return word + ("es" if word.endswith(("s", "x", "ch", "sh")) else "s")


def _times_usual(value: float, centre: float) -> str:
    if centre > 0 and value / centre >= 2:
        return f"; {value / centre:.1f}× the usual level"
    return ""


def fmt(x: float) -> str:
    """Integers without decimals, other numbers with one; missing as an en dash."""
    if x is None or (isinstance(x, float) and np.isnan(x)):
        return "–"
    x = float(x)
    if np.isinf(x):
        return "∞" if x > 0 else "-∞"
    return f"{x:,.0f}" if abs(x - round(x)) < 1e-9 else f"{x:,.1f}"
