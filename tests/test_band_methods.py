"""Stage 1 band methods: median_mad, seasonal, poisson, and leaving flagged values out.

References outside the project: scipy.stats (median_abs_deviation, norm, poisson, nbinom),
the statistics module, pure-Python re-computations of the definitions, and the worked
examples in /work/shared/notes/methods.md (§1.2 masking, §1.3 modified z-score, §3.1
historical limits, §4 count quantiles; each marked there as READ, COMPUTED or
CONSTRUCTED).
"""

from __future__ import annotations

import itertools
import math
import statistics
import warnings
from datetime import date, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from strategies import series

from digest.bands import (
    MAD_TO_SD,
    MEANAD_TO_SD,
    METHODS,
    NO_PERIOD,
    BandArrays,
    mean_sd,
    mean_sd_stats,
    median_mad,
    median_of_smallest,
    nbinom_quantile,
    poisson,
    poisson_quantile,
    robust_stats,
    seasonal,
    seasonal_columns,
    sort_slots,
    sorting_network,
    weeks_back,
    window_columns,
)
from digest.config import BandConfig, config_from_dict
from digest.errors import ConfigError
from digest.periods import format_period, parse_period

NAN = float("nan")


def band(**settings_: Any) -> BandConfig:
    base: dict[str, Any] = {"name": "b", "metric": "m", "levels": ["facility"]}
    return BandConfig(**{**base, **settings_})


def row(values: list[float]) -> np.ndarray:
    return np.array([values], dtype=float)


# ---- constants -----------------------------------------------------------------------------


def test_modified_z_constant_is_the_normal_quartile() -> None:
    # methods.md §1.3: 0.6745 = Φ⁻¹(0.75) (COMPUTED); 1/0.6745 = 1.4826
    assert round(stats.norm.ppf(0.75), 4) == 0.6745
    assert math.isclose(1 / MAD_TO_SD, stats.norm.ppf(0.75), rel_tol=1e-12)
    assert round(MAD_TO_SD, 4) == 1.4826
    # the MAD = 0 fallback: σ / mean absolute deviation = √(π/2) = 1.253314 for normal data
    assert round(MEANAD_TO_SD, 6) == 1.253314
    half_normal_mean = stats.halfnorm.mean()  # E|Z| for Z ~ N(0, 1)
    assert math.isclose(MEANAD_TO_SD, 1 / half_normal_mean, rel_tol=1e-12)
    # §5: |M| > 3.5 ⇔ |x − median| > 5.189 × MAD (raw MAD)
    assert round(3.5 * MAD_TO_SD, 3) == 5.189


# ---- sorting network and medians -------------------------------------------------------------


@pytest.mark.parametrize("n", range(0, 17))
def test_sorting_network_sorts_every_zero_one_input(n: int) -> None:
    """The 0-1 principle (Knuth, TAOCP 5.3.4): a network that sorts all 2^n 0/1 inputs
    sorts every input."""
    network = sorting_network(n)
    assert all(0 <= i < j < n for i, j in network)
    for bits in itertools.product((0, 1), repeat=n):
        wires = list(bits)
        for i, j in network:
            if wires[i] > wires[j]:
                wires[i], wires[j] = wires[j], wires[i]
        assert wires == sorted(wires)


@pytest.mark.parametrize("slots", [1, 2, 5, 12, 15, 33, 48])
def test_median_of_smallest_against_numpy_nanmedian(slots: int) -> None:
    rng = np.random.default_rng(slots)
    values = rng.normal(size=(slots, 400))
    values[rng.random(values.shape) < 0.3] = np.nan
    n = (~np.isnan(values)).sum(axis=0)
    ordered = sort_slots(np.where(np.isnan(values), np.inf, values))
    np.testing.assert_array_equal(ordered, np.sort(np.where(np.isnan(values), np.inf, values), 0))
    got = median_of_smallest(ordered, n)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN columns: NaN, as ours
        expected = np.nanmedian(values, axis=0)
    np.testing.assert_array_equal(got, expected)


# ---- median_mad: the modified z-score -----------------------------------------------------


def test_median_mad_band_is_the_modified_z_score_rule() -> None:
    """k = 3.5 flags exactly the values with |(x − median) / MAD_normal| > 3.5, where
    MAD_normal = scipy.stats.median_abs_deviation(window, scale="normal")."""
    rng = np.random.default_rng(20240601)
    values = rng.normal(100, 10, size=(60, 30))
    spikes = rng.random(values.shape) < 0.06
    values[spikes] *= rng.choice([0.1, 0.5, 1.6, 4.0], size=int(spikes.sum()))
    values[rng.random(values.shape) < 0.1] = np.nan
    cfg = band(method="median_mad", window=12, min_points=6, exclude_flagged=False)
    assert cfg.k == 3.5
    got = median_mad(values, cfg)
    flagged = checked = 0
    for u in range(values.shape[0]):
        for t in range(values.shape[1]):
            window = [x for x in values[u, max(0, t - 12) : t] if not math.isnan(x)]
            if len(window) < 6:
                assert got.method[u, t] == "" and math.isnan(got.centre[u, t])
                continue
            median = float(np.median(window))
            mad_normal = float(stats.median_abs_deviation(window, scale="normal"))
            assert got.method[u, t] == "median_mad"
            assert math.isclose(got.centre[u, t], median, rel_tol=1e-15)
            assert math.isclose(got.spread[u, t], mad_normal, rel_tol=1e-12)
            x = values[u, t]
            if math.isnan(x):
                continue
            modified_z = (x - median) / mad_normal
            if abs(abs(modified_z) - 3.5) < 1e-9:
                continue  # on the boundary: rounding may decide either way
            outside = x > got.high[u, t] or x < got.low[u, t]
            assert outside == (abs(modified_z) > 3.5), (u, t, modified_z)
            # the textbook form with 0.6745 agrees away from the boundary
            if abs(abs(0.6745 * (x - median) / (mad_normal * stats.norm.ppf(0.75))) - 3.5) > 1e-3:
                assert outside == (abs(0.6745 * (x - median) / (mad_normal * 0.6745)) > 3.5)
            flagged += outside
            checked += 1
    assert checked > 1000 and 20 < flagged < checked / 4  # the test exercised both sides


def test_masking_example_classic_z_versus_modified_z() -> None:
    """methods.md §1.2/§5 (CONSTRUCTED/COMPUTED): with the 95 in its own sample the
    classic z is 3.168 (just "extreme", near the 3.175 ceiling for n = 12); the modified
    z is 33.5 (median 20.5, MAD 1.5)."""
    values = [20, 22, 19, 21, 23, 20, 18, 22, 21, 20, 19, 95]
    sample = np.array(values, dtype=float)[:, None]  # [slots x 1 unit]
    classic = mean_sd_stats(sample, band(min_points=2))
    z = (95 - classic.centre[0]) / classic.spread[0]
    assert round(z, 3) == 3.168
    assert z == pytest.approx((95 - statistics.mean(values)) / statistics.stdev(values))
    assert z < (12 - 1) / math.sqrt(12) == pytest.approx(3.1754, abs=1e-4)  # Shiffler bound
    robust = robust_stats(sample, band(method="median_mad", min_points=2))
    assert robust.centre[0] == 20.5 and robust.spread[0] == pytest.approx(1.5 * MAD_TO_SD)
    modified = 0.6745 * (95 - 20.5) / 1.5
    assert round(modified, 1) == 33.5
    assert (95 - robust.centre[0]) / robust.spread[0] == pytest.approx(modified, rel=1e-4)
    # as bands (the 95 judged against the 11 values before it) both flag it, but mean ± 3.5 SD
    # of the sample containing it would not: 3.168 < 3.5
    series_ = row([float(v) for v in values])
    for method in ("mean_sd", "median_mad"):
        got = METHODS[method](series_, band(method=method, window=11, min_points=6))
        assert got.high[0, 11] < 95


def test_mad_zero_falls_back_to_mean_absolute_deviation() -> None:
    history = [5.0] * 9 + [6.0, 9.0, 5.0]  # median 5, MAD 0; deviations sum to 5
    cfg = band(method="median_mad", window=12, exclude_flagged=False)
    got = median_mad(row([*history, 8.0]), cfg)
    assert got.method[0, 12] == "median_mad/meanad"
    deviations = [abs(x - statistics.median(history)) for x in history]
    assert statistics.median(deviations) == 0
    spread = MEANAD_TO_SD * statistics.mean(deviations)  # 1.253314 × 5/12
    assert got.centre[0, 12] == 5.0
    assert got.spread[0, 12] == pytest.approx(spread, rel=1e-12)
    assert got.high[0, 12] == pytest.approx(5 + 3.5 * spread, rel=1e-12)
    assert got.low[0, 12] == pytest.approx(5 - 3.5 * spread, rel=1e-12)


@pytest.mark.parametrize("level", [7.0, 0.0])
def test_flat_history_falls_back_to_poisson(level: float) -> None:
    got = median_mad(row([level] * 12 + [level + 1]), band(method="median_mad", window=12))
    assert got.method[0, 12] == "median_mad/poisson"
    assert got.low[0, 12] == stats.poisson.ppf(0.001, level)
    assert got.high[0, 12] == stats.poisson.ppf(0.999, level)
    assert got.spread[0, 12] == math.sqrt(level)
    if level == 7:
        assert (got.low[0, 12], got.high[0, 12]) == (1.0, 16.0)  # scipy, printed above
    else:
        assert (got.low[0, 12], got.high[0, 12]) == (0.0, 0.0)


@settings(max_examples=80, deadline=None)
@given(series(max_units=3, max_periods=20, max_value=400), st.integers(0, 10_000))
def test_median_mad_properties(values: np.ndarray, shift: int) -> None:
    """Centre within the window's range; band symmetric around it (before the floor at 0);
    adding a constant moves the centre and keeps the spread (exact on integer counts)."""
    cfg = band(method="median_mad", window=6, min_points=3, exclude_flagged=False)
    got = median_mad(values, cfg)
    moved = median_mad(values + shift, cfg)
    for u, t in zip(*np.nonzero(got.method != ""), strict=True):
        window = [x for x in values[u, max(0, t - 6) : t] if not math.isnan(x)]
        assert min(window) <= got.centre[u, t] <= max(window)
        if got.method[u, t] == "median_mad/poisson":
            continue  # a flat window: Poisson limits, not a symmetric band
        k_spread = cfg.k * got.spread[u, t]
        assert got.high[u, t] == got.centre[u, t] + k_spread
        assert got.low[u, t] == max(got.centre[u, t] - k_spread, 0.0)
        assert moved.method[u, t] == got.method[u, t]
        assert moved.centre[u, t] == got.centre[u, t] + shift
        assert moved.spread[u, t] == got.spread[u, t]


# ---- poisson: count quantiles ------------------------------------------------------------


@pytest.mark.parametrize("q", [1e-300, 1e-9, 0.001, 0.025, 0.5, 0.975, 0.999, 1 - 1e-12])
def test_poisson_quantile_against_scipy(q: float) -> None:
    rng = np.random.default_rng(1)
    lam = np.concatenate(
        [
            rng.uniform(0, 5, 3000),
            rng.uniform(0, 300, 3000),
            rng.uniform(0, 1e5, 300),
            [0.0, 0.5, 1.0, 2.0, 10.0, 20.0, 1e6, 3e7],
            np.arange(0, 60, 1 / 12),  # means of 12 counts repeat a lot
        ]
    )
    np.testing.assert_array_equal(poisson_quantile(q, lam), stats.poisson.ppf(q, lam))
    np.testing.assert_array_equal(poisson_quantile(q, lam[:5]), stats.poisson.ppf(q, lam[:5]))


@pytest.mark.parametrize("q", [1e-300, 1e-9, 0.001, 0.01, 0.5, 0.99, 0.999, 1 - 1e-12])
def test_nbinom_quantile_against_scipy(q: float) -> None:
    rng = np.random.default_rng(2)
    mean = np.concatenate([rng.uniform(0.01, 5, 3000), rng.uniform(0, 300, 3000), [1e5]])
    phi = np.concatenate([rng.uniform(1.0001, 3, 3000), rng.uniform(1.01, 80, 3000), [4.0]])
    expected = stats.nbinom.ppf(q, mean / (phi - 1), 1 / phi)  # Var = phi × mean
    np.testing.assert_array_equal(nbinom_quantile(q, mean, phi), expected)


def test_count_quantile_tables_in_methods_notes() -> None:
    """methods.md §4 (COMPUTED with scipy): exact Poisson and negative-binomial limits."""
    table = {  # λ: q(0.975), q(0.99), q(0.999)
        0.5: (2, 3, 4),
        1: (3, 4, 5),
        2: (5, 6, 8),
        3: (7, 8, 10),
        5: (10, 11, 13),
        10: (17, 18, 21),
    }
    for lam, limits in table.items():
        got = tuple(poisson_quantile(q, np.array([lam]))[0] for q in (0.975, 0.99, 0.999))
        assert got == limits, lam
    nb_table = [  # mean, dispersion, alpha, negative-binomial and Poisson 1 - alpha quantiles
        (10, 2, 0.01, 23, 18),
        (10, 2, 0.05, 18, 15),
        (5, 1.5, 0.01, 13, 11),
        (2, 3, 0.005, 13, 6),
    ]
    for mean, phi, alpha, nb, plain in nb_table:
        assert nbinom_quantile(1 - alpha, np.array([mean]), np.array([phi]))[0] == nb
        assert poisson_quantile(1 - alpha, np.array([mean]))[0] == plain


def test_poisson_mean_ten_has_upper_limit_21() -> None:
    """methods.md §4: the 99.9 % quantile of Poisson(10) is 21; 21 is inside, 22 outside."""
    got = poisson(row([10.0] * 12 + [21.0]), band(method="poisson"))
    assert got.method[0, 12] == "poisson"
    assert (got.centre[0, 12], got.high[0, 12]) == (10.0, 21.0)
    assert got.low[0, 12] == stats.poisson.ppf(0.001, 10) == 2.0
    assert got.spread[0, 12] == math.sqrt(10)
    assert not got.excluded[0, 12]  # 21 is not above 21
    got = poisson(row([10.0] * 12 + [22.0]), band(method="poisson"))
    assert got.excluded[0, 12]


def test_poisson_flags_a_drop_to_zero_but_not_small_count_noise() -> None:
    steady = [20.0, 22, 18, 21, 19, 20, 23, 17, 20, 21, 19, 20]  # variance/mean 0.14
    got = poisson(row([*steady, 0.0]), band(method="poisson"))
    assert got.method[0, 12] == "poisson" and got.centre[0, 12] == 20.0
    assert got.low[0, 12] == stats.poisson.ppf(0.001, 20.0) == 8.0
    assert got.low[0, 12] > 0.0  # a drop to 0 is flagged
    # mean − 3 SD would have flagged it too here, but at λ = 0.5 mean ± 3 SD flags noise:
    sparse = [0.0, 1, 0, 1, 0, 1, 0, 1, 0, 1, 0, 1]  # λ = 0.5
    for value, poisson_flags in ((2.0, False), (3.0, False), (4.0, False), (5.0, True)):
        got = poisson(row([*sparse, value]), band(method="poisson"))
        assert got.high[0, 12] == stats.poisson.ppf(0.999, 0.5) == 4.0
        assert (value > got.high[0, 12]) == poisson_flags
    plain = mean_sd(row([*sparse, 3.0]), band(exclude_flagged=False))
    assert plain.high[0, 12] < 3.0  # 0.5 + 3 × 0.52 = 2.07: mean ± 3 SD flags a 3


def test_poisson_uses_negative_binomial_when_over_dispersed() -> None:
    history = [3.0, 30, 8, 15, 40, 2, 22, 11, 35, 6, 18, 25]
    lam, var = statistics.mean(history), statistics.variance(history)
    phi = var / lam
    assert phi > 1.5
    got = poisson(row([*history, 50.0]), band(method="poisson"))
    assert got.method[0, 12] == "poisson/nbinom"
    n, p = lam / (phi - 1), 1 / phi
    assert got.centre[0, 12] == pytest.approx(lam, rel=1e-15)
    assert got.high[0, 12] == stats.nbinom.ppf(0.999, n, p)
    assert got.low[0, 12] == stats.nbinom.ppf(0.001, n, p)
    assert got.spread[0, 12] == pytest.approx(math.sqrt(var), rel=1e-12)
    assert stats.nbinom.mean(n, p) == pytest.approx(lam) and stats.nbinom.var(
        n, p
    ) == pytest.approx(var)
    # below the threshold the same history is Poisson
    wide = poisson(row([*history, 50.0]), band(method="poisson", dispersion_threshold=phi + 1))
    assert wide.method[0, 12] == "poisson"
    assert wide.high[0, 12] == stats.poisson.ppf(0.999, lam)


# ---- seasonal: historical limits -------------------------------------------------------------


def labels_of(columns: np.ndarray, t: int, periods: list[str]) -> set[str]:
    return {periods[c] for c in columns[t] if c != NO_PERIOD}


def test_seasonal_baseline_months_across_a_year_boundary() -> None:
    start = parse_period("2020-01", "month")
    periods = [
        format_period(o, "month") for o in range(start, parse_period("2026-01", "month") + 1)
    ]
    columns = seasonal_columns(len(periods), 5, 1)
    t = periods.index("2026-01")
    expected = {f"{y}-{m}" for y in range(2021, 2026) for m in ("01", "02")} | {
        f"{y}-12" for y in range(2020, 2025)
    }
    assert len(expected) == 15 and columns.shape[1] == 15
    assert labels_of(columns, t, periods) == expected  # Dec/Jan/Feb, 2021-01 .. 2025-02
    # a year earlier the data start in the middle of the fifth year's slots: 2019-12 is
    # not in the data, 2020-01 and 2020-02 are
    t = periods.index("2025-01")
    assert (columns[t] == NO_PERIOD).sum() == 1
    assert {"2020-01", "2020-02"} <= labels_of(columns, t, periods)
    assert len(labels_of(columns, t, periods)) == 14


def week_periods(first: str, last: str) -> tuple[np.ndarray, list[str]]:
    ordinals = np.arange(parse_period(first, "week"), parse_period(last, "week") + 1)
    return ordinals, [format_period(int(o), "week") for o in ordinals]


def test_seasonal_baseline_for_week_53() -> None:
    """2026 has 53 ISO weeks (methods.md §6); its week 53 maps to the week nearest the same
    calendar date in earlier years (Monday 28 December 2026 → Mondays 29 Dec 2025, 30 Dec
    2024, 25 Dec 2023, 26 Dec 2022, 27 Dec 2021), then ± 1 week."""
    ordinals, periods = week_periods("2020-W01", "2026-W53")
    t = periods.index("2026-W53")
    centres = ["2026-W01", "2025-W01", "2023-W52", "2022-W52", "2021-W52"]
    for y, centre in enumerate(centres, start=1):
        assert format_period(int(ordinals[t]) - weeks_back(int(ordinals[t]), y), "week") == centre
    expected = set()
    for centre in centres:
        c = periods.index(centre)
        expected |= {periods[c - 1], centre, periods[c + 1]}
    columns = seasonal_columns(len(periods), 5, 1, ordinals, "week")
    assert labels_of(columns, t, periods) == expected and len(expected) == 15
    assert {"2025-W52", "2026-W01", "2026-W02"} <= expected  # one year back, across New Year


def test_weeks_back_keeps_the_calendar_date() -> None:
    """For every week 2015-2032 and 1-5 years back: 52·y or 52·y + 1 weeks, landing within
    3 days of the same calendar date (checked with datetime, not our period code)."""
    ordinals, _ = week_periods("2015-W01", "2032-W53")
    for ordinal in ordinals:
        monday = date.fromordinal(int(ordinal) * 7 + 1)
        assert monday.isoweekday() == 1
        for y in range(1, 6):
            back = weeks_back(int(ordinal), y)
            assert back in (52 * y, 52 * y + 1)
            try:
                same_day = monday.replace(year=monday.year - y)
            except ValueError:  # 29 February
                same_day = monday.replace(year=monday.year - y, day=28)
            assert abs((monday - timedelta(weeks=back)) - same_day) <= timedelta(days=3)


def test_historical_limits_worked_example() -> None:
    """methods.md §3.1 (CONSTRUCTED/COMPUTED): 15 baseline totals → mean 10.8, SD 1.6125,
    mean + 2 SD = 14.0249; the current 18 (ratio 1.6667) is above the limit."""
    baseline = [10, 12, 9, 11, 13, 10, 8, 12, 11, 10, 9, 14, 12, 11, 10]
    t = 61  # 5 years and one month of history before t: every slot is in the data
    values = np.full((1, t + 1), np.nan)
    columns = seasonal_columns(t + 1, 5, 1)[t]
    assert (columns != NO_PERIOD).all()
    values[0, columns] = baseline
    values[0, t] = 18
    got = seasonal(values, band(method="seasonal", min_points=6))
    assert band(method="seasonal").k == 2.0  # 2 SD, as published
    assert got.method[0, t] == "seasonal" and got.points[0, t] == 15
    assert got.centre[0, t] == pytest.approx(10.8, abs=1e-12)
    assert round(got.spread[0, t], 4) == 1.6125
    assert round(got.high[0, t], 4) == 14.0249
    assert round(got.low[0, t], 4) == 7.5751
    assert round(1 - 2 * got.spread[0, t] / got.centre[0, t], 4) == 0.7014  # ratio limits
    assert round(1 + 2 * got.spread[0, t] / got.centre[0, t], 4) == 1.2986
    assert round(18 / got.centre[0, t], 4) == 1.6667 and got.high[0, t] < 18
    robust = seasonal(values, band(method="seasonal", robust=True, min_points=6))
    assert robust.method[0, t] == "seasonal/median_mad"
    assert robust.centre[0, t] == statistics.median(baseline)
    assert robust.spread[0, t] == pytest.approx(
        stats.median_abs_deviation(baseline, scale="normal"), rel=1e-12
    )


def test_seasonal_weekly_bands_use_the_dates() -> None:
    ordinals, periods = week_periods("2019-W01", "2026-W53")
    rng = np.random.default_rng(5)
    values = rng.poisson(30, size=(3, len(periods))).astype(float)
    cfg = band(method="seasonal", years=5, span=1, min_points=6, exclude_flagged=False)
    got = seasonal(values, cfg, periods=ordinals, kind="week")
    t = periods.index("2026-W53")
    columns = seasonal_columns(len(periods), 5, 1, ordinals, "week")[t]
    for u in range(3):
        window = [float(values[u, c]) for c in columns]
        assert got.centre[u, t] == pytest.approx(statistics.mean(window), rel=1e-12)
        assert got.spread[u, t] == pytest.approx(statistics.stdev(window), rel=1e-9)
    with pytest.raises(ValueError, match="period ordinals"):
        seasonal(values, cfg, kind="week")


def test_poisson_with_seasonal_baseline() -> None:
    t = 61
    values = np.full((1, t + 1), np.nan)
    columns = seasonal_columns(t + 1, 5, 1)[t]
    values[0, columns] = [10, 12, 9, 11, 13, 10, 8, 12, 11, 10, 9, 14, 12, 11, 10]
    got = poisson(values, band(method="poisson", baseline="seasonal"))
    assert got.method[0, t] == "poisson/seasonal"
    assert got.centre[0, t] == pytest.approx(10.8)
    assert got.high[0, t] == stats.poisson.ppf(0.999, 10.8)


# ---- no contamination: values outside their band are left out later ---------------------------


def reference(
    values: np.ndarray,
    cfg: BandConfig,
    columns: np.ndarray,
    keep: np.ndarray | None = None,
) -> list[list[tuple[float, float, float, float, int, str] | None]]:
    """The definition, cell by cell in pure Python with statistics and scipy.stats: learn
    periods in order; a value outside its own (non-zero-width) band leaves the history."""
    out = []
    for u in range(values.shape[0]):
        clean = [float(x) for x in values[u]]
        bands: list[tuple[float, float, float, float, int, str] | None] = []
        for t in range(len(clean)):
            window = [clean[c] for c in columns[t] if c != NO_PERIOD and not math.isnan(clean[c])]
            got = _reference_band(window, cfg)
            bands.append(got)
            x = clean[t]
            if got is None or math.isnan(x) or not cfg.exclude_flagged:
                continue
            _, _, low, high, _, _ = got
            if (x > high or x < low) and high > low and not (keep is not None and keep[u, t]):
                clean[t] = NAN
        out.append(bands)
    return out


def _reference_band(
    window: list[float], cfg: BandConfig
) -> tuple[float, float, float, float, int, str] | None:
    n = len(window)
    if n < cfg.min_points:
        return None
    name = cfg.method
    if cfg.method in ("mean_sd", "seasonal") and not (cfg.method == "seasonal" and cfg.robust):
        centre, spread = statistics.mean(window), statistics.stdev(window)
        return centre, spread, max(centre - cfg.k * spread, 0.0), centre + cfg.k * spread, n, name
    if cfg.method == "poisson":
        lam, var = statistics.mean(window), statistics.variance(window)
        if lam > 0 and var / lam > cfg.dispersion_threshold:
            phi = var / lam
            nb = stats.nbinom(lam / (phi - 1), 1 / phi)
            return lam, math.sqrt(var), nb.ppf(cfg.alpha), nb.ppf(1 - cfg.alpha), n, "nbinom"
        pois = stats.poisson(lam)
        return lam, math.sqrt(lam), pois.ppf(cfg.alpha), pois.ppf(1 - cfg.alpha), n, "poisson"
    median = statistics.median(window)
    deviations = [abs(x - median) for x in window]
    if statistics.median(deviations) > 0:
        spread, name = float(stats.median_abs_deviation(window, scale="normal")), "mad"
    elif sum(deviations) > 0:
        spread, name = math.sqrt(math.pi / 2) * statistics.mean(deviations), "meanad"
    else:
        pois = stats.poisson(median)
        return median, math.sqrt(median), pois.ppf(cfg.alpha), pois.ppf(1 - cfg.alpha), n, "flat"
    return median, spread, max(median - cfg.k * spread, 0.0), median + cfg.k * spread, n, name


def check_against_reference(values: np.ndarray, cfg: BandConfig, got: BandArrays) -> int:
    if cfg.method == "seasonal" or (cfg.method == "poisson" and cfg.baseline == "seasonal"):
        columns = seasonal_columns(values.shape[1], cfg.years, cfg.span)
    else:
        columns = window_columns(values.shape[1], cfg.window, cfg.gap)
    expected = reference(values, cfg, columns)
    excluded = 0
    for u, bands in enumerate(expected):
        for t, want in enumerate(bands):
            if want is None:
                assert got.method[u, t] == "" and math.isnan(got.centre[u, t]), (u, t)
                continue
            centre, spread, low, high, n, _ = want
            assert got.points[u, t] == n, (u, t)
            assert got.centre[u, t] == pytest.approx(centre, rel=1e-12, abs=1e-12), (u, t)
            assert got.spread[u, t] == pytest.approx(spread, rel=1e-9, abs=1e-9), (u, t)
            assert got.low[u, t] == pytest.approx(low, rel=1e-9, abs=1e-9), (u, t)
            assert got.high[u, t] == pytest.approx(high, rel=1e-9, abs=1e-9), (u, t)
        excluded += int(got.excluded[u].sum())
    return excluded


def messy_counts(seed: int, units: int = 8, periods: int = 40) -> np.ndarray:
    """Counts with typos (× 10, ÷ 10), flat stretches of zeros and missing reports."""
    rng = np.random.default_rng(seed)
    level = rng.choice([0.4, 3.0, 12.0, 60.0, 400.0], size=(units, 1))
    values = rng.poisson(level * rng.gamma(8, 1 / 8, size=(units, periods))).astype(float)
    typo = rng.random(values.shape) < 0.05
    values[typo] = np.where(
        rng.random(int(typo.sum())) < 0.5, values[typo] * 10, values[typo] // 10
    )
    values[rng.random(values.shape) < 0.08] = np.nan
    values[0, :14] = 0.0  # a flat history: zero-width bands
    return values


@pytest.mark.parametrize(
    "settings_",
    [
        {"method": "mean_sd"},
        {"method": "mean_sd", "window": 6, "gap": 2, "min_points": 4, "k": 2.5},
        {"method": "median_mad"},
        {"method": "median_mad", "window": 8, "min_points": 5, "k": 3.0},
        {"method": "poisson"},
        {"method": "poisson", "alpha": 0.01, "dispersion_threshold": 2.0},
        {"method": "seasonal", "years": 2, "span": 1, "min_points": 4},
        {"method": "seasonal", "years": 2, "span": 2, "min_points": 4, "robust": True},
        {"method": "poisson", "baseline": "seasonal", "years": 2, "min_points": 4},
    ],
)
@pytest.mark.parametrize("exclude", [True, False])
def test_methods_against_the_sequential_definition(
    settings_: dict[str, Any], exclude: bool
) -> None:
    for seed in (1, 2, 3):
        values = messy_counts(seed)
        cfg = band(**settings_, exclude_flagged=exclude)
        got = METHODS[cfg.method](values, cfg)
        excluded = check_against_reference(values, cfg, got)
        if not exclude:
            assert excluded == 0
        elif cfg.window == 12 and not cfg.seasonal_baseline:
            assert excluded > 0  # the typos were left out


def test_a_typo_no_longer_inflates_the_band() -> None:
    """A typo (200 for 20) three months before t: with exclusion the band at t is the one
    learned from the history without it, and a dropped digit at t is caught."""
    history = [20.0, 21, 19, 20, 22, 18, 20, 21, 19, 200, 20, 21]
    t = len(history)
    for method in ("mean_sd", "median_mad", "poisson"):
        cfg = band(method=method, window=12)
        got = METHODS[method](row([*history, 2.0]), cfg)
        assert got.excluded[0, 9] and got.excluded.sum() == 2  # the typo and the 2
        without = METHODS[method](
            row([*history[:9], NAN, *history[10:], 2.0]), band(method=method, exclude_flagged=False)
        )
        for field in ("centre", "spread", "low", "high", "points"):
            assert getattr(got, field)[0, t] == getattr(without, field)[0, t], (method, field)
        assert got.low[0, t] > 2.0, method  # the dropped digit is caught
    inflated = mean_sd(row([*history, 2.0]), band(exclude_flagged=False))
    assert inflated.low[0, t] == 0.0 and inflated.high[0, t] > 100  # masked without exclusion


def test_keep_marks_values_that_stay_in_the_baseline() -> None:
    history = [20.0, 21, 19, 20, 22, 18, 20, 21, 19, 200, 20, 21, 20]
    keep = np.zeros((1, len(history)), dtype=bool)
    keep[0, 9] = True  # acknowledged as correct: a real surge
    got = mean_sd(row(history), band(), keep=keep)
    plain = mean_sd(row(history), band(exclude_flagged=False))
    assert not got.excluded[0, 9]
    np.testing.assert_array_equal(got.high, plain.high)


def test_zero_width_bands_alert_but_exclude_nothing() -> None:
    """Twelve zeros give the Poisson band [0, 0]; the first case is flagged, but leaving it
    out would keep the band at [0, 0] for ever, so it enters the history."""
    values = row([0.0] * 12 + [1.0, 0.0, 1.0])
    got = poisson(values, band(method="poisson"))
    assert (got.low[0, 12], got.high[0, 12]) == (0.0, 0.0) and got.high[0, 12] < 1.0
    assert not got.excluded.any()
    assert got.centre[0, 13] == pytest.approx(1 / 12) and got.high[0, 14] >= 1.0


def test_learn_bands_passes_periods_and_keep(tmp_path: Path) -> None:
    from digest.bands import derive, learn_bands
    from digest.hierarchy import load_hierarchy
    from digest.loading import Dataset

    units = tmp_path / "units.csv"
    units.write_text("id,name,parent,level\nC,C,,country\nF1,F1,C,facility\nF2,F2,C,facility\n")
    raw = {
        "data": {
            "units": "units.csv",
            "values": "v.csv",
            "levels": ["country", "facility"],
            "period": "week",
        },
        "metric": [{"code": "m", "label": "M"}],
        "band": [
            {"name": "w", "metric": "m", "method": "seasonal", "levels": ["facility", "country"]}
        ],
    }
    config = config_from_dict(raw, tmp_path / "digest.toml")
    hierarchy = load_hierarchy(units, ["country", "facility"])
    ordinals, periods = week_periods("2019-W01", "2026-W53")
    values = np.random.default_rng(3).poisson(40, size=(2, len(periods))).astype(float)
    capture = hierarchy.at_level("facility")
    dataset = Dataset(hierarchy, "week", ordinals, capture, {"m": values})
    keep = {  # nothing left out anywhere: acknowledged as correct
        ("w", "facility"): np.ones(values.shape, dtype=bool),
        ("w", "country"): np.ones((1, len(periods)), dtype=bool),
    }
    bands = learn_bands(config, dataset, derive(config, dataset.values), keep=keep)
    direct = seasonal(
        values, config.band[0], periods=ordinals, kind="week", keep=keep[("w", "facility")]
    )
    np.testing.assert_array_equal(bands[("w", "facility")].centre, direct.centre)
    assert not bands[("w", "facility")].excluded.any()
    assert not bands[("w", "country")].excluded.any()
    country = bands[("w", "country")]
    t = periods.index("2026-W53")
    cols = seasonal_columns(len(periods), 5, 1, ordinals, "week")[t]
    assert country.centre[0, t] == pytest.approx(values[:, cols].sum(axis=0).mean())


def test_no_periods_and_no_units() -> None:
    for method in METHODS:
        cfg = band(method=method)
        for shape in ((0, 10), (3, 0)):
            got = METHODS[method](np.zeros(shape), cfg)
            assert got.centre.shape == shape and got.method.shape == shape


# ---- configuration -----------------------------------------------------------------------------


def test_k_defaults_per_method() -> None:
    assert [band(method=m).k for m in ("mean_sd", "median_mad", "seasonal")] == [3.0, 3.5, 2.0]
    assert band(method="median_mad", k=3.0).k == 3.0
    assert band().exclude_flagged is True
    assert (band().alpha, band().dispersion_threshold, band().years, band().span) == (
        0.001,
        1.5,
        5,
        1,
    )
    with pytest.raises(ValueError, match="method"):
        band(method="farrington")
    with pytest.raises(ValueError, match="k"):
        band(k=0)


def _raw(**band_settings: Any) -> dict[str, Any]:
    return {
        "data": {"units": "u.csv", "values": "v.csv", "levels": ["country", "facility"]},
        "metric": [{"code": "m", "label": "M"}],
        "band": [{"name": "b", "metric": "m", "levels": ["facility"], **band_settings}],
    }


@pytest.mark.parametrize(
    ("settings_", "message"),
    [
        ({"method": "mean_sd", "robust": True}, "band[0].robust: not read by method 'mean_sd'"),
        ({"method": "poisson", "k": 3.0}, "band[0].k: not read by method 'poisson'"),
        ({"method": "poisson", "years": 3}, "band[0].years: not read by method 'poisson' with"),
        ({"method": "seasonal", "window": 12}, "band[0].window: not read by method 'seasonal'"),
        ({"method": "median_mad", "span": 2}, "band[0].span"),
        ({"method": "seasonal", "years": 1, "span": 1}, "more than the 3 values"),
        ({"method": "seasonal", "span": 6}, "band[0].span: 6 periods either side"),
        ({"method": "median_mad", "min_points": 13}, "more than window = 12"),
    ],
)
def test_config_rejects_keys_the_method_ignores(
    settings_: dict[str, Any], message: str, tmp_path: Path
) -> None:
    with pytest.raises(ConfigError) as caught:
        config_from_dict(_raw(**settings_), tmp_path / "digest.toml")
    assert message in str(caught.value)


@pytest.mark.parametrize(
    "settings_",
    [
        {"method": "median_mad", "alpha": 0.01},
        {"method": "seasonal", "robust": True, "alpha": 0.01, "years": 3, "span": 1},
        {"method": "poisson", "baseline": "seasonal", "years": 3, "span": 2},
        {"method": "poisson", "window": 24, "gap": 1, "alpha": 0.005, "exclude_flagged": False},
    ],
)
def test_config_accepts_each_methods_keys(settings_: dict[str, Any], tmp_path: Path) -> None:
    config = config_from_dict(_raw(**settings_), tmp_path / "digest.toml")
    assert config.band[0].unused_keys() == []


def test_weekly_span_limit(tmp_path: Path) -> None:
    raw = _raw(method="seasonal", span=20)
    raw["data"]["period"] = "week"
    assert config_from_dict(raw, tmp_path / "d.toml").band[0].span == 20
    raw["band"][0]["span"] = 26
    with pytest.raises(ConfigError, match="at most 25"):
        config_from_dict(raw, tmp_path / "d.toml")


@settings(max_examples=30, deadline=None)
@given(st.integers(1, 5), st.integers(0, 3))
def test_seasonal_columns_are_strictly_in_the_past(years: int, span: int) -> None:
    columns = seasonal_columns(80, years, span)
    t = np.arange(80)[:, None]
    valid = columns != NO_PERIOD
    assert ((columns < t) | ~valid).all() and (columns[valid] >= 0).all()
    assert columns.shape[1] == years * (2 * span + 1)
    # the slots of each year are 12 periods apart, the same period ± span
    offsets = (t - columns)[valid.all(axis=1)]
    expected = [12 * y - s for y in range(1, years + 1) for s in range(-span, span + 1)]
    assert all(list(o) == expected for o in offsets)


def test_commented_band_examples_in_the_reference_config_are_valid() -> None:
    """The commented [[band]] blocks of config/digest.toml pass validation when uncommented."""
    import tomllib

    reference = Path(__file__).resolve().parent.parent / "config" / "digest.toml"
    text = reference.read_text(encoding="utf-8")
    raw = tomllib.loads(text)
    lines = text.splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("# Other methods"))
    block = []
    for line in lines[start + 1 :]:
        if not line.startswith("#"):
            break
        block.append(line[2:] if line.startswith("# ") else "")
    examples = tomllib.loads("\n".join(block))["band"]
    assert {b["method"] for b in examples} == {"median_mad", "seasonal", "poisson"}
    raw["band"] += examples
    config = config_from_dict(raw, reference)
    assert [b.method for b in config.band][-3:] == ["median_mad", "seasonal", "poisson"]


@pytest.mark.parametrize("method", ["mean_sd", "median_mad", "poisson"])
def test_a_lasting_step_is_learned_again_after_the_window(method: str) -> None:
    """The limit README documents: after a real tripling, window 12 and min_points 6 give 7
    alerts in a row (the new values are left out), then 6 periods without a band, then a
    band learned from the new level."""
    rng = np.random.default_rng(0)
    values = np.concatenate([rng.poisson(20, 24), rng.poisson(60, 24)]).astype(float)[None, :]
    got = METHODS[method](values, band(method=method))
    outside = (values > got.high) | (values < got.low)
    assert outside[0, 24:31].all() and got.excluded[0, 24:31].all()
    assert (got.method[0, 31:37] == "").all()  # fewer than 6 values left in the window
    assert not outside[0, 37:].any() and got.centre[0, 40] > 50
