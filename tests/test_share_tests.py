"""Shares on small denominators: the Wilson score interval and test = "binomial"."""

from __future__ import annotations

import itertools
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import EXAMPLE_TOML, LEVELS
from statsmodels.stats.proportion import proportion_confint

from digest.bands import derive, learn_bands
from digest.config import BoundsCheck, Config, config_from_dict, load_config
from digest.errors import ConfigError
from digest.evaluate import evaluate, wilson_interval
from digest.hierarchy import Hierarchy, load_hierarchy
from digest.loading import Dataset
from digest.periods import parse_period
from digest.rollup import rollup

ROOT = Path(__file__).resolve().parents[1]
NAN = float("nan")
METRICS = (
    "anc1_visits",
    "anc4_visits",
    "penta1_doses",
    "penta3_doses",
    "malaria_cases_u5",
    "malaria_cases_5plus",
)


def make_config(tmp_path: Path, checks: list[dict[str, Any]]) -> Config:
    raw: dict[str, Any] = {
        "data": {"units": "units.csv", "values": "values.csv", "levels": list(LEVELS)},
        "metric": [{"code": code, "label": code.replace("_", " ")} for code in METRICS],
        "check": [{"severity": "notice", "programme": "test", **c} for c in checks],
    }
    return config_from_dict(raw, tmp_path / "digest.toml")


@pytest.fixture
def hierarchy(write_units: Callable[..., Path]) -> Hierarchy:
    return load_hierarchy(write_units(), LEVELS)


def run(config: Config, h: Hierarchy, values: dict[str, dict[str, float]]) -> pd.DataFrame:
    """One period: ``values[metric][facility]``; absent facilities did not report."""
    capture = h.at_level("facility")
    arrays = {
        code: np.array([[values.get(code, {}).get(h.ids[u], NAN)] for u in capture], dtype=float)
        for code in METRICS
    }
    ordinal = parse_period("2024-04", "month")
    dataset = Dataset(h, "month", np.array([ordinal]), capture, arrays)
    series = derive(config, dataset.values)
    levels = rollup(dataset, series, config.data.levels)
    return evaluate(config, h, levels, learn_bands(config, dataset, series), 0, "2024-04")


# ---- the interval -----------------------------------------------------------------------------


def test_wilson_interval_matches_statsmodels() -> None:
    """Reference: statsmodels proportion_confint(method="wilson") over a grid."""
    grid = [
        (x, n, conf)
        for n in (1, 2, 5, 20, 45, 200, 1000)
        for x in sorted({0, 1, n // 3, n // 2, n - 1, n} - {-1})
        for conf in (0.8, 0.9, 0.95, 0.99, 0.999)
        if 0 <= x <= n
    ]
    x, n, conf = (np.array(v, dtype=float) for v in zip(*grid, strict=True))
    for level in np.unique(conf):
        pick = conf == level
        low, high = wilson_interval(x[pick], n[pick], float(level))
        ref_low, ref_high = proportion_confint(
            x[pick], n[pick], alpha=1 - float(level), method="wilson"
        )
        np.testing.assert_allclose(low, ref_low, rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(high, ref_high, rtol=1e-12, atol=1e-14)
    assert len(grid) > 150


def test_wilson_interval_scalar_and_no_trials() -> None:
    low, high = wilson_interval(120, 200, 0.99)
    ref = proportion_confint(120, 200, alpha=0.01, method="wilson")
    assert (float(low), float(high)) == pytest.approx(ref, rel=1e-12)
    low, high = wilson_interval(np.array([0.0, 3.0]), np.array([0.0, -1.0]))
    assert np.isnan(low).all() and np.isnan(high).all()


# ---- bounds -----------------------------------------------------------------------------------

SHARE = {
    "name": "malaria_u5_share",
    "kind": "bounds",
    "numerator": "malaria_cases_u5",
    "denominator": "malaria_cases_u5 + malaria_cases_5plus",
    "max": 35,  # under-five share upper limit: a fixture value (methods.md §5: configurable)
    "test": "binomial",
    "levels": ["facility"],
}


def test_binomial_bounds_fires_on_a_large_sample_only(tmp_path: Path, hierarchy: Hierarchy) -> None:
    cases = {"F1": (120, 80), "F2": (9, 11)}  # 60 % of 200 and 45 % of 20
    values = {
        "malaria_cases_u5": {u: float(c[0]) for u, c in cases.items()},
        "malaria_cases_5plus": {u: float(c[1]) for u, c in cases.items()},
    }
    expected = set()
    for unit, (u5, o5) in cases.items():
        low, _ = proportion_confint(u5, u5 + o5, alpha=0.01, method="wilson")
        if low * 100 > 35:
            expected.add(unit)
    assert expected == {"F1"}  # the reference decides; this states what it decided
    alerts = run(make_config(tmp_path, [SHARE]), hierarchy, values)
    assert set(alerts["unit"]) == expected
    alert = alerts.iloc[0]
    assert alert["value"] == 60.0 and alert["high"] == 35
    low, high = proportion_confint(120, 200, alpha=0.01, method="wilson")
    assert alert["detail"] == (
        f"malaria cases u5: 60 % of 200, above 35 % with 99 % confidence "
        f"(Wilson interval {low * 100:.1f}–{high * 100:.1f} %)"
    )
    # the plain test alerts on both
    plain = make_config(tmp_path, [{**SHARE, "test": "plain"}])
    assert set(run(plain, hierarchy, values)["unit"]) == {"F1", "F2"}


@pytest.mark.parametrize("confidence", [0.8, 0.95, 0.99, 0.999])
def test_binomial_bounds_both_limits_follow_statsmodels(
    tmp_path: Path, hierarchy: Hierarchy, confidence: float
) -> None:
    cases = {"F1": (2, 48), "F2": (10, 40), "F3": (30, 20), "F4": (3, 2), "F6": (55, 45)}
    limits = (15.0, 45.0)
    values = {
        "malaria_cases_u5": {u: float(c[0]) for u, c in cases.items()},
        "malaria_cases_5plus": {u: float(c[1]) for u, c in cases.items()},
    }
    check = {**SHARE, "min": limits[0], "max": limits[1], "confidence": confidence}
    alerts = run(make_config(tmp_path, [check]), hierarchy, values)
    expected = set()
    for unit, (x, rest) in cases.items():
        low, high = proportion_confint(x, x + rest, alpha=1 - confidence, method="wilson")
        if low * 100 > limits[1] or high * 100 < limits[0]:
            expected.add(unit)
    assert set(alerts["unit"]) == expected
    below = alerts[alerts["value"] < limits[0]]
    assert all(f"below 15 % with {confidence * 100:g} % confidence" in d for d in below["detail"])


def test_binomial_bounds_numerator_above_denominator_stays_plain(
    tmp_path: Path, hierarchy: Hierarchy
) -> None:
    check = {**SHARE, "numerator": "anc4_visits", "denominator": "anc1_visits", "max": 100}
    values = {"anc4_visits": {"F1": 12.0, "F2": 5.0}, "anc1_visits": {"F1": 10.0, "F2": 0.0}}
    alerts = run(make_config(tmp_path, [check]), hierarchy, values)
    assert alerts["unit"].tolist() == ["F1"]  # 120 %; F2 divides by zero: missing
    assert alerts.iloc[0]["value"] == 120.0
    assert "(numerator above denominator: not a share)" in alerts.iloc[0]["detail"]


def test_binomial_bounds_on_district_totals(tmp_path: Path, hierarchy: Hierarchy) -> None:
    values = {
        "malaria_cases_u5": {"F1": 50.0, "F2": 40.0, "F3": 30.0, "F4": 4.0},
        "malaria_cases_5plus": {"F1": 30.0, "F2": 30.0, "F3": 20.0, "F4": 2.0},
    }
    check = {**SHARE, "levels": ["district"]}
    alerts = run(make_config(tmp_path, [check]), hierarchy, values)
    # D1: 120 of 200 (60 %) -> alert; D2: 4 of 6 (67 %) -> not sure enough
    assert alerts["unit"].tolist() == ["D1"]
    assert alerts.iloc[0]["detail"].endswith("; 3 of 3 facilities reported")


# ---- dropout ----------------------------------------------------------------------------------

DROPOUT = {
    "name": "penta_dropout",
    "kind": "dropout",
    "first": "penta1_doses",
    "last": "penta3_doses",
    "min": 0,
    "max": 10,  # UNICEF, The Progress of Nations 2000: dropout above 10 % is high
    "test": "binomial",
    "levels": ["facility"],
}


def test_binomial_dropout(tmp_path: Path, hierarchy: Hierarchy) -> None:
    doses = {
        "F1": (20, 15),  # 25 % of 20
        "F2": (200, 150),  # 25 % of 200
        "F3": (20, 25),  # negative dropout: a plain check
        "F4": (20, 14),  # 30 % of 20
    }
    values = {
        "penta1_doses": {u: float(d[0]) for u, d in doses.items()},
        "penta3_doses": {u: float(d[1]) for u, d in doses.items()},
    }
    expected = {"F3"}
    for unit, (first, last) in doses.items():
        if last <= first:
            low, _ = proportion_confint(first - last, first, alpha=0.01, method="wilson")
            if low * 100 > 10:
                expected.add(unit)
    assert expected == {"F2", "F3", "F4"}
    alerts = run(make_config(tmp_path, [DROPOUT]), hierarchy, values).set_index("unit")
    assert set(alerts.index) == expected
    assert "25.0 %, above 10 % with 99 % confidence (Wilson interval" in alerts.loc["F2", "detail"]
    assert "more last doses than first doses" in alerts.loc["F3", "detail"]
    assert "confidence" not in alerts.loc["F3", "detail"]
    plain = make_config(tmp_path, [{**DROPOUT, "test": "plain"}])
    assert set(run(plain, hierarchy, values)["unit"]) == {"F1", "F2", "F3", "F4"}


def test_scores_grow_with_certainty(tmp_path: Path, hierarchy: Hierarchy) -> None:
    values = {
        "penta1_doses": {"F1": 50.0, "F2": 500.0},
        "penta3_doses": {"F1": 25.0, "F2": 250.0},  # both 50 %
    }
    alerts = run(make_config(tmp_path, [DROPOUT]), hierarchy, values).set_index("unit")
    assert alerts.loc["F2", "score"] > alerts.loc["F1", "score"] > 0


# ---- configuration ----------------------------------------------------------------------------


def _problems(tmp_path: Path, check: dict[str, Any]) -> list[str]:
    with pytest.raises(ConfigError) as info:
        make_config(tmp_path, [check])
    return info.value.problems


@pytest.mark.parametrize(
    ("change", "key", "words"),
    [
        ({"numerator": None, "denominator": None}, "check[0].test", "needs numerator"),
        ({"denominator": None}, "check[0].denominator", "required with numerator"),
        ({"expr": "anc1_visits"}, "check[0].expr", "not used with numerator"),
        ({"numerator": "malaria_cases_u6"}, "check[0].numerator", "malaria_cases_u6"),
        ({"confidence": 1.5}, "check[0].confidence", "less than 1"),
        ({"test": "exact"}, "check[0].test", "'plain' or 'binomial'"),
    ],
)
def test_binomial_config_problems(
    tmp_path: Path, change: dict[str, Any], key: str, words: str
) -> None:
    check = {k: v for k, v in {**SHARE, **change}.items() if v is not None}
    problems = _problems(tmp_path, check)
    assert len(problems) == 1, problems
    assert f"digest.toml: {key}" in problems[0] and words in problems[0]


def test_bounds_without_expr_or_share(tmp_path: Path) -> None:
    check = {"name": "x", "kind": "bounds", "max": 1, "levels": ["facility"]}
    assert _problems(tmp_path, check) == [
        f"{tmp_path / 'digest.toml'}: check[0].expr: required key is missing "
        "(or give numerator and denominator)"
    ]


def test_share_config_derives_the_expression(tmp_path: Path) -> None:
    config = make_config(tmp_path, [SHARE])
    check = config.check[0]
    assert isinstance(check, BoundsCheck)
    assert check.expr is None and check.confidence == 0.99 and check.min_completeness == 0.8
    assert check.value_expr == "malaria_cases_u5 / (malaria_cases_u5 + malaria_cases_5plus) * 100"


@pytest.mark.parametrize(
    "path", [EXAMPLE_TOML, ROOT / "demo" / "config.toml", ROOT / "config" / "digest.toml"]
)
def test_existing_configs_still_load(path: Path) -> None:
    config = load_config(path)
    kinds = {c.kind: c for c in config.check}
    assert kinds["bounds"].test == "plain" and kinds["dropout"].test == "plain"
    assert config.tuning.max_alerts_per_digest == 15


def test_every_combination_of_share_keys_is_judged(tmp_path: Path) -> None:
    """No combination of expr / numerator / denominator / test passes unjudged."""
    keys = ("expr", "numerator", "denominator")
    for present in itertools.product((False, True), repeat=3):
        for test in ("plain", "binomial"):
            check = {"name": "x", "kind": "bounds", "max": 1, "levels": ["facility"], "test": test}
            check |= {k: "anc1_visits" for k, p in zip(keys, present, strict=True) if p}
            expr, num, den = present
            ok = (expr and not num and not den and test == "plain") or (num and den and not expr)
            if ok:
                make_config(tmp_path, [check])
            else:
                assert len(_problems(tmp_path, check)) == 1
