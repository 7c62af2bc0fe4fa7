"""Stage 3 (checks -> alerts) and the pipeline that sequences load and the three stages."""

from __future__ import annotations

import statistics
from collections.abc import Callable
from fractions import Fraction
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import LEVELS, SMALL_UNITS, write_csv
from hypothesis import given, settings
from hypothesis import strategies as st

from digest.bands import derive, learn_bands
from digest.config import BoundsCheck, Config, DropoutCheck, config_from_dict
from digest.errors import DataError, StageError
from digest.evaluate import evaluate
from digest.hierarchy import Hierarchy, build_hierarchy, load_hierarchy
from digest.loading import Dataset
from digest.periods import format_period, parse_period
from digest.pipeline import STAGES, run_pipeline
from digest.rollup import rollup

NAN = float("nan")
METRICS = (
    "anc1_visits",
    "anc4_visits",
    "penta1_doses",
    "penta3_doses",
    "malaria_cases_u5",
    "malaria_cases_5plus",
)


def make_config(
    tmp_path: Path, checks: list[dict[str, Any]], bands: list[dict[str, Any]] | None = None
) -> Config:
    raw: dict[str, Any] = {
        "data": {"units": "units.csv", "values": "values.csv", "levels": list(LEVELS)},
        "metric": [{"code": code, "label": code.replace("_", " ")} for code in METRICS],
        "band": bands or [],
        "check": [{"severity": "warning", "programme": "test", **c} for c in checks],
    }
    return config_from_dict(raw, tmp_path / "digest.toml")


@pytest.fixture
def hierarchy(write_units: Callable[..., Path]) -> Hierarchy:
    return load_hierarchy(write_units(), LEVELS)


def run_checks(
    config: Config,
    hierarchy: Hierarchy,
    values: dict[str, dict[str, list[float]]],
    last_month: str = "2024-04",
) -> pd.DataFrame:
    """Evaluate ``config``'s checks for ``last_month``, given per-facility series ending there."""
    length = max(len(v) for per_unit in values.values() for v in per_unit.values())
    end = parse_period(last_month, "month")
    periods = np.arange(end - length + 1, end + 1)
    capture = hierarchy.at_level("facility")
    arrays = {
        code: np.array(
            [values.get(code, {}).get(hierarchy.ids[u], [NAN] * length) for u in capture],
            dtype=float,
        )
        for code in METRICS
    }
    dataset = Dataset(hierarchy, "month", periods, capture, arrays)
    series = derive(config, dataset.values)
    bands = learn_bands(config, dataset, series)
    levels = rollup_levels(dataset, series, config)
    return evaluate(config, hierarchy, levels, bands, length - 1, last_month)


def rollup_levels(dataset: Dataset, series: dict[str, np.ndarray], config: Config) -> Any:
    return rollup(dataset, series, config.data.levels)


def by_unit(alerts: pd.DataFrame) -> dict[str, pd.Series]:
    return {row["unit"]: row for _, row in alerts.iterrows()}


# ---- dropout ------------------------------------------------------------------------------

DROPOUT = {
    "name": "penta_dropout",
    "kind": "dropout",
    "first": "penta1_doses",
    "last": "penta3_doses",
    "min": 0,
    "max": 10,  # UNICEF, The Progress of Nations 2000: dropout above 10 % signals a problem
    "levels": ["facility"],
}


def test_dropout(tmp_path: Path, hierarchy: Hierarchy) -> None:
    # methods.md §2 constructed cases (first, last) -> dropout
    pairs = {
        "F1": (1000, 850),  # 15 %   -> alert: above 10 %
        "F2": (400, 370),  # 7.5 %  -> no alert
        "F3": (500, 520),  # -4 %   -> alert: below 0 (negative dropout is a data-quality
        #                      flag: methods.md §2, from memory / common practice)
        "F4": (200, 180),  # 10 %   -> NOT an alert: "above 10 %" is strict
        "F5": (0, 3),  # first = 0 -> undefined, skipped
        "F6": (NAN, 5),  # first missing -> skipped
    }
    values = {
        "penta1_doses": {u: [p[0]] for u, p in pairs.items()},
        "penta3_doses": {u: [p[1]] for u, p in pairs.items()},
    }
    # the constructed cases are what they claim, in exact arithmetic
    exact = {u: Fraction(f - la, f) * 100 for u, (f, la) in pairs.items() if f == f and f > 0}
    assert exact == {"F1": 15, "F2": Fraction(15, 2), "F3": -4, "F4": 10}
    alerts = by_unit(run_checks(make_config(tmp_path, [DROPOUT]), hierarchy, values))
    assert set(alerts) == {u for u, d in exact.items() if d > 10 or d < 0} == {"F1", "F3"}
    for unit, expected in (("F1", Fraction(15)), ("F3", Fraction(-4))):
        first, last = pairs[unit]
        assert Fraction(first - last, first) * 100 == expected  # exact reference
        assert alerts[unit]["value"] == float(expected)
        assert alerts[unit]["low"] == 0 and alerts[unit]["high"] == 10
    assert "15.0 %, above 10 %" in alerts["F1"]["detail"]
    assert "-4.0 %, below 0 %" in alerts["F3"]["detail"]
    assert "more last doses than first doses" in alerts["F3"]["detail"]
    assert alerts["F1"]["kind"] == "dropout" and alerts["F1"]["check"] == "penta_dropout"


def test_dropout_missing_last_is_skipped(tmp_path: Path, hierarchy: Hierarchy) -> None:
    values = {"penta1_doses": {"F1": [100]}, "penta3_doses": {"F1": [NAN]}}
    assert run_checks(make_config(tmp_path, [DROPOUT]), hierarchy, values).empty


def test_dropout_when_suppresses_small_denominators(tmp_path: Path, hierarchy: Hierarchy) -> None:
    check = {**DROPOUT, "when": "penta1_doses >= 20"}
    values = {
        "penta1_doses": {"F1": [15], "F2": [20]},
        "penta3_doses": {"F1": [5], "F2": [10]},  # both 50 % (F1: 66.7 %)
    }
    alerts = run_checks(make_config(tmp_path, [check]), hierarchy, values)
    assert alerts["unit"].tolist() == ["F2"]


@pytest.mark.parametrize(("first", "last"), [(50, 43), (25, 18), (20, 9), (75, 54), (30, 27)])
def test_dropout_exactly_at_a_limit_is_not_an_alert(
    tmp_path: Path, hierarchy: Hierarchy, first: int, last: int
) -> None:
    exact = Fraction(first - last, first) * 100  # fractions: the exact percentage
    assert exact.denominator == 1
    check = {**DROPOUT, "max": int(exact), "min": 0}
    values = {"penta1_doses": {"F1": [first]}, "penta3_doses": {"F1": [last]}}
    assert run_checks(make_config(tmp_path, [check]), hierarchy, values).empty
    check = {**DROPOUT, "max": int(exact) - 1, "min": 0}
    assert len(run_checks(make_config(tmp_path, [check]), hierarchy, values)) == 1


_HIERARCHY = build_hierarchy(
    "units.csv",
    [(i + 2, dict(zip(("id", "name", "parent", "level", "opened", "closed"), r, strict=True)))
     for i, r in enumerate(SMALL_UNITS)],
    LEVELS,
)  # fmt: skip


@settings(max_examples=20, deadline=None)
@given(
    st.lists(st.integers(1, 5000), min_size=6, max_size=6),
    st.lists(st.floats(0, 1), min_size=6, max_size=6),
    st.integers(0, 100),
)
def test_dropout_boundary_property(firsts: list[int], shares: list[float], limit: int) -> None:
    """For counts, an alert is raised exactly when the exact dropout is above max or below 0."""
    lasts = [round(f * s * 1.1) for f, s in zip(firsts, shares, strict=True)]  # some above first
    for i in range(0, 6, 2):  # make half the dropouts hit the limit exactly where they can
        if firsts[i] * limit % 100 == 0:
            lasts[i] = firsts[i] - firsts[i] * limit // 100
    config = make_config(Path("memory"), [{**DROPOUT, "max": limit}])
    units = [_HIERARCHY.ids[u] for u in _HIERARCHY.at_level("facility")]
    values = {
        "penta1_doses": {u: [float(f)] for u, f in zip(units, firsts, strict=True)},
        "penta3_doses": {u: [float(x)] for u, x in zip(units, lasts, strict=True)},
    }
    alerts = set(run_checks(config, _HIERARCHY, values)["unit"])
    for unit, first, last in zip(units, firsts, lasts, strict=True):
        exact = Fraction(first - last, first) * 100  # fractions: exact arithmetic
        assert (unit in alerts) == (exact > limit or exact < 0), (first, last, limit)


def test_dropout_exactly_at_every_whole_limit(tmp_path: Path) -> None:
    """Every whole-percent max from 0 to 100 (one period each), with 10 facilities whose
    dropout is exactly that limit: none may alert."""
    rows = [(2, {"id": "C", "name": "C", "parent": "", "level": "country"})]
    rows += [(3, {"id": "P", "name": "P", "parent": "C", "level": "province"})]
    rows += [(4, {"id": "D", "name": "D", "parent": "P", "level": "district"})]
    rows += [
        (5 + k, {"id": f"F{k}", "name": f"F{k}", "parent": "D", "level": "facility"})
        for k in range(1, 11)
    ]
    h = build_hierarchy("units.csv", rows, LEVELS)
    limits = np.arange(101)
    step = 100 // np.gcd(limits, 100)  # smallest first-dose count giving a whole count
    first = np.arange(1, 11)[:, None] * step[None, :]
    last = first - first * limits[None, :] // 100
    for k, limit in [(0, 7), (4, 14), (9, 58), (2, 100)]:  # spot checks with exact fractions
        assert Fraction(int(first[k, limit] - last[k, limit]), int(first[k, limit])) * 100 == limit
    capture = h.at_level("facility")
    arrays = {code: np.full(first.shape, np.nan) for code in METRICS}
    arrays["penta1_doses"], arrays["penta3_doses"] = first.astype(float), last.astype(float)
    dataset = Dataset(h, "month", np.arange(24000, 24101), capture, arrays)
    base = make_config(tmp_path, [DROPOUT])
    levels = rollup_levels(dataset, derive(base, arrays), base)
    for limit in limits:
        check = DropoutCheck.model_validate({**DROPOUT, "max": int(limit), "programme": "p"})
        config = base.model_copy(update={"check": [check]})
        alerts = evaluate(config, h, levels, {}, int(limit), f"column {limit}")
        assert alerts.empty, (limit, alerts[["unit", "value"]].head(3).to_dict("records"))


# ---- bounds: under-five share of malaria cases ---------------------------------------------

U5_SHARE = {
    "name": "malaria_u5_share",
    "kind": "bounds",
    "expr": "malaria_cases_u5 / (malaria_cases_u5 + malaria_cases_5plus) * 100",
    "min": 0,
    "max": 35,  # under-five share around 30 %, 35 % upper limit: common practice, no source
    "when": "malaria_cases_u5 + malaria_cases_5plus >= 20",
    "severity": "notice",
    "levels": ["facility", "district"],
}


def test_under_five_share(tmp_path: Path, hierarchy: Hierarchy) -> None:
    cases = {  # (under five, five and over)
        "F1": (30, 70),  # 30 % -> no alert
        "F2": (40, 60),  # 40 % -> alert
        "F3": (4, 6),  # 40 % of only 10 cases -> `when` suppresses it
        "F4": (35, 65),  # exactly 35 % -> no alert (strict)
        "F5": (12, NAN),  # an input missing -> the check does not apply
        "F6": (0, 0),  # 0 / 0 -> missing, and fewer than 20 cases anyway
    }
    values = {
        "malaria_cases_u5": {u: [c[0]] for u, c in cases.items()},
        "malaria_cases_5plus": {u: [c[1]] for u, c in cases.items()},
    }
    alerts = run_checks(make_config(tmp_path, [U5_SHARE]), hierarchy, values)
    facility = by_unit(alerts[alerts["level"] == "facility"])
    assert set(facility) == {"F2"}
    assert facility["F2"]["value"] == float(Fraction(40, 100) * 100)
    assert facility["F2"]["high"] == 35 and facility["F2"]["severity"] == "notice"
    assert "above the upper limit 35" in facility["F2"]["detail"]
    # districts use district totals; each metric's total counts the children that reported it
    frame = pd.DataFrame(
        [(u, c[0], c[1]) for u, c in cases.items()], columns=["unit", "u5", "o5"]
    ).assign(district=lambda f: f["unit"].map({r[0]: r[2] for r in SMALL_UNITS}))
    sums = frame.groupby("district")[["u5", "o5"]].sum(min_count=1)
    share = sums["u5"] / (sums["u5"] + sums["o5"]) * 100
    expected_districts = {
        d for d in share.index if share[d] > 35 and sums.loc[d, "u5"] + sums.loc[d, "o5"] >= 20
    }
    assert set(alerts[alerts["level"] == "district"]["unit"]) == expected_districts
    # by hand: D1 74 of 210 = 35.2 %; D2 (35 + 12) of (35 + 12 + 65) = 42 %; D3 has 0 cases
    assert expected_districts == {"D1", "D2"}


# ---- relation -------------------------------------------------------------------------------

RELATION = {
    "name": "anc4_above_anc1",
    "kind": "relation",
    "expr": "anc4_visits <= anc1_visits",
    "levels": ["facility", "district"],
}


def test_relation(tmp_path: Path, hierarchy: Hierarchy) -> None:
    anc = {  # (anc1, anc4)
        "F1": (10, 12),  # fourth visits above first visits -> alert
        "F2": (10, 10),  # equal holds
        "F3": (10, NAN),  # anc4 missing -> no alert
        "F4": (NAN, 9),  # anc1 missing -> no alert
        "F6": (10, 5),
    }
    values = {
        "anc1_visits": {u: [a[0]] for u, a in anc.items()},
        "anc4_visits": {u: [a[1]] for u, a in anc.items()},
    }
    alerts = run_checks(make_config(tmp_path, [RELATION]), hierarchy, values)
    facility = by_unit(alerts[alerts["level"] == "facility"])
    assert set(facility) == {"F1"}
    assert (facility["F1"]["value"], facility["F1"]["expected"]) == (12, 10)
    assert "anc4 visits = 12 but anc1 visits = 10" in facility["F1"]["detail"]
    # D1 = F1+F2+F3: anc1 30, anc4 22 -> holds; D2 = F4 only: anc1 missing -> no alert
    assert alerts[alerts["level"] == "district"].empty


# ---- silence --------------------------------------------------------------------------------

SILENCE = {
    "name": "anc1_silent",
    "kind": "silence",
    "metric": "anc1_visits",
    "periods": 3,
    "window": 12,
    "min_history": 6,
    "severity": "critical",
    "levels": ["facility"],
}


def test_silence(tmp_path: Path, hierarchy: Hierarchy) -> None:
    # 16 months 2023-04 .. 2024-07; F5 closed 1 May 2024, F6 opened 15 March 2024
    steady = [float(10 + i % 3) for i in range(16)]
    values = {
        "anc1_visits": {
            "F1": steady[:13] + [NAN] * 3,  # silent for the last 3 months -> alert
            "F2": steady[:14] + [NAN] * 2,  # silent for only 2 -> no alert
            "F3": [NAN, 5, NAN, NAN, 6, NAN, NAN, 7, NAN, NAN, 8, NAN, NAN] + [NAN] * 3,
            "F4": steady,
            "F5": steady[:12] + [NAN] * 4,  # silent, but closed: exempt
            "F6": [NAN] * 11 + [3, 4, NAN, NAN, NAN],  # too little history
        }
    }
    alerts = by_unit(run_checks(make_config(tmp_path, [SILENCE]), hierarchy, values, "2024-07"))
    assert set(alerts) == {"F1"}
    alert = alerts["F1"]
    history = steady[1:13]  # the 12 months before the silent 3
    assert alert["expected"] == statistics.mean(history)
    assert "for the last 3 months" in alert["detail"]
    assert "reported in 12 of the 12 months before" in alert["detail"]
    assert alert["severity"] == "critical"
    # F3 reported 4 times in its window: fewer than min_history = 6
    assert sum(1 for x in values["anc1_visits"]["F3"][1:13] if x == x) == 4


def test_silence_needs_a_full_window(tmp_path: Path, hierarchy: Hierarchy) -> None:
    # 14 months: 3 silent + 11 before -- one short of the 12-month window: no verdict
    values = {"anc1_visits": {"F1": [10.0] * 11 + [NAN] * 3}}
    assert run_checks(make_config(tmp_path, [SILENCE]), hierarchy, values).empty
    values = {"anc1_visits": {"F1": [10.0] * 12 + [NAN] * 3}}
    assert len(run_checks(make_config(tmp_path, [SILENCE]), hierarchy, values)) == 1


# ---- band -----------------------------------------------------------------------------------

BAND = {
    "name": "anc1_usual",
    "metric": "anc1_visits",
    "k": 3.0,
    "window": 3,
    "min_points": 3,
    "levels": ["facility", "district"],
}
BAND_CHECK = {
    "name": "anc1_out_of_band",
    "kind": "band",
    "band": "anc1_usual",
    "levels": ["facility"],
}


def test_band_check_is_strict_at_the_limits(tmp_path: Path, hierarchy: Hierarchy) -> None:
    history = [8.0, 10.0, 12.0]
    mean, sd = statistics.mean(history), statistics.stdev(history)  # 10 and 2 exactly
    high, low = mean + 3 * sd, mean - 3 * sd  # 16 and 4
    assert (high, low) == (16.0, 4.0)
    values = {
        "anc1_visits": {
            "F1": [*history, high],  # exactly the high limit: no alert
            "F2": [*history, high + 0.5],  # above: alert
            "F3": [*history, low],  # exactly the low limit: no alert
            "F4": [*history, low - 0.5],  # below: alert
            "F6": [8.0, NAN, 12.0, 100.0],  # only 2 past values < min_points: no band
        }
    }
    config = make_config(tmp_path, [BAND_CHECK], [BAND])
    alerts = by_unit(run_checks(config, hierarchy, values))
    assert set(alerts) == {"F2", "F4"}
    f2 = alerts["F2"]
    assert (f2["expected"], f2["low"], f2["high"]) == (mean, low, high)
    assert f2["score"] == (high + 0.5 - mean) / sd
    assert "above the expected range 4–16" in f2["detail"]
    assert "learned from 3 past values" in f2["detail"]
    assert "below the expected range" in alerts["F4"]["detail"]
    assert alerts["F4"]["band"] == "anc1_usual" and alerts["F4"]["metric"] == "anc1_visits"


# ---- levels: district alerts use district totals -------------------------------------------


def test_district_alerts_use_totals_and_count_children(
    tmp_path: Path, hierarchy: Hierarchy
) -> None:
    # June 2024: F5 has closed (1 May), so D2 expects 1 facility; D1 expects 3
    anc = {  # (anc1, anc4)
        "F1": (10, 12),
        "F2": (5, 6),
        "F3": (NAN, NAN),  # did not report
        "F4": (5, 9),
        "F6": (20, 3),
    }
    values = {
        "anc1_visits": {u: [a[0]] for u, a in anc.items()},
        "anc4_visits": {u: [a[1]] for u, a in anc.items()},
    }
    check = {**RELATION, "levels": ["district"]}
    alerts = run_checks(make_config(tmp_path, [check]), hierarchy, values, "2024-06")
    frame = pd.DataFrame([(u, *a) for u, a in anc.items()], columns=["unit", "anc1", "anc4"])
    frame["district"] = frame["unit"].map({r[0]: r[2] for r in SMALL_UNITS})
    totals = frame.groupby("district")[["anc1", "anc4"]].sum(min_count=1)  # pandas reference
    reported = frame.groupby("district")["anc4"].count()
    flagged = by_unit(alerts)
    assert set(flagged) == set(totals.index[totals["anc4"] > totals["anc1"]]) == {"D1", "D2"}
    for district, expected_children in (("D1", 3), ("D2", 1)):
        alert = flagged[district]
        assert alert["level"] == "district"
        assert alert["value"] == totals.loc[district, "anc4"]
        assert alert["expected"] == totals.loc[district, "anc1"]
        assert alert["children_reported"] == reported[district]
        assert alert["children_expected"] == expected_children
        assert alert["detail"].endswith(
            f"; {reported[district]} of {expected_children} facilities reported"
        )


def test_alerts_worst_first(tmp_path: Path, hierarchy: Hierarchy) -> None:
    checks = [
        {**U5_SHARE, "levels": ["facility"], "severity": "notice"},
        {**RELATION, "levels": ["facility"], "severity": "warning"},
        {**DROPOUT, "severity": "critical"},
    ]
    values = {
        "malaria_cases_u5": {"F1": [50], "F2": [90]},
        "malaria_cases_5plus": {"F1": [50], "F2": [10]},
        "anc1_visits": {"F3": [10], "F4": [10]},
        "anc4_visits": {"F3": [11], "F4": [30]},
        "penta1_doses": {"F5": [100], "F6": [100]},
        "penta3_doses": {"F5": [80], "F6": [50]},
    }
    alerts = run_checks(make_config(tmp_path, checks), hierarchy, values)
    assert len(alerts) == 6
    # RFC 5424 §6.2.1 severity codes: critical 2, warning 4, notice 5 (lower is worse);
    # then the larger score first -- reference order from pandas' own multi-key sort
    code = alerts["severity"].map({"critical": 2, "warning": 4, "notice": 5})
    reference = alerts.assign(code=code).sort_values(
        ["code", "score", "unit"], ascending=[True, False, True]
    )
    assert alerts["unit"].tolist() == reference["unit"].tolist()
    assert alerts["severity"].tolist()[:2] == ["critical", "critical"]


def test_no_alerts_gives_empty_frame_with_columns(tmp_path: Path, hierarchy: Hierarchy) -> None:
    values = {"anc1_visits": {"F1": [10]}, "anc4_visits": {"F1": [5]}}
    alerts = run_checks(make_config(tmp_path, [RELATION]), hierarchy, values)
    assert alerts.empty
    assert {"check", "unit", "level", "period", "value", "detail", "score"} <= set(alerts.columns)


# ---- the pipeline ---------------------------------------------------------------------------

MONTHS = [
    format_period(p, "month")
    for p in range(parse_period("2023-01", "month"), parse_period("2024-07", "month"))
]


def _open(unit: str, month: str) -> bool:
    row = {r[0]: r for r in SMALL_UNITS}[unit]
    return (not row[4] or row[4][:7] <= month) and (not row[5] or month < row[5][:7])


def write_pipeline_files(tmp_path: Path, write_units: Callable[..., Path]) -> list[tuple]:
    write_units()
    rng = np.random.default_rng(2024)
    rows = []
    for unit in ("F1", "F2", "F3", "F4", "F5", "F6"):
        for month in MONTHS:
            if not _open(unit, month):
                continue
            anc1 = int(rng.integers(40, 60))
            values = {
                "anc1_visits": anc1,
                "anc4_visits": anc1 - int(rng.integers(5, 15)),
                "penta1_doses": 100,
                "penta3_doses": int(rng.integers(92, 100)),
                "malaria_cases_u5": 30,
                "malaria_cases_5plus": 70,
                "rdt_stockout_days": 0,
            }
            if (unit, month) == ("F2", "2024-03"):
                values["anc4_visits"] = anc1 + 5  # planted: inside the as-of period
            if (unit, month) == ("F1", "2024-06"):
                values["anc4_visits"] = anc1 + 5  # planted: after the as-of period
            rows += [(unit, code, month, v) for code, v in values.items()]
    write_csv(tmp_path / "values.csv", ("unit", "metric", "period", "value"), rows)
    return rows


def pipeline_config(example_raw: dict[str, Any], tmp_path: Path) -> Config:
    return config_from_dict(example_raw, tmp_path / "digest.toml")


def test_pipeline_as_of_ignores_later_data(
    tmp_path: Path, write_units: Callable[..., Path], example_raw: dict[str, Any]
) -> None:
    rows = write_pipeline_files(tmp_path, write_units)
    config = pipeline_config(example_raw, tmp_path)
    seen: list[str] = []
    result = run_pipeline(config, run_id="t1", as_of="2024-03", progress=seen.append)
    assert seen == list(STAGES)
    assert result.period == "2024-03"
    assert result.dataset.period_labels[-1] == "2024-03"
    assert set(result.alerts["period"]) <= {"2024-03"}
    relation = result.alerts[result.alerts["check"] == "anc4_above_anc1"]
    assert ("F2", "facility") in set(zip(relation["unit"], relation["level"], strict=True))
    assert "F1" not in set(relation["unit"])  # its June value is after the as-of period

    # same answer as a file that never had the later rows
    tmp_cut = tmp_path / "cut"
    tmp_cut.mkdir()
    write_csv(
        tmp_cut / "units.csv", ("id", "name", "parent", "level", "opened", "closed"), SMALL_UNITS
    )
    write_csv(
        tmp_cut / "values.csv",
        ("unit", "metric", "period", "value"),
        [r for r in rows if r[2] <= "2024-03"],
    )
    cut = run_pipeline(config_from_dict(example_raw, tmp_cut / "digest.toml"), run_id="t2")
    assert cut.period == "2024-03"
    pd.testing.assert_frame_equal(result.alerts, cut.alerts)
    pd.testing.assert_frame_equal(result.bands_frame(), cut.bands_frame())

    latest = run_pipeline(config, run_id="t3")
    assert latest.period == "2024-06"
    latest_relation = latest.alerts[latest.alerts["check"] == "anc4_above_anc1"]
    assert "F1" in set(latest_relation["unit"]) and "F2" not in set(latest_relation["unit"])


@pytest.mark.parametrize("as_of", ["2030-01", "2022-12", "March"])
def test_pipeline_bad_as_of(
    tmp_path: Path, write_units: Callable[..., Path], example_raw: dict[str, Any], as_of: str
) -> None:
    write_pipeline_files(tmp_path, write_units)
    with pytest.raises(DataError, match="--as-of"):
        run_pipeline(pipeline_config(example_raw, tmp_path), run_id="t", as_of=as_of)


def test_stage_error_names_the_load_stage(
    tmp_path: Path, write_units: Callable[..., Path], example_raw: dict[str, Any]
) -> None:
    write_units()
    (tmp_path / "values.parquet").write_bytes(b"this is not a Parquet file")
    example_raw["data"]["values"] = "values.parquet"
    seen: list[str] = []
    with pytest.raises(StageError) as info:
        run_pipeline(pipeline_config(example_raw, tmp_path), run_id="t", progress=seen.append)
    assert info.value.stage == "load"
    assert str(info.value).startswith("stage 'load' failed")
    assert "values.parquet" in str(info.value)
    assert seen == ["load"]  # the stages after it did not run


def test_stage_error_names_the_evaluate_stage(
    tmp_path: Path, write_units: Callable[..., Path], example_raw: dict[str, Any]
) -> None:
    write_pipeline_files(tmp_path, write_units)
    config = pipeline_config(example_raw, tmp_path)
    # a check that skipped the cross-checks: it names a metric nobody declared
    ghost = BoundsCheck.model_validate(
        {"name": "ghost", "kind": "bounds", "expr": "ghost_metric", "max": 1,
         "programme": "p", "levels": ["facility"]}
    )  # fmt: skip
    broken = config.model_copy(update={"check": [*config.check, ghost]})
    seen: list[str] = []
    with pytest.raises(StageError) as info:
        run_pipeline(broken, run_id="t", progress=seen.append)
    assert info.value.stage == "evaluate"
    assert isinstance(info.value.cause, KeyError)
    assert seen == list(STAGES)
