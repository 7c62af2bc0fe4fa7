"""Stage 1: learn each series' band (centre, low, high) from its own past.

A band method is a function from a [units x periods] array of one level's series and the
band's settings to :class:`BandArrays` for every period at once. Methods are registered in
:data:`METHODS` by the name used in ``[[band]] method``. Derived metrics are computed here
too, at the capture level, because bands may be learned on them.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from digest import expressions
from digest.config import BandConfig, Config
from digest.loading import Dataset
from digest.rollup import level_totals


@dataclass(frozen=True)
class BandArrays:
    """A band for every unit and period [units x periods]; NaN where no band was learned."""

    centre: np.ndarray
    spread: np.ndarray
    low: np.ndarray
    high: np.ndarray
    points: np.ndarray  # int: values the band was learned from
    method: np.ndarray  # object: which method produced each band ('' when none)


BandMethod = Callable[[np.ndarray, BandConfig], BandArrays]


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


def mean_sd(series: np.ndarray, band: BandConfig) -> BandArrays:
    """centre = mean, spread = sample SD (n-1); low = centre - k*spread (not below 0)."""
    count, mean, sd = window_stats(series, band.window, band.gap)
    enough = count >= band.min_points
    centre = np.where(enough, mean, np.nan)
    spread = np.where(enough, sd, np.nan)
    low = np.maximum(centre - band.k * spread, 0.0)
    high = centre + band.k * spread
    method = np.where(enough, band.method, "").astype(object)
    return BandArrays(centre, spread, low, high, count.astype(np.int64), method)


METHODS: dict[str, BandMethod] = {"mean_sd": mean_sd}


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
    config: Config, dataset: Dataset, series: dict[str, np.ndarray]
) -> dict[tuple[str, str], BandArrays]:
    """Stage 1: every configured band at each of its levels, keyed by (band name, level)."""
    bands: dict[tuple[str, str], BandArrays] = {}
    for band in config.band:
        method = METHODS[band.method]
        for level in band.levels:
            totals = level_totals(series[band.metric], dataset.hierarchy, dataset.capture, level)
            bands[(band.name, level)] = method(totals.values, band)
    return bands
