"""Stage 1: mean_sd bands against pandas rolling windows and the statistics module."""

from __future__ import annotations

import math
import statistics
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import LEVELS
from hypothesis import given, settings
from hypothesis import strategies as st
from strategies import series

from digest.bands import derive, learn_bands, mean_sd, window_stats
from digest.config import BandConfig, config_from_dict
from digest.hierarchy import load_hierarchy
from digest.loading import Dataset


def band(**settings_: Any) -> BandConfig:
    base: dict[str, Any] = {
        "name": "b",
        "metric": "m",
        "levels": ["facility"],
        "exclude_flagged": False,  # the issue-2 definition, as pandas computes it
    }
    return BandConfig(**{**base, **settings_})


def reference_window(row: np.ndarray, t: int, window: int, gap: int) -> list[float]:
    """The reported values of the ``window`` periods before t, skipping ``gap`` -- by hand."""
    stop = t - gap  # exclusive: periods t-gap-window .. t-gap-1
    start = max(0, stop - window)
    return [float(x) for x in row[start : max(stop, 0)] if not math.isnan(x)]


def check_against_statistics(values: np.ndarray, cfg: BandConfig) -> None:
    """Every cell against statistics.mean / statistics.stdev (exact fractions inside)."""
    got = mean_sd(values, cfg)
    for u in range(values.shape[0]):
        for t in range(values.shape[1]):
            window = reference_window(values[u], t, cfg.window, cfg.gap)
            assert got.points[u, t] == len(window)
            if len(window) < cfg.min_points:
                assert math.isnan(got.centre[u, t]) and math.isnan(got.high[u, t])
                assert math.isnan(got.low[u, t]) and got.method[u, t] == ""
                continue
            mean, sd = statistics.mean(window), statistics.stdev(window)
            assert got.method[u, t] == "mean_sd"
            assert math.isclose(got.centre[u, t], mean, rel_tol=1e-12, abs_tol=1e-9)
            assert math.isclose(got.spread[u, t], sd, rel_tol=1e-9, abs_tol=1e-9)
            assert math.isclose(got.high[u, t], mean + cfg.k * sd, rel_tol=1e-9, abs_tol=1e-9)
            low = max(mean - cfg.k * sd, 0.0)  # low is clipped at 0: counts cannot be negative
            assert math.isclose(got.low[u, t], low, rel_tol=1e-9, abs_tol=1e-9)
            assert got.low[u, t] >= 0


def random_series(rng: np.random.Generator, units: int, periods: int, gaps: float) -> np.ndarray:
    values = rng.poisson(rng.uniform(2, 400, size=(units, 1)), size=(units, periods)).astype(float)
    values[rng.random((units, periods)) < gaps] = np.nan
    return values


@pytest.mark.parametrize(
    ("window", "gap", "min_points"), [(12, 0, 6), (6, 2, 3), (3, 0, 3), (24, 1, 2)]
)
def test_mean_sd_against_pandas_rolling(window: int, gap: int, min_points: int) -> None:
    rng = np.random.default_rng(20240601)
    values = random_series(rng, units=5, periods=40, gaps=0.25)
    cfg = band(window=window, gap=gap, min_points=min_points, k=2.5)
    got = mean_sd(values, cfg)
    for u in range(values.shape[0]):
        # reference: pandas rolling window on the series shifted past the gap
        past = pd.Series(values[u]).shift(gap + 1).rolling(window, min_periods=min_points)
        mean, sd = past.mean().to_numpy(), past.std().to_numpy()  # std: ddof = 1
        np.testing.assert_allclose(got.centre[u], mean, rtol=1e-9, atol=1e-9, equal_nan=True)
        np.testing.assert_allclose(got.spread[u], sd, rtol=1e-7, atol=1e-7, equal_nan=True)
        np.testing.assert_allclose(
            got.high[u], mean + 2.5 * sd, rtol=1e-7, atol=1e-7, equal_nan=True
        )
        count = pd.Series(values[u]).shift(gap + 1).rolling(window, min_periods=0).count()
        np.testing.assert_array_equal(got.points[u], count.to_numpy())


@pytest.mark.parametrize(("window", "gap", "min_points"), [(12, 0, 6), (6, 2, 3), (5, 0, 2)])
def test_mean_sd_against_statistics_module(window: int, gap: int, min_points: int) -> None:
    rng = np.random.default_rng(7)
    values = random_series(rng, units=4, periods=30, gaps=0.3)
    check_against_statistics(values, band(window=window, gap=gap, min_points=min_points, k=3.0))


def test_low_is_clipped_at_zero() -> None:
    values = np.array([[0.0, 9.0, 0.0, 9.0, 0.0, 9.0, 4.0]])
    got = mean_sd(values, band(window=6, min_points=6, k=3.0))
    window = [0.0, 9.0, 0.0, 9.0, 0.0, 9.0]
    mean, sd = statistics.mean(window), statistics.stdev(window)
    assert mean - 3 * sd < 0  # unclipped it would be negative
    assert got.low[0, 6] == 0.0
    assert math.isclose(got.high[0, 6], mean + 3 * sd, rel_tol=1e-12)


def test_fewer_than_min_points_gives_no_band() -> None:
    nan = np.nan
    values = np.array([[5.0, nan, 6.0, nan, 7.0, 8.0, 9.0, 10.0]])
    got = mean_sd(values, band(window=4, min_points=3))
    for t in range(values.shape[1]):
        n = len(reference_window(values[0], t, 4, 0))
        assert got.points[0, t] == n
        assert (got.method[0, t] == "mean_sd") == (n >= 3)
        assert math.isnan(got.centre[0, t]) == (n < 3)
    # by hand: at t=5 the window is periods 1..4 = [nan, 6, nan, 7], two values: no band;
    # at t=6 it is [6, nan, 7, 8], three values: a band
    assert (got.points[0, 5], got.method[0, 5]) == (2, "")
    assert (got.points[0, 6], got.method[0, 6]) == (3, "mean_sd")


def test_gap_leaves_out_the_latest_periods() -> None:
    values = np.array([[1.0, 2.0, 3.0, 100.0, 200.0, 0.0]])
    got = mean_sd(values, band(window=3, gap=2, min_points=3))
    # at t=5 the window is periods 0..2 (3 and 4 are the gap)
    assert got.centre[0, 5] == statistics.mean([1.0, 2.0, 3.0])
    assert got.spread[0, 5] == statistics.stdev([1.0, 2.0, 3.0])


def test_large_counts_are_numerically_stable() -> None:
    rng = np.random.default_rng(3)
    noise = rng.integers(-5, 6, size=24).astype(float)
    values = (1e9 + noise)[None, :]
    cfg = band(window=12, min_points=12)
    got = mean_sd(values, cfg)
    t = 20
    window = [float(x) for x in values[0, t - 12 : t]]
    exact = statistics.stdev(window)  # statistics works with exact fractions inside
    assert math.isclose(got.spread[0, t], exact, rel_tol=1e-9)
    assert math.isclose(got.centre[0, t], statistics.mean(window), rel_tol=1e-15)

    # the naive one-pass formula sqrt((sum x^2 - (sum x)^2 / n) / (n - 1)) would not do
    arr = np.array(window)
    n = len(arr)
    naive_var = (np.sum(arr * arr) - np.sum(arr) ** 2 / n) / (n - 1)
    naive = math.sqrt(naive_var) if naive_var > 0 else 0.0
    assert not math.isclose(naive, exact, rel_tol=1e-9)
    # the two-pass helper agrees with statistics as well
    _, _, sd = window_stats(values, 12, 0)
    assert math.isclose(sd[0, t], exact, rel_tol=1e-9)


@settings(max_examples=60, deadline=None)
@given(
    series(max_units=3, max_periods=24),
    st.integers(2, 8),
    st.integers(0, 3),
    st.data(),
    st.sampled_from([1.0, 2.0, 3.0]),
)
def test_mean_sd_property(
    values: np.ndarray, window: int, gap: int, data: st.DataObject, k: float
) -> None:
    min_points = data.draw(st.integers(2, window))
    cfg = band(window=window, gap=gap, min_points=min_points, k=k)
    check_against_statistics(values, cfg)
    got = mean_sd(values, cfg)
    learned = got.method == "mean_sd"
    assert (got.low[learned] <= got.centre[learned]).all()
    assert (got.centre[learned] <= got.high[learned]).all()
    assert (got.low[learned] >= 0).all()


# ---- derived metrics and bands at higher levels ---------------------------------------


def _config(tmp_path: Path) -> Any:
    raw = {
        "data": {"units": "u.csv", "values": "v.csv", "levels": list(LEVELS)},
        "metric": [
            {"code": "rdt_stockout_days", "label": "Stock-out days"},
            {"code": "anc1_visits", "label": "ANC1"},
        ],
        "derived": [
            {"code": "stockout_site", "label": "Sites", "expr": "rdt_stockout_days > 0"},
            {"code": "stockout_weeks", "label": "Weeks", "expr": "rdt_stockout_days / 7"},
        ],
        "band": [
            {
                "name": "anc",
                "metric": "anc1_visits",
                "window": 4,
                "min_points": 3,
                "levels": ["facility", "district"],
                "exclude_flagged": False,
            }
        ],
    }
    return config_from_dict(raw, tmp_path / "digest.toml")


def test_derive_at_capture_level(tmp_path: Path) -> None:
    config = _config(tmp_path)
    days = np.array([[0.0, 3.0, np.nan], [14.0, 0.0, 1.0]])
    anc = np.ones_like(days)
    series_ = derive(config, {"rdt_stockout_days": days, "anc1_visits": anc})
    # reference: pandas comparison and division, with missing kept missing
    frame = pd.DataFrame(days)
    expected_site = (frame > 0).astype(float).where(frame.notna())
    np.testing.assert_array_equal(series_["stockout_site"], expected_site.to_numpy())
    np.testing.assert_array_equal(series_["stockout_weeks"], (frame / 7).to_numpy())
    assert series_["anc1_visits"] is anc


def test_bands_at_district_learn_from_district_totals(
    tmp_path: Path, write_units: Callable[..., Path]
) -> None:
    config = _config(tmp_path)
    h = load_hierarchy(write_units(), LEVELS)
    capture = h.at_level("facility")
    rng = np.random.default_rng(11)
    anc = random_series(rng, units=len(capture), periods=10, gaps=0.2)
    days = np.zeros_like(anc)
    dataset = Dataset(h, "month", np.arange(24300, 24310), capture, {"anc1_visits": anc})
    series_ = derive(config, {"anc1_visits": anc, "rdt_stockout_days": days})
    bands = learn_bands(config, dataset, series_)
    assert set(bands) == {("anc", "facility"), ("anc", "district")}

    # reference: pandas groupby sum per district (NaN when no facility reported), then rolling
    long = pd.DataFrame(anc, index=[h.ids[u] for u in capture])
    district_of = {h.ids[f]: h.ids[h.parent[f]] for f in capture}
    totals = long.groupby(district_of).sum(min_count=1)
    districts = [h.ids[u] for u in h.at_level("district")]
    totals = totals.reindex(districts)
    got = bands[("anc", "district")]
    for row, district in enumerate(districts):
        past = totals.loc[district].shift(1).rolling(4, min_periods=3)
        np.testing.assert_allclose(got.centre[row], past.mean(), rtol=1e-9, equal_nan=True)
        np.testing.assert_allclose(got.spread[row], past.std(), rtol=1e-7, equal_nan=True)
    facility = bands[("anc", "facility")]
    np.testing.assert_array_equal(facility.centre, mean_sd(anc, config.band[0]).centre)
