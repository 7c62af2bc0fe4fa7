"""Stage 3: run every declared check at its levels for one period and list the alerts.

A check whose inputs are missing for a unit and period does not apply there; ``when``
must hold (missing counts as not holding); "outside" is strict. Each alert carries the
value, what was expected, the limits, a score (how far outside; larger is worse) and a
short human sentence in ``detail``.

On totals (levels above the capture level) two more things are said:

- a ``band`` alert names the children that made most of the excess (or shortfall): each
  child's value minus its own centre, ranked, up to three in ``contributors``;
- a ``band`` drop or a ``bounds`` alert whose children reported below the check's
  ``min_completeness`` (default 80 %) is labelled ``reporting_gap``.

``test = "binomial"`` on ``bounds`` (a share: numerator / denominator) and ``dropout``
alerts only when the share's Wilson score interval lies entirely outside the limits, so
that 3 of 5 does not alarm the way 120 of 200 does.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy.stats import norm

from digest import expressions
from digest.bands import METHODS, BandArrays
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
from digest.periods import parse_period
from digest.rollup import LevelData, level_totals

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
    "contributors",
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
    "reporting_gap",
)
TOP_CONTRIBUTORS = 3  # children named in ``contributors``
NAMED_SHARE = 0.10  # in ``detail``, children after the first only with at least this share


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
    levels: Mapping[str, LevelData] = field(default_factory=dict)  # every level, for drill-down
    periods: np.ndarray | None = None  # period ordinals of the columns, when known
    cache: dict[Any, Any] = field(default_factory=dict)  # child centres learned on the fly

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
    contributors: list[str] | None = None  # per row: the children behind a total's excess
    gap_possible: np.ndarray | None = None  # per row: could missing reports explain it?

    def take(self, keep: np.ndarray) -> Found:
        """The rows where ``keep`` (bool, one per row) holds."""
        return Found(
            self.rows[keep],
            self.value[keep],
            self.expected[keep],
            self.low[keep],
            self.high[keep],
            self.score[keep],
            [d for d, k in zip(self.detail, keep, strict=True) if k],
            self.metric,
            self.band,
            None
            if self.contributors is None
            else [c for c, k in zip(self.contributors, keep, strict=True) if k],
            None if self.gap_possible is None else self.gap_possible[keep],
        )


def evaluate(
    config: Config,
    hierarchy: Hierarchy,
    levels: dict[str, LevelData],
    bands: dict[tuple[str, str], BandArrays],
    column: int,
    period: str,
    *,
    periods: np.ndarray | None = None,
    cache: dict[Any, Any] | None = None,
) -> pd.DataFrame:
    """Stage 3: every check at each of its levels for the period at ``column``.

    ``periods`` (the period ordinals of the columns) and ``cache`` (a dict kept between
    calls with the same bands, e.g. by a backtest) are optional; they only matter when a
    total's children need a band that was not learned at their level.
    """
    if periods is None:
        periods = _periods_from_label(period, column, config, levels)
    cache = {} if cache is None else cache
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
                levels,
                periods,
                cache,
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
    said, listed = _drill_down(check.band, ctx, rows, value[rows], centre[rows])
    detail = [
        f"{label}: {fmt(v)} is {'above' if v > h else 'below'} the expected range "
        f"{fmt(lo)}–{fmt(h)} (usual level {fmt(m)}, learned from {n} past values"
        f"{_times_usual(v, m)}){more}"
        for v, lo, h, m, n, more in zip(
            value[rows],
            low[rows],
            high[rows],
            centre[rows],
            arrays.points[rows, c],
            said,
            strict=True,
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
        contributors=listed,
        gap_possible=value[rows] < low[rows],  # missing reports can only lower a total
    )


def bounds_check(check: BoundsCheck, ctx: Context) -> Found:
    text = check.value_expr
    values = ctx.values()
    n_units = len(ctx.level.units)
    lo = -np.inf if check.low is None else check.low
    hi = np.inf if check.high is None else check.high
    if check.numerator is not None and check.denominator is not None:
        num = _full(expressions.parse(check.numerator).evaluate(values), n_units)
        den = _full(expressions.parse(check.denominator).evaluate(values), n_units)
        with np.errstate(divide="ignore", invalid="ignore"):
            # multiply before dividing: exact for counts (120 of 200 is 60.0 %)
            value = np.where(den != 0, num * 100.0 / den, np.nan)
    else:
        num = den = np.full(n_units, np.nan)
        value = _full(expressions.parse(text).evaluate(values), n_units)
    plain = ~np.isnan(value) & ((value < lo) | (value > hi))
    binomial = np.zeros(n_units, dtype=bool)
    if check.test == "binomial":  # only a proper share: 0 <= numerator <= denominator
        binomial = (den > 0) & (num >= 0) & (num <= den)
    ci_low, ci_high = wilson_interval(
        np.where(binomial, num, 0.0), np.where(binomial, den, 1.0), check.confidence
    )
    ci_low, ci_high = ci_low * 100.0, ci_high * 100.0
    outside = np.where(binomial, (ci_low > hi) | (ci_high < lo), plain)
    rows = np.flatnonzero(outside)
    v = value[rows]
    limit = np.where(v > hi, hi, lo)
    nearest = np.where(v > hi, ci_low[rows], ci_high[rows])
    gap = np.where(binomial[rows], nearest, v)  # how far the (interval) is beyond the limit
    score = np.abs(gap - limit) / np.maximum(np.abs(limit), 1.0)
    detail = []
    for r, x in zip(rows, v, strict=True):
        above = x > hi
        if binomial[r]:
            detail.append(
                f"{_describe(check.numerator or '', ctx)}: {fmt(x)} % of {fmt(den[r])}, "
                f"{'above' if above else 'below'} {fmt(hi if above else lo)} % with "
                f"{_percent(check.confidence)} confidence (Wilson interval "
                f"{ci_low[r]:.1f}–{ci_high[r]:.1f} %)"
            )
        else:
            detail.append(
                f"{_describe(text, ctx)} = {fmt(x)}, {'above the upper' if above else 'below the lower'} "
                f"limit {fmt(hi if above else lo)}"
                + (
                    " (numerator above denominator: not a share)"
                    if check.test == "binomial" and num[r] > den[r]
                    else ""
                )
            )
    # a single summed metric can only fall through missing reports; a ratio either way
    total = text.strip() in ctx.level.metrics
    return Found(
        rows,
        v,
        np.full(len(rows), np.nan),
        np.full(len(rows), _num(check.low)),
        np.full(len(rows), _num(check.high)),
        score,
        detail,
        metric=_primary(text, ctx),
        gap_possible=(v < lo) if total else np.ones(len(rows), dtype=bool),
    )


def dropout_check(check: DropoutCheck, ctx: Context) -> Found:
    first = ctx.level.metrics[check.first].values[:, ctx.column]
    last = ctx.level.metrics[check.last].values[:, ctx.column]
    with np.errstate(divide="ignore", invalid="ignore"):
        # multiply before dividing: exact for counts, so 7 of 50 is 14.0 %, not 14.000000000000002
        dropout = np.where(first > 0, (first - last) * 100.0 / first, np.nan)
    lo = -np.inf if check.low is None else check.low
    hi = np.inf if check.high is None else check.high
    plain = ~np.isnan(dropout) & ((dropout < lo) | (dropout > hi))
    binomial = np.zeros(len(first), dtype=bool)
    if check.test == "binomial":  # the share of non-completers; negative dropout stays plain
        binomial = (first > 0) & (last >= 0) & (last <= first)
    ci_low, ci_high = wilson_interval(
        np.where(binomial, first - last, 0.0), np.where(binomial, first, 1.0), check.confidence
    )
    ci_low, ci_high = ci_low * 100.0, ci_high * 100.0
    outside = np.where(binomial, (ci_low > hi) | (ci_high < lo), plain)
    rows = np.flatnonzero(outside)
    d = dropout[rows]
    limit = np.where(d > hi, hi, lo)
    nearest = np.where(binomial[rows], np.where(d > hi, ci_low[rows], ci_high[rows]), d)
    score = np.abs(nearest - limit) / 10.0
    detail = [
        f"dropout from {ctx.label(check.first)} ({fmt(f)}) to {ctx.label(check.last)} "
        f"({fmt(la)}) is {x:.1f} %, "
        + (f"above {fmt(hi)} %" if x > hi else f"below {fmt(lo)} %")
        + (
            f" with {_percent(check.confidence)} confidence (Wilson interval "
            f"{ci_low[r]:.1f}–{ci_high[r]:.1f} %)"
            if binomial[r]
            else ""
        )
        + (" (more last doses than first doses)" if x < 0 else "")
        for r, x, f, la in zip(rows, d, first[rows], last[rows], strict=True)
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
    return found.take(holds[found.rows] == 1.0)


def _frame(check: Check, ctx: Context, found: Found) -> pd.DataFrame:
    units = ctx.level.units[found.rows]
    h = ctx.hierarchy
    at_capture = ctx.level.level == h.capture_level
    children_reported = np.full(len(units), np.nan)
    children_expected = np.full(len(units), np.nan)
    gap = np.zeros(len(units), dtype=bool)
    detail = list(found.detail)
    if not at_capture and found.metric:
        children_reported = ctx.level.metrics[found.metric].reported[found.rows, ctx.column]
        children_expected = ctx.level.expected[found.rows, ctx.column]
        gap = reporting_gap(
            children_reported,
            children_expected,
            getattr(check, "min_completeness", None),
            found.gap_possible,
        )
        detail = [
            f"Probably a reporting gap ({r} of {e} {ctx.child_word} reported): {d}"
            if g
            else f"{d}; {r} of {e} {ctx.child_word} reported"
            for d, r, e, g in zip(detail, children_reported, children_expected, gap, strict=True)
        ]
    contributors = found.contributors or [""] * len(units)
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
            "contributors": contributors,
            "unit_index": units,
            "score": found.score.astype(float),
            "metric": found.metric,
            "metric_label": ctx.label(found.metric) if found.metric else "",
            "band": found.band,
            "advice": check.advice or "",
            "children_reported": children_reported.astype(float),
            "children_expected": children_expected.astype(float),
            "reporting_gap": gap,
        }
    )


def wilson_interval(
    successes: np.ndarray | float, trials: np.ndarray | float, confidence: float = 0.99
) -> tuple[np.ndarray, np.ndarray]:
    """Two-sided Wilson score interval of the proportion successes / trials, elementwise.

    centre = (p + z²/2n) / (1 + z²/n), half-width = z / (1 + z²/n) · √(p(1 − p)/n + z²/4n²)
    with z the normal quantile of 1 − (1 − confidence)/2 (Wilson 1927); clipped to [0, 1]
    against rounding. NaN where trials is not positive.
    """
    x = np.asarray(successes, dtype=float)
    n = np.asarray(trials, dtype=float)
    z = float(norm.ppf(1.0 - (1.0 - confidence) / 2.0))
    z2 = z * z
    with np.errstate(divide="ignore", invalid="ignore"):
        n = np.where(n > 0, n, np.nan)
        p = x / n
        denominator = 1.0 + z2 / n
        centre = (p + z2 / (2.0 * n)) / denominator
        half = z / denominator * np.sqrt(p * (1.0 - p) / n + z2 / (4.0 * n * n))
    return np.clip(centre - half, 0.0, 1.0), np.clip(centre + half, 0.0, 1.0)


def reporting_gap(
    reported: np.ndarray,
    expected: np.ndarray,
    min_completeness: float | None,
    possible: np.ndarray | None = None,
) -> np.ndarray:
    """Whether fewer than ``min_completeness`` of the expected children reported.

    Completeness is reported ÷ expected (Σ received ÷ Σ expected); strict: exactly 80 %
    meets an 80 % target. ``possible`` limits the label to alerts a gap could explain.
    """
    reported = np.asarray(reported, dtype=float)
    expected = np.asarray(expected, dtype=float)
    if min_completeness is None:
        return np.zeros(reported.shape, dtype=bool)
    with np.errstate(divide="ignore", invalid="ignore"):
        gap = (expected > 0) & (reported / expected < min_completeness)
    return gap if possible is None else gap & np.asarray(possible, dtype=bool)


def _drill_down(
    band_name: str, ctx: Context, rows: np.ndarray, value: np.ndarray, centre: np.ndarray
) -> tuple[list[str], list[str]]:
    """For totals out of band: the children behind the excess, for detail and contributors.

    A child's contribution is its value minus its own centre (a child that did not report
    adds nothing to the total, so it counts as 0 minus its centre). Children pulling the
    way of the excess are ranked; a share is the child's part of their sum.
    """
    n = len(rows)
    said, listed = [""] * n, [""] * n
    h = ctx.hierarchy
    index = h.levels.index(ctx.level.level)
    if not n or index + 1 >= len(h.levels):
        return said, listed
    found = _child_series(band_name, h.levels[index + 1], ctx)
    if found is None:
        return said, listed
    child_units, child_value, child_centre = found
    if not len(child_units):
        return said, listed
    for i, (row, v, m) in enumerate(zip(rows, value, centre, strict=True)):
        kids = np.asarray(h.children.get(int(ctx.level.units[row]), []), dtype=np.int64)
        pos = np.minimum(np.searchsorted(child_units, kids), len(child_units) - 1)
        same = child_units[pos] == kids
        kids, pos = kids[same], pos[same]
        sign = 1.0 if v > m else -1.0
        missing = np.isnan(child_value[pos])
        toward = sign * (np.where(missing, 0.0, child_value[pos]) - child_centre[pos])
        usable = np.flatnonzero(~np.isnan(toward) & (toward > 0))
        if not len(usable):
            continue
        total = toward[usable].sum()
        top = usable[np.lexsort((kids[usable], -toward[usable]))][:TOP_CONTRIBUTORS]
        shares = toward[top] / total
        listed[i] = "; ".join(
            f"{h.ids[kids[j]]} {h.names[kids[j]]} {sign * toward[j]:+.0f} "
            f"({s:.0%}{', no report' if missing[j] else ''})"
            for j, s in zip(top, shares, strict=True)
        )
        named = [
            f"{h.names[kids[j]]} ({sign * toward[j]:+,.0f}, {s * 100:.0f} %"
            f"{', no report' if missing[j] else ''})"
            for k, (j, s) in enumerate(zip(top, shares, strict=True))
            if k == 0 or s >= NAMED_SHARE
        ]
        word = "excess" if sign > 0 else "shortfall"
        lead = f"most of the {word} from" if shares[0] >= 0.5 else f"the {word} mainly from"
        said[i] = f"; {lead} {', '.join(named)}"
    return said, listed


def _child_series(
    band_name: str, child_level: str, ctx: Context
) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """Child units, their values and their own centres at the evaluated column.

    The centre is the band's own at the child level when it is learned there; otherwise
    the same method and settings learn it from the children's own series.
    """
    band = ctx.config.band_named(band_name)
    h = ctx.hierarchy
    c = ctx.column
    data = ctx.levels.get(child_level)
    if data is not None and band.metric in data.metrics:
        units, series = data.units, data.metrics[band.metric].values
    else:
        capture = ctx.levels.get(h.capture_level)
        if capture is None or band.metric not in capture.metrics:
            return None
        totals = level_totals(capture.metrics[band.metric].values, h, capture.units, child_level)
        units, series = h.at_level(child_level), totals.values
    learned = ctx.bands.get((band_name, child_level))
    if learned is not None:
        return units, series[:, c], learned.centre[:, c]
    key = ("child centre", band.model_dump_json(), child_level, series.shape)
    if key not in ctx.cache:
        method = METHODS[band.method]
        ctx.cache[key] = method(
            series, band, periods=ctx.periods, kind=ctx.config.data.period
        ).centre
    return units, series[:, c], ctx.cache[key][:, c]


def _periods_from_label(
    period: str, column: int, config: Config, levels: Mapping[str, LevelData]
) -> np.ndarray | None:
    """The period ordinals of every column, from the evaluated period's label."""
    try:
        ordinal = parse_period(period, config.data.period)
    except ValueError:
        return None
    width = next(iter(levels.values())).expected.shape[1] if levels else column + 1
    return np.arange(ordinal - column, ordinal - column + width)


def _percent(share: float) -> str:
    return f"{share * 100:g} %"


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
