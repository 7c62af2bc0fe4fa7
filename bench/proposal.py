"""Prototype replacements for ``digest.bands.window_stats`` / ``mean_sd`` (not used by digest).

``bench/stages.py`` times these next to the real functions and checks that they agree with
them. They keep the signatures of the originals so that adopting one is a drop-in change
in ``digest/bands.py``:

* :func:`window_stats_slices` does the same two passes, in the same order of additions, as
  ``window_stats`` (so its results are bit-for-bit identical) but works period-major
  ([periods x units], each lag a contiguous block of rows) on one padded copy instead of
  allocating two shifted copies plus masks per lag and pass.
* :func:`window_stats_cumsum` centres each series on its own mean, then takes window sums
  of count, deviation and squared deviation as differences of cumulative sums (three
  passes in all, independent of the window length). Not bit-identical; the error grows
  with (series spread / window spread)^2, which ``stages.py`` reports on the test data.
* :func:`mean_sd_fast` is ``mean_sd`` with the per-cell ``method`` object array built by a
  masked assignment instead of ``np.where(..., str, "").astype(object)``, which builds a
  fixed-width unicode array and then converts every cell to a Python object.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from digest import bands
from digest.bands import BandArrays
from digest.config import BandConfig

WindowStats = Callable[[np.ndarray, int, int], tuple[np.ndarray, ...]]


def window_stats_slices(series: np.ndarray, window: int, gap: int) -> tuple[np.ndarray, ...]:
    """Count, mean and sample SD of the ``window`` periods before t, skipping ``gap``.

    Same arithmetic as ``digest.bands.window_stats`` (sum, then squared deviations from the
    mean, lag by lag in the same order), on a period-major padded copy: lag L of period t
    is row ``lead + t - L`` of the copy, so every lag is a contiguous slice and no shifted
    copy is made.
    """
    n_units, n_periods = series.shape
    lead = window + gap
    seen = ~np.isnan(series.T)
    valid = np.zeros((lead + n_periods, n_units))
    value = np.zeros((lead + n_periods, n_units))
    valid[lead:] = seen
    np.copyto(value[lead:], series.T, where=seen)
    lags = range(gap + 1, lead + 1)
    count = np.zeros((n_periods, n_units))
    total = np.zeros((n_periods, n_units))
    for lag in lags:
        rows = slice(lead - lag, lead - lag + n_periods)
        count += valid[rows]
        total += value[rows]
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = total / count
    centre = np.where(count > 0, mean, 0.0)
    squares = np.zeros((n_periods, n_units))
    deviation = np.empty((n_periods, n_units))
    for lag in lags:
        rows = slice(lead - lag, lead - lag + n_periods)
        np.subtract(value[rows], centre, out=deviation)
        deviation *= valid[rows]  # a missing value adds 0, as in window_stats
        deviation *= deviation
        squares += deviation
    with np.errstate(invalid="ignore", divide="ignore"):
        sd = np.sqrt(squares / (count - 1))
    return (
        np.ascontiguousarray(count.T),
        np.ascontiguousarray(mean.T),
        np.ascontiguousarray(sd.T),
    )


def window_stats_cumsum(series: np.ndarray, window: int, gap: int) -> tuple[np.ndarray, ...]:
    """As :func:`window_stats_slices`, from cumulative sums of per-series-centred values.

    Each series is shifted by its own mean r before summing, so the sums hold deviations
    d = x - r; for a window of n values with S1 = sum(d), S2 = sum(d*d):
    mean = r + S1/n and sum((x - mean)^2) = S2 - S1*S1/n (clamped at 0).
    """
    n_units, n_periods = series.shape
    seen = ~np.isnan(series.T)
    n_seen = seen.sum(axis=0)
    deviation = np.where(seen, series.T, 0.0)
    ref = deviation.sum(axis=0) / np.maximum(n_seen, 1)
    deviation -= ref
    deviation *= seen
    lead = window + gap + 1

    def cumulative(a: np.ndarray) -> np.ndarray:
        out = np.zeros((lead + n_periods, n_units))
        np.cumsum(a, axis=0, out=out[lead:])
        return out

    c_count = cumulative(seen.astype(np.float64))
    c_sum = cumulative(deviation)
    deviation *= deviation
    c_squares = cumulative(deviation)
    upper = slice(lead - 1 - gap, lead - 1 - gap + n_periods)  # periods up to t - gap - 1
    lower = slice(lead - 1 - gap - window, lead - 1 - gap - window + n_periods)
    count = c_count[upper] - c_count[lower]
    s1 = c_sum[upper] - c_sum[lower]
    s2 = c_squares[upper] - c_squares[lower]
    with np.errstate(invalid="ignore", divide="ignore"):
        shift = s1 / count
        mean = ref + shift
        squares = np.maximum(s2 - s1 * shift, 0.0)
        sd = np.sqrt(squares / (count - 1))
    return (
        np.ascontiguousarray(count.T),
        np.ascontiguousarray(mean.T),
        np.ascontiguousarray(sd.T),
    )


def mean_sd_fast(
    series: np.ndarray,
    band: BandConfig,
    stats: WindowStats = window_stats_slices,
    **options: Any,
) -> BandArrays:
    """``digest.bands.mean_sd`` with a faster window_stats and a cheap ``method`` array.

    Bands learned with ``exclude_flagged`` (newer digest; learned period by period) are
    passed on to ``digest.bands.mean_sd`` unchanged, with ``options`` (periods, kind, keep).
    """
    if getattr(band, "exclude_flagged", False):
        return bands.mean_sd(series, band, **options)
    count, mean, sd = stats(series, band.window, band.gap)
    enough = count >= band.min_points
    centre = np.where(enough, mean, np.nan)
    spread = np.where(enough, sd, np.nan)
    low = np.maximum(centre - band.k * spread, 0.0)
    high = centre + band.k * spread
    method = np.full(series.shape, "", dtype=object)
    method[enough] = band.method
    return BandArrays(centre, spread, low, high, count.astype(np.int64), method)
