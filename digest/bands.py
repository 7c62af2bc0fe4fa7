"""Stage 1: learn each series' band (centre, low, high) from its own past.

A band method is a function from a [units x periods] array of one level's series and the
band's settings to :class:`BandArrays` for every period at once. Methods are registered in
:data:`METHODS` by the name used in ``[[band]] method``. Derived metrics are computed here
too, at the capture level, because bands may be learned on them.

Every method is two choices (README "Band methods" has the formulas and sources):

* the *baseline*: which past periods feed the band at period t -- the trailing ``window``
  (skipping ``gap``) or the same season of earlier years (:func:`seasonal_columns`);
* the *statistic* over the baseline values: mean and SD, median and MAD, or Poisson /
  negative-binomial quantiles.

No contamination (``exclude_flagged``, on by default): periods are learned in order, and a
value that lies outside the band learned for its own period is left out of every later
baseline, so one typo cannot widen the band that should catch the next. ``keep`` marks
values that are never left out (acknowledged as correct). A band of zero width (a flat
history) flags the first ordinary variation too; its flags raise alerts but leave
nothing out, or the band would stay flat for good.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import date
from statistics import NormalDist
from typing import NamedTuple, Protocol

import numpy as np
from scipy import special, stats

from digest import expressions
from digest.config import BandConfig, Config
from digest.loading import Dataset
from digest.periods import PeriodKind
from digest.rollup import level_totals

# 1 / Φ⁻¹(0.75) = 1.482602...: 1.4826 × MAD estimates σ for normal data, so |x − median| >
# k × 1.4826 × MAD with k = 3.5 is the modified z-score rule |0.6745 (x − median) / MAD| > 3.5
# (Iglewicz & Hoaglin 1993; NIST/SEMATECH e-Handbook §1.3.5.17).
MAD_TO_SD = 1.0 / NormalDist().inv_cdf(0.75)
# √(π/2) = 1.253314...: σ / mean absolute deviation for normal data (the MAD = 0 fallback).
MEANAD_TO_SD = math.sqrt(math.pi / 2.0)
NO_PERIOD = -1  # baseline column index that points at an all-missing column


@dataclass(frozen=True)
class BandArrays:
    """A band for every unit and period [units x periods]; NaN where no band was learned."""

    centre: np.ndarray
    spread: np.ndarray
    low: np.ndarray
    high: np.ndarray
    points: np.ndarray  # int: values the band was learned from
    method: np.ndarray  # object: which method produced each band ('' when none)
    excluded: np.ndarray | None = None  # bool: value left out of later baselines


class BandMethod(Protocol):
    def __call__(
        self,
        series: np.ndarray,
        band: BandConfig,
        *,
        periods: np.ndarray | None = None,
        kind: PeriodKind = "month",
        keep: np.ndarray | None = None,
    ) -> BandArrays: ...


# ---- the issue-2 trailing-window mean and SD ----------------------------------------------


def lagged(series: np.ndarray, lag: int) -> np.ndarray:
    """The series shifted ``lag`` periods to the right: column t holds period t - lag."""
    out = np.full(series.shape, np.nan)
    if lag < series.shape[1]:
        out[:, lag:] = series[:, : series.shape[1] - lag]
    return out


def window_stats(series: np.ndarray, window: int, gap: int) -> tuple[np.ndarray, ...]:
    """Count, mean and sample SD of the ``window`` periods before t, skipping ``gap``.

    Two passes over the lagged copies (sum, then squared deviations from the mean), so
    large counts do not lose precision the way a running sum of squares would.
    """
    lags = range(gap + 1, gap + window + 1)
    count = np.zeros(series.shape)
    total = np.zeros(series.shape)
    for lag in lags:
        past = lagged(series, lag)
        seen = ~np.isnan(past)
        count += seen
        total += np.where(seen, past, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = total / count
    squares = np.zeros(series.shape)
    for lag in lags:
        past = lagged(series, lag)
        deviation = past - mean
        squares += np.where(np.isnan(deviation), 0.0, deviation * deviation)
    with np.errstate(invalid="ignore", divide="ignore"):
        sd = np.sqrt(squares / (count - 1))
    return count, mean, sd


# ---- baselines: which past columns feed the band at each period ---------------------------


def window_columns(n_periods: int, window: int, gap: int) -> np.ndarray:
    """[periods x window] columns t-gap-window .. t-gap-1 (NO_PERIOD before the first)."""
    cols = np.arange(n_periods)[:, None] - gap - window + np.arange(window)[None, :]
    return np.where(cols >= 0, cols, NO_PERIOD)


def years_before(day: date, years: int) -> date:
    """The same calendar date ``years`` earlier (29 February becomes 28 February)."""
    try:
        return day.replace(year=day.year - years)
    except ValueError:
        return day.replace(year=day.year - years, day=28)


def weeks_back(ordinal: int, years: int) -> int:
    """How many ISO weeks back lies "the same week" ``years`` years before week ``ordinal``.

    The week whose Monday is nearest to the same calendar date ``years`` earlier: 52 weeks
    a year, plus one more wherever that lands closer to the date (a 53-week year was
    crossed, or the date drifted by a leap day). So 2026-W53 (Monday 28 December 2026)
    maps to 2026-W01 (Monday 29 December 2025) one year back, and the same-date rule keeps
    every year's baseline on the calendar even though most years have no week 53.
    """
    monday = date.fromordinal(int(ordinal) * 7 + 1)
    return round((monday - years_before(monday, years)).days / 7)


def seasonal_columns(
    n_periods: int,
    years: int,
    span: int,
    periods: np.ndarray | None = None,
    kind: PeriodKind = "month",
) -> np.ndarray:
    """[periods x years·(2·span+1)] columns of the historical-limits baseline.

    For period t: the same period and ``span`` periods either side in each of the
    previous ``years`` years (Stroup et al. 1989: 5 years × 3 periods = 15 values).
    Months go back 12 periods a year; weeks by :func:`weeks_back` (needs ``periods``, the
    period ordinals of the columns). NO_PERIOD where the column lies before the data.
    """
    t = np.arange(n_periods)
    parts = []
    for y in range(1, years + 1):
        if kind == "month":
            back = np.full(n_periods, 12 * y)
        else:
            if periods is None:
                raise ValueError("weekly seasonal baselines need the period ordinals")
            back = np.array([weeks_back(int(p), y) for p in periods], dtype=np.int64)
        for s in range(-span, span + 1):
            parts.append(t - back + s)
    cols = np.stack(parts, axis=1) if parts else np.empty((n_periods, 0), dtype=np.int64)
    return np.where((cols >= 0) & (cols < t[:, None]), cols, NO_PERIOD)


# ---- exact count quantiles ------------------------------------------------------------------


def _cornish_fisher(
    q: float, mean: np.ndarray, sd: np.ndarray, skew: np.ndarray, kurt: np.ndarray
) -> np.ndarray:
    """Approximate q-quantile of a discrete distribution from its first four moments."""
    z = float(special.ndtri(q))
    w = (
        z
        + (z * z - 1) * skew / 6
        + (z**3 - 3 * z) * kurt / 24
        - (2 * z**3 - 5 * z) * skew * skew / 36
    )
    return mean + sd * w - 0.5  # continuity: P(X <= k) is P(Y <= k + 0.5)


def _walk_to_quantile(
    q: float,
    k: np.ndarray,
    cdf: np.ndarray,
    pmf: np.ndarray,
    up: Callable[[np.ndarray, np.ndarray], np.ndarray],
    down: Callable[[np.ndarray, np.ndarray], np.ndarray],
    max_steps: int = 64,
) -> tuple[np.ndarray, np.ndarray]:
    """Move from k (with F(k) and f(k) known) to the smallest k with F(k) >= q.

    ``up(k, idx)`` is f(k+1)/f(k) and ``down(k, idx)`` is f(k-1)/f(k) for the cells
    ``idx``, so each step costs a multiplication, not another incomplete-gamma or -beta
    function. Returns the quantiles and a mask of cells that did not settle (the caller
    hands those to scipy).
    """
    k, cdf, pmf = k.copy(), cdf.copy(), pmf.copy()
    # too high: step down while F(k-1) = F(k) - f(k) still reaches q
    idx = np.flatnonzero((cdf >= q) & (k > 0))
    for _ in range(max_steps):
        if not len(idx):
            break
        prev = cdf[idx] - pmf[idx]
        move = prev >= q
        idx = idx[move]
        if not len(idx):
            break
        pmf[idx] = pmf[idx] * down(k[idx], idx)
        cdf[idx] = prev[move]
        k[idx] -= 1
        idx = idx[k[idx] > 0]
    stuck = np.zeros(k.shape, dtype=bool)
    stuck[idx] = True
    # too low: step up until F(k) reaches q
    idx = np.flatnonzero(cdf < q)
    for _ in range(max_steps):
        if not len(idx):
            break
        pmf[idx] = pmf[idx] * up(k[idx], idx)
        k[idx] += 1
        cdf[idx] = cdf[idx] + pmf[idx]
        idx = idx[cdf[idx] < q]
    stuck[idx] = True
    stuck |= ~(pmf > 0) | ~np.isfinite(cdf)  # underflow far in a tail: steps prove nothing
    return k, stuck


SMALL = 8  # up to this many distinct Poisson means, quantiles come from a cache
# Stepping from F(k) by f(k) keeps about 1e-16 absolute accuracy; far in a tail that is not
# enough to place the quantile, so probabilities outside this range go to scipy directly.
EXACT_RANGE = (1e-9, 1 - 1e-9)


@functools.lru_cache(maxsize=4096)
def _poisson_ppf(q: float, lam: float) -> float:
    return float(stats.poisson.ppf(q, lam))


def poisson_quantile(q: float, lam: np.ndarray) -> np.ndarray:
    """Smallest integer k with P(X <= k) >= q for X ~ Poisson(lam); as scipy.stats.poisson.ppf.

    Vectorised and exact: a Cornish-Fisher start, one regularised incomplete gamma for
    F(k), then steps along the probability function. Repeated means are computed once.
    """
    lam = np.asarray(lam, dtype=float)
    out = np.full(lam.shape, np.nan)
    ok = np.isfinite(lam) & (lam >= 0)
    if not ok.any():
        return out
    if not EXACT_RANGE[0] <= q <= EXACT_RANGE[1]:
        out[ok] = stats.poisson.ppf(q, lam[ok])
        return out
    values, inverse = np.unique(lam[ok], return_inverse=True)
    if len(values) <= SMALL:  # a few distinct means: one cached scalar look-up each
        out[ok] = np.array([_poisson_ppf(q, float(v)) for v in values])[inverse]
        return out
    sd = np.sqrt(values)
    with np.errstate(divide="ignore", invalid="ignore"):
        skew = np.where(values > 0, 1 / sd, 0.0)
        kurt = np.where(values > 0, 1 / values, 0.0)
    k = np.maximum(np.ceil(_cornish_fisher(q, values, sd, skew, kurt)), 0.0)
    cdf = special.pdtr(k, values)
    pmf = np.exp(special.xlogy(k, values) - values - special.gammaln(k + 1))

    def up(kk: np.ndarray, idx: np.ndarray) -> np.ndarray:
        return values[idx] / (kk + 1)

    def down(kk: np.ndarray, idx: np.ndarray) -> np.ndarray:
        return kk / values[idx]

    k, stuck = _walk_to_quantile(q, k, cdf, pmf, up, down)
    if stuck.any():
        k[stuck] = stats.poisson.ppf(q, values[stuck])
    out[ok] = k[inverse]
    return out


def nbinom_quantile(q: float, mean: np.ndarray, dispersion: np.ndarray) -> np.ndarray:
    """Smallest k with P(X <= k) >= q for a negative binomial of this mean and Var/mean.

    scipy's parameters: nbinom(n = mean / (dispersion - 1), p = 1 / dispersion), so the
    variance is dispersion × mean (Noufaily et al. 2013). Needs dispersion > 1. Exact, as
    scipy.stats.nbinom.ppf: a Cornish-Fisher start, one regularised incomplete beta, then
    steps along the probability function.
    """
    mean = np.asarray(mean, dtype=float)
    dispersion = np.asarray(dispersion, dtype=float)
    out = np.full(np.broadcast(mean, dispersion).shape, np.nan)
    mean, dispersion = np.broadcast_arrays(mean, dispersion)
    ok = np.isfinite(mean) & (mean > 0) & np.isfinite(dispersion) & (dispersion > 1)
    if not ok.any():
        return out
    mu, phi = mean[ok], dispersion[ok]
    n, p = mu / (phi - 1), 1 / phi
    if not EXACT_RANGE[0] <= q <= EXACT_RANGE[1]:
        out[ok] = stats.nbinom.ppf(q, n, p)
        return out
    sd = np.sqrt(mu * phi)
    skew = (2 - p) / np.sqrt(n * (1 - p))
    kurt = 6 / n + p * p / (n * (1 - p))
    k = np.maximum(np.ceil(_cornish_fisher(q, mu, sd, skew, kurt)), 0.0)
    cdf = special.betainc(n, k + 1, p)
    pmf = np.exp(
        special.gammaln(k + n)
        - special.gammaln(n)
        - special.gammaln(k + 1)
        + n * np.log(p)
        + special.xlog1py(k, -p)
    )

    def up(kk: np.ndarray, idx: np.ndarray) -> np.ndarray:
        return (kk + n[idx]) * (1 - p[idx]) / (kk + 1)

    def down(kk: np.ndarray, idx: np.ndarray) -> np.ndarray:
        return kk / ((kk - 1 + n[idx]) * (1 - p[idx]))

    k, stuck = _walk_to_quantile(q, k, cdf, pmf, up, down)
    if stuck.any():
        k[stuck] = stats.nbinom.ppf(q, n[stuck], p[stuck])
    out[ok] = k
    return out


# ---- statistics over the baseline values ---------------------------------------------------
#
# A statistic takes one period's baseline values [slots x units] (NaN = missing or left
# out) and returns one band per unit. Period-major layout keeps each slot a contiguous
# row, so every step below is one numpy call across all units.


class Stats(NamedTuple):
    """A band per cell; ``label`` indexes the method's labels (-1: no band)."""

    centre: np.ndarray
    spread: np.ndarray
    low: np.ndarray
    high: np.ndarray
    points: np.ndarray
    label: np.ndarray


Statistic = Callable[[np.ndarray, BandConfig], Stats]
NETWORK_LIMIT = 32  # baselines up to this many slots are sorted by a comparator network


@functools.cache
def sorting_network(n: int) -> tuple[tuple[int, int], ...]:
    """Comparators (i, j), i < j, of Batcher's odd-even merge sort for ``n`` inputs.

    Applying ``(min, max)`` to each pair in order sorts any n values (Knuth, TAOCP vol. 3,
    5.3.4). With numpy every comparator is two calls over all units at once, which beats
    ``np.sort`` along a short axis; 12 inputs need 42 comparators.
    """
    pairs = []
    p = 1
    while p < n:
        k = p
        while k >= 1:
            for j in range(k % p, n - k, 2 * k):
                for i in range(min(k, n - j - k)):
                    if (i + j) // (2 * p) == (i + j + k) // (2 * p):
                        pairs.append((i + j, i + j + k))
            k //= 2
        p *= 2
    return tuple(pairs)


def sort_slots(values: np.ndarray, *, overwrite: bool = False) -> np.ndarray:
    """``values`` [..., slots, units] sorted along the slots.

    NaN must be replaced first (by +inf, so that missing values sort last). Short
    baselines go through :func:`sorting_network` (two numpy calls per comparator across
    all units, in place when ``overwrite``); longer ones through ``np.sort``.
    """
    slots = values.shape[-2]
    if slots > NETWORK_LIMIT or slots < 2:
        return np.sort(values, axis=-2)
    work = values if overwrite else values.copy()
    rows = [work[..., i, :] for i in range(slots)]
    spare = np.empty_like(rows[0])
    for i, j in sorting_network(slots):
        np.minimum(rows[i], rows[j], out=spare)
        np.maximum(rows[i], rows[j], out=rows[j])
        rows[i], spare = spare, rows[i]
    return np.stack(rows, axis=-2)


def median_of_smallest(ordered: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Median of the ``n`` smallest slots of an ascending [..., slots, units] array."""
    slots = ordered.shape[-2]
    if slots and (n == slots).all():  # the usual case: nothing missing anywhere
        a, b = ordered[..., (slots - 1) // 2, :], ordered[..., slots // 2, :]
    else:
        if not slots:
            return np.full(n.shape, np.nan)
        # flat positions of ranks (n-1)//2 and n//2 of every unit (one gather each)
        units = ordered.shape[-1]
        base = np.arange(n.size).reshape(n.shape)
        base = base + (base // units) * (slots - 1) * units  # start of each unit's block
        flat = ordered.reshape(-1)
        a = flat[base + np.clip((n - 1) // 2, 0, slots - 1) * units]
        b = flat[base + np.clip(n // 2, 0, slots - 1) * units]
    with np.errstate(invalid="ignore"):
        return np.where(n > 0, (a + b) / 2, np.nan)


def _mean_var(values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Count, mean and sample variance (n - 1) over the slots, two passes, NaN ignored."""
    seen = ~np.isnan(values)
    n = seen.sum(axis=-2)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(seen, values, 0.0).sum(axis=-2) / n
        deviation = np.where(seen, values - mean[..., None, :], 0.0)
        var = (deviation * deviation).sum(axis=-2) / (n - 1)
    return n, mean, var


def _k_band(
    centre: np.ndarray, spread: np.ndarray, k: float, enough: np.ndarray
) -> tuple[np.ndarray, ...]:
    centre = np.where(enough, centre, np.nan)
    spread = np.where(enough, spread, np.nan)
    return centre, spread, np.maximum(centre - k * spread, 0.0), centre + k * spread


def mean_sd_stats(values: np.ndarray, band: BandConfig) -> Stats:
    """centre = mean, spread = sample SD; band = centre ± k·spread, low not below 0."""
    n, mean, var = _mean_var(values)
    enough = n >= band.min_points
    centre, spread, low, high = _k_band(mean, np.sqrt(var), band.k, enough)
    return Stats(centre, spread, low, high, n, np.where(enough, 0, -1).astype(np.int8))


def robust_stats(values: np.ndarray, band: BandConfig) -> Stats:
    """centre = median, spread = 1.4826 × MAD; band = centre ± k·spread, low not below 0.

    Labels: 0 MAD; 1 MAD is 0, so spread = 1.2533 × the mean absolute deviation from the
    median; 2 that is 0 too (every value the same, c), so the Poisson limits of mean c.
    """
    missing = np.isnan(values)
    n = values.shape[-2] - np.count_nonzero(missing, axis=-2)
    enough = n >= band.min_points
    ordered = sort_slots(np.where(missing, np.inf, values), overwrite=True)  # missing last
    median = median_of_smallest(ordered, n)
    deviation = np.subtract(ordered, np.where(n > 0, median, 0.0)[..., None, :], out=ordered)
    ordered = sort_slots(np.abs(deviation, out=deviation), overwrite=True)  # inf stays inf
    mad = median_of_smallest(ordered, n)
    zero = enough & (mad == 0)
    meanad = np.zeros(mad.shape)
    if zero.any():  # the mean absolute deviation is needed only where MAD is 0
        finite = np.where(np.isinf(ordered[..., zero]), 0.0, ordered[..., zero])
        meanad[zero] = finite.sum(axis=-2) / n[zero]
    label = np.where(mad > 0, 0, np.where(meanad > 0, 1, 2)).astype(np.int8)
    spread = np.where(label == 0, MAD_TO_SD * mad, MEANAD_TO_SD * meanad)
    centre, spread, low, high = _k_band(median, spread, band.k, enough)
    flat = enough & (label == 2)
    if flat.any():
        lam = np.maximum(median[flat], 0.0)
        spread[flat] = np.sqrt(lam)
        low[flat] = poisson_quantile(band.alpha, lam)
        high[flat] = poisson_quantile(1 - band.alpha, lam)
    return Stats(centre, spread, low, high, n, np.where(enough, label, -1).astype(np.int8))


def poisson_stats(values: np.ndarray, band: BandConfig) -> Stats:
    """Count quantiles around the baseline mean λ; low = α quantile, high = 1 - α quantile.

    Poisson(λ) unless the baseline is over-dispersed (sample variance / mean above
    ``dispersion_threshold``): then a negative binomial with that mean and variance.
    spread = √λ (Poisson) or the sample SD (negative binomial), used only for scoring.
    Labels: 0 Poisson, 1 negative binomial.
    """
    n, mean, var = _mean_var(values)
    enough = n >= band.min_points
    lam = np.where(enough, np.maximum(mean, 0.0), np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        dispersion = var / lam
    over = enough & (lam > 0) & (dispersion > band.dispersion_threshold)
    plain = enough & ~over
    low = np.full(lam.shape, np.nan)
    high = np.full(lam.shape, np.nan)
    low[plain] = poisson_quantile(band.alpha, lam[plain])
    high[plain] = poisson_quantile(1 - band.alpha, lam[plain])
    low[over] = nbinom_quantile(band.alpha, lam[over], dispersion[over])
    high[over] = nbinom_quantile(1 - band.alpha, lam[over], dispersion[over])
    spread = np.where(over, np.sqrt(var), np.sqrt(lam))
    label = np.where(enough, over, -1).astype(np.int8)
    return Stats(lam, np.where(enough, spread, np.nan), low, high, n, label)


# ---- learning: every period at once, or in order leaving flagged values out ---------------


def learn(
    series: np.ndarray,
    band: BandConfig,
    columns: np.ndarray,
    statistic: Statistic,
    labels: tuple[str, ...],
    keep: np.ndarray | None = None,
) -> BandArrays:
    """Bands for every period of ``series`` [units x periods] from its baseline ``columns``.

    ``columns`` [periods x slots] lists the past periods that feed each period's band
    (NO_PERIOD for none). With ``band.exclude_flagged`` the periods are learned in order:
    the band at t comes from the cleaned history, and a value at t outside its band is
    removed from the history that later periods see, unless ``keep`` [units x periods]
    marks it or the band has zero width (see below). Each step is vectorised over all
    units (one period's [slots x units] block stays in cache, which is faster than
    stacking every period's baseline at once).
    """
    units, n_periods = series.shape
    history = np.full((n_periods + 1, units), np.nan)  # period-major; last row stays missing
    history[:n_periods] = series.T
    excluded = np.zeros((n_periods, units), dtype=bool)
    out: Stats | None = None
    for t in range(n_periods):
        cols = columns[t]
        if len(cols) and cols[0] != NO_PERIOD and (np.diff(cols) == 1).all():
            baseline = history[cols[0] : cols[-1] + 1]  # a view, no copy
        else:
            baseline = history[cols]
        step = statistic(baseline, band)
        if out is None:
            out = Stats(*(np.empty((n_periods, units), dtype=a.dtype) for a in step))
        for whole, part in zip(out, step, strict=True):
            whole[t] = part
        if not band.exclude_flagged:
            continue
        value = history[t]
        with np.errstate(invalid="ignore"):
            outside = (value > step.high) | (value < step.low)
        # A band of zero width (a flat history: twelve zeros, or one value copied every
        # month) flags the first ordinary variation as well; leaving that out would keep
        # the band flat for good, so such flags raise the alert but exclude nothing.
        outside &= step.high > step.low
        if keep is not None:
            outside &= ~keep[:, t]
        excluded[t] = outside
        history[t, outside] = np.nan
    if out is None:  # no periods at all
        out = statistic(np.full((0, 0, units), np.nan), band)
    names = np.array([*labels, ""], dtype=object)
    # returned as [units x periods] views of the period-major arrays (Fortran order)
    return BandArrays(
        out.centre.T,
        out.spread.T,
        out.low.T,
        out.high.T,
        out.points.astype(np.int64).T,
        names[out.label.T],  # label -1 picks the trailing ''
        excluded.T,
    )


def mean_sd(
    series: np.ndarray,
    band: BandConfig,
    *,
    periods: np.ndarray | None = None,
    kind: PeriodKind = "month",
    keep: np.ndarray | None = None,
) -> BandArrays:
    """centre = mean, spread = sample SD (n-1); low = centre - k*spread (not below 0).

    Without exclusion this is the issue-2 definition, the same as :func:`window_stats`
    (and pandas' rolling mean and std of the shifted series).
    """
    columns = window_columns(series.shape[1], band.window, band.gap)
    return learn(series, band, columns, mean_sd_stats, ("mean_sd",), keep)


def median_mad(
    series: np.ndarray,
    band: BandConfig,
    *,
    periods: np.ndarray | None = None,
    kind: PeriodKind = "month",
    keep: np.ndarray | None = None,
) -> BandArrays:
    """Modified z-score band over the trailing window: median ± k × 1.4826 × MAD."""
    columns = window_columns(series.shape[1], band.window, band.gap)
    labels = ("median_mad", "median_mad/meanad", "median_mad/poisson")
    return learn(series, band, columns, robust_stats, labels, keep)


def seasonal(
    series: np.ndarray,
    band: BandConfig,
    *,
    periods: np.ndarray | None = None,
    kind: PeriodKind = "month",
    keep: np.ndarray | None = None,
) -> BandArrays:
    """Historical limits: mean ± k·SD (k = 2) of the same season in earlier years."""
    columns = seasonal_columns(series.shape[1], band.years, band.span, periods, kind)
    if band.robust:
        labels = (
            "seasonal/median_mad",
            "seasonal/median_mad/meanad",
            "seasonal/median_mad/poisson",
        )
        return learn(series, band, columns, robust_stats, labels, keep)
    return learn(series, band, columns, mean_sd_stats, ("seasonal",), keep)


def poisson(
    series: np.ndarray,
    band: BandConfig,
    *,
    periods: np.ndarray | None = None,
    kind: PeriodKind = "month",
    keep: np.ndarray | None = None,
) -> BandArrays:
    """Count-aware band: Poisson (or negative-binomial) quantiles around the baseline mean."""
    if band.baseline == "seasonal":
        columns = seasonal_columns(series.shape[1], band.years, band.span, periods, kind)
        labels = ("poisson/seasonal", "poisson/seasonal/nbinom")
    else:
        columns = window_columns(series.shape[1], band.window, band.gap)
        labels = ("poisson", "poisson/nbinom")
    return learn(series, band, columns, poisson_stats, labels, keep)


METHODS: dict[str, BandMethod] = {
    "mean_sd": mean_sd,
    "median_mad": median_mad,
    "seasonal": seasonal,
    "poisson": poisson,
}


def derive(config: Config, raw: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Raw series plus every derived metric, computed at the capture level, in config order."""
    series = dict(raw)
    for derived in config.derived:
        expr = expressions.parse(derived.expr)
        series[derived.code] = np.broadcast_to(
            expr.evaluate(series), next(iter(raw.values())).shape
        ).copy()
    return series


def learn_bands(
    config: Config,
    dataset: Dataset,
    series: dict[str, np.ndarray],
    keep: Mapping[tuple[str, str], np.ndarray] | None = None,
) -> dict[tuple[str, str], BandArrays]:
    """Stage 1: every configured band at each of its levels, keyed by (band name, level).

    ``keep`` optionally maps (band name, level) to a [units x periods] mask of values
    never left out of later baselines (acknowledged as correct).
    """
    bands: dict[tuple[str, str], BandArrays] = {}
    for band in config.band:
        method = METHODS[band.method]
        for level in band.levels:
            totals = level_totals(series[band.metric], dataset.hierarchy, dataset.capture, level)
            bands[(band.name, level)] = method(
                totals.values,
                band,
                periods=dataset.periods,
                kind=dataset.kind,
                keep=None if keep is None else keep.get((band.name, level)),
            )
    return bands
