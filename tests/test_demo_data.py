"""The demo scenario generator: deterministic, the right size, and its truth really holds.

The checks below re-derive every claim from the written files with pandas (pivot,
groupby, rolling mean and sample standard deviation), not with the generator's own
helpers, so a slip in the generator's bookkeeping shows up here.
"""

from __future__ import annotations

import csv
import re
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from digest.config import Config, load_config
from digest.demo_data import BAD_REASONS, DEFAULT_SEED, DemoTruth, generate, main
from digest.periods import parse_period

ROOT = Path(__file__).resolve().parents[1]
DEMO_CONFIG = ROOT / "demo" / "config.toml"
EXAMPLE_CONFIG = ROOT / "tests" / "fixtures" / "issue_example.toml"
FILES = ("units.csv", "values.csv", "truth.csv", "bad_rows.csv", "recipients.csv")
LEVELS = ["country", "province", "district", "facility"]


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> DemoTruth:
    return generate(tmp_path_factory.mktemp("demo"))


@pytest.fixture(scope="module")
def units(demo: DemoTruth) -> pd.DataFrame:
    return _units(demo.out_dir)


@pytest.fixture(scope="module")
def lines(demo: DemoTruth) -> list[str]:
    """values.csv as text lines; index i holds line i + 1 (the header is line 1)."""
    return (demo.out_dir / "values.csv").read_text(encoding="utf-8").splitlines()


@pytest.fixture(scope="module")
def bad(demo: DemoTruth) -> dict[int, str]:
    frame = pd.read_csv(demo.out_dir / "bad_rows.csv")
    return dict(zip(frame["line"], frame["reason"], strict=True))


@pytest.fixture(scope="module")
def values(demo: DemoTruth) -> pd.DataFrame:
    return _valid_values(demo.out_dir)


@pytest.fixture(scope="module")
def truth(demo: DemoTruth) -> pd.DataFrame:
    return pd.read_csv(demo.out_dir / "truth.csv", dtype=str, keep_default_na=False)


@pytest.fixture(scope="module")
def config() -> Config:
    return load_config(DEMO_CONFIG)


def _valid_values(folder: Path) -> pd.DataFrame:
    """The rows a loader should keep: every line of values.csv not in bad_rows.csv."""
    lines = (folder / "values.csv").read_text(encoding="utf-8").splitlines()
    bad = set(pd.read_csv(folder / "bad_rows.csv")["line"])
    kept = [line.split(",") for n, line in enumerate(lines[1:], start=2) if n not in bad]
    frame = pd.DataFrame(kept, columns=lines[0].split(","))
    frame["value"] = frame["value"].astype(int)
    return frame


def _units(folder: Path) -> pd.DataFrame:
    return pd.read_csv(folder / "units.csv", dtype=str, keep_default_na=False)


def _wide(values: pd.DataFrame, metric: str, periods: tuple[str, ...]) -> pd.DataFrame:
    rows = values[values["metric"] == metric]
    wide = rows.pivot(index="unit", columns="period", values="value").astype(float)
    return wide.reindex(columns=list(periods))


def _district_sum(wide: pd.DataFrame, units: pd.DataFrame) -> pd.DataFrame:
    """Sum of what the facilities of each district reported; NaN where none reported."""
    parent = units.set_index("id")["parent"]
    return wide.groupby(parent.reindex(wide.index)).sum(min_count=1)


def _alerts(mask: pd.DataFrame) -> set[tuple[str, str]]:
    stacked = mask.stack()
    return {(str(u), str(p)) for (u, p), hit in stacked.items() if hit}


# ---- determinism, size, speed ---------------------------------------------------------


def test_same_seed_gives_the_same_bytes_quickly(demo: DemoTruth, tmp_path: Path) -> None:
    started = time.perf_counter()
    again = generate(tmp_path / "again", seed=DEFAULT_SEED)
    assert time.perf_counter() - started < 5.0
    for name in FILES:
        assert (again.out_dir / name).read_bytes() == (demo.out_dir / name).read_bytes(), name


def test_another_seed_gives_other_data(demo: DemoTruth, tmp_path: Path) -> None:
    other = generate(tmp_path / "other", seed=DEFAULT_SEED + 1)
    assert (other.out_dir / "values.csv").read_bytes() != (demo.out_dir / "values.csv").read_bytes()


def test_command_line_writes_the_files(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main([str(tmp_path / "cli")]) == 0
    assert all((tmp_path / "cli" / name).is_file() for name in FILES)
    assert "truth:" in capsys.readouterr().out


def test_sizes(demo: DemoTruth, units: pd.DataFrame, values: pd.DataFrame) -> None:
    counts = units["level"].value_counts()
    assert list(units["level"].drop_duplicates()) == LEVELS
    assert counts["country"] == 1
    assert counts["province"] >= 4
    assert counts["district"] >= 12
    assert counts["facility"] >= 300
    assert len(demo.periods) == 36
    assert demo.periods[-1] == "2026-10"
    assert sorted(values["period"].unique()) == list(demo.periods)
    assert values["metric"].nunique() >= 8


# ---- hierarchy --------------------------------------------------------------------------


def test_units_form_one_hierarchy(units: pd.DataFrame) -> None:
    pattern = {"province": r"P\d{2}", "district": r"D\d{2}", "facility": r"F\d{4}"}
    level_of = dict(zip(units["id"], units["level"], strict=True))
    assert units["id"].is_unique
    for row in units.itertuples():
        if row.level == "country":
            assert row.parent == ""
            continue
        assert re.fullmatch(pattern[row.level], row.id), row.id
        assert LEVELS.index(level_of[row.parent]) == LEVELS.index(row.level) - 1, row.id
    assert not units["name"].str.contains(",").any()


def test_some_facilities_open_or_close_inside_the_window(
    demo: DemoTruth, units: pd.DataFrame, values: pd.DataFrame
) -> None:
    first_day = demo.periods[0] + "-01"
    facilities = units[units["level"] == "facility"]
    opened = facilities[facilities["opened"] >= first_day]
    closed = facilities[facilities["closed"] != ""]
    assert 2 <= len(opened) <= 3
    assert 1 <= len(closed) <= 2
    for row in opened.itertuples():
        periods = values.loc[values["unit"] == row.id, "period"]
        assert periods.min() == row.opened[:7], row.id
    for row in closed.itertuples():
        periods = values.loc[values["unit"] == row.id, "period"]
        assert periods.max() <= row.closed[:7], row.id


def test_only_known_facilities_report(units: pd.DataFrame, values: pd.DataFrame) -> None:
    facilities = set(units.loc[units["level"] == "facility", "id"])
    assert set(values["unit"]) <= facilities


def test_about_five_percent_of_reports_are_missing(
    demo: DemoTruth, units: pd.DataFrame, values: pd.DataFrame, config: Config
) -> None:
    facilities = units[units["level"] == "facility"]
    open_months = 0
    for row in facilities.itertuples():
        months = [
            p
            for p in demo.periods
            if (not row.opened or p >= row.opened[:7]) and (not row.closed or p <= row.closed[:7])
        ]
        open_months += len(months)
    expected = open_months * len(config.metric)
    present = len(values.drop_duplicates(["unit", "metric", "period"]))
    assert 0.03 <= 1 - present / expected <= 0.07
    assert demo.missing_share == pytest.approx(1 - present / expected)


# ---- bad rows -----------------------------------------------------------------------------


def _reasons(rows: list[list[str]], units: set[str], metrics: set[str]) -> dict[int, str]:
    """Why each data row (by index) is bad, judged from the rows alone.

    Both rows of a key with two different values are conflicting duplicates; later
    copies of an identical row are exact duplicates.
    """
    found: dict[int, str] = {}
    for i, (unit, metric, period, value) in enumerate(rows):
        if unit not in units:
            found[i] = "unknown_unit"
        elif metric not in metrics:
            found[i] = "unknown_metric"
        elif not _is_period(period):
            found[i] = "bad_period"
        elif not re.fullmatch(r"-?\d+", value):
            found[i] = "bad_value"
        elif int(value) < 0:
            found[i] = "negative_count"
    keys: dict[tuple[str, str, str], list[int]] = {}
    for i, row in enumerate(rows):
        if i not in found:
            keys.setdefault((row[0], row[1], row[2]), []).append(i)
    for copies in keys.values():
        if len({rows[i][3] for i in copies}) > 1:
            found.update({i: "conflicting_duplicate" for i in copies})
        else:
            found.update({i: "exact_duplicate" for i in copies[1:]})
    return found


def _is_period(text: str) -> bool:
    try:
        parse_period(text, "month")
    except ValueError:
        return False
    return True


def test_bad_rows_hold_what_they_claim(
    lines: list[str], bad: dict[int, str], units: pd.DataFrame, config: Config
) -> None:
    known_units = set(units.loc[units["level"] == "facility", "id"])
    metrics = {m.code for m in config.metric}
    assert lines[0] == "unit,metric,period,value"
    rows = [next(csv.reader([line])) for line in lines[1:]]
    assert {len(row) for row in rows} == {4}
    found = _reasons(rows, known_units, metrics)
    assert {i + 2: reason for i, reason in found.items()} == bad


def test_bad_rows_cover_every_reason_and_stay_rare(lines: list[str], bad: dict[int, str]) -> None:
    assert set(bad.values()) == set(BAD_REASONS)
    share = len(bad) / (len(lines) - 1)
    assert 0.003 <= share <= 0.01
    assert "n/a" in {lines[n - 1].rsplit(",", 1)[1] for n, r in bad.items() if r == "bad_value"}


# ---- truth ----------------------------------------------------------------------------------


def test_truth_covers_every_check_and_kind(
    demo: DemoTruth, truth: pd.DataFrame, config: Config
) -> None:
    kinds = {c.name: c.kind for c in config.check}
    assert set(truth["check"]) == set(kinds)
    assert {"band", "bounds", "dropout", "relation", "silence"} == set(truth["kind"])
    for row in truth.itertuples():
        assert row.kind == kinds[row.check]
        assert row.period in demo.periods
        assert row.description
    last = truth[truth["period"] == demo.end]
    assert set(last["check"]) == set(kinds)
    assert len(truth[truth["period"] < demo.end]) >= 8


def test_last_month_holds_the_planned_problems(demo: DemoTruth, truth: pd.DataFrame) -> None:
    last = truth[(truth["period"] == demo.end) & truth["unit"].str.startswith("F")]
    per_check = last["check"].value_counts()
    assert per_check["anc1_out_of_band"] == 6
    assert per_check["anc4_above_anc1"] == 4
    assert per_check["penta_dropout"] == 6
    assert per_check["malaria_u5_share"] == 4
    assert per_check["anc1_silent"] == 4
    stockout = truth[(truth["check"] == "rdt_stockouts") & (truth["period"] == demo.end)]
    assert len(stockout) == 1
    assert stockout["unit"].str.fullmatch(r"D\d{2}").all()


def test_truth_units_exist(truth: pd.DataFrame, units: pd.DataFrame, config: Config) -> None:
    level_of = dict(zip(units["id"], units["level"], strict=True))
    levels_of_check = {c.name: set(c.levels) for c in config.check}
    for row in truth.itertuples():
        assert level_of[row.unit] in levels_of_check[row.check], row


def _fixed_check_alerts(
    periods: tuple[str, ...], units: pd.DataFrame, values: pd.DataFrame
) -> dict[str, set[tuple[str, str]]]:
    """Relation, dropout, under-five share and stock-out alerts at facility and district."""
    wide = {m: _wide(values, m, periods) for m in values["metric"].unique()}
    days = wide["rdt_stockout_days"]
    wide["rdt_stockout_sites"] = (days > 0).astype(float).where(days.notna())
    found: dict[str, set[tuple[str, str]]] = {}
    for level in ("facility", "district"):
        w = wide if level == "facility" else {m: _district_sum(v, units) for m, v in wide.items()}
        dropout = (w["penta1_doses"] - w["penta3_doses"]) / w["penta1_doses"] * 100
        cases = w["malaria_cases_u5"] + w["malaria_cases_5plus"]
        masks = {
            "anc4_above_anc1": w["anc4_visits"] > w["anc1_visits"],
            "penta_dropout": (w["penta1_doses"] >= 20) & ((dropout < 0) | (dropout > 10)),
            "malaria_u5_share": (cases >= 20) & (w["malaria_cases_u5"] / cases * 100 > 35),
        }
        if level == "district":
            masks["rdt_stockouts"] = w["rdt_stockout_sites"] > 2
        for check, mask in masks.items():
            found.setdefault(check, set()).update(_alerts(mask))
    return found


def _silence_alerts(
    periods: tuple[str, ...], units: pd.DataFrame, values: pd.DataFrame
) -> tuple[set[tuple[str, str]], pd.DataFrame]:
    """Open facilities with no anc1 for 3 months after 6+ reports in the 12 before."""
    facilities = units[units["level"] == "facility"].set_index("id")
    reported = _wide(values, "anc1_visits", periods).reindex(facilities.index).notna()
    by_period = reported.T.astype(float)
    quiet = by_period.rolling(3).sum() == 0
    history = by_period.rolling(12, min_periods=1).sum().shift(3) >= 6
    closing = facilities["closed"].str[:7].replace("", "9999-99")
    still_open = pd.DataFrame({p: closing >= p for p in periods}).T  # closed is not silent
    return _alerts((quiet & history & still_open).T), reported


def _band_outside(
    periods: tuple[str, ...], units: pd.DataFrame, values: pd.DataFrame, metric: str
) -> pd.DataFrame:
    """Mean ± 3 sample SD of the previous 12 months, 6 values at least (methods.md M1)."""
    facility = _wide(values, metric, periods)
    series = pd.concat([facility, _district_sum(facility, units)])
    past = series.T.rolling(12, min_periods=6)
    mean, sd = past.mean().shift(1).T, past.std(ddof=1).shift(1).T
    return (series < mean - 3 * sd) | (series > mean + 3 * sd)


BANDS = {"anc1_out_of_band": "anc1_visits", "deliveries_out_of_band": "deliveries_facility"}


def _assert_truth_holds(result: DemoTruth) -> None:
    units, values = _units(result.out_dir), _valid_values(result.out_dir)
    for check, alerts in _fixed_check_alerts(result.periods, units, values).items():
        assert alerts == result.truth_for(check), check
    silent, _ = _silence_alerts(result.periods, units, values)
    assert silent == result.truth_for("anc1_silent")
    for check, metric in BANDS.items():
        outside = _band_outside(result.periods, units, values, metric)
        rows = result.truth_for(check)
        assert rows, check
        for unit, period in rows:
            assert outside.at[unit, period], (check, unit, period)


def test_fixed_checks_alert_exactly_where_truth_says(
    demo: DemoTruth, units: pd.DataFrame, values: pd.DataFrame
) -> None:
    """Relation, dropout, under-five share and stock-outs: alerts == truth, every month."""
    for check, alerts in _fixed_check_alerts(demo.periods, units, values).items():
        assert alerts == demo.truth_for(check), check


def test_silent_facilities_are_exactly_the_injected_ones(
    demo: DemoTruth, units: pd.DataFrame, values: pd.DataFrame
) -> None:
    silent, reported = _silence_alerts(demo.periods, units, values)
    assert silent == demo.truth_for("anc1_silent")
    for unit, _ in demo.truth_for("anc1_silent", demo.end):
        assert reported.loc[unit, list(demo.periods[-15:-3])].all(), unit  # reported every month


def test_closed_facility_would_look_silent_without_its_closing_date(
    demo: DemoTruth, units: pd.DataFrame, values: pd.DataFrame
) -> None:
    """One facility closed three months before the end: a run must not call it silent."""
    closed = units[(units["closed"] != "") & (units["closed"].str[:7] == demo.periods[-4])]
    assert len(closed) == 1
    unit = closed["id"].iloc[0]
    assert not values[values["unit"] == unit]["period"].isin(demo.periods[-3:]).any()
    assert (unit, demo.end) not in demo.truth_for("anc1_silent")


@pytest.mark.parametrize("check", sorted(BANDS))
def test_band_truth_lies_outside_mean_three_sd(
    demo: DemoTruth, units: pd.DataFrame, values: pd.DataFrame, check: str
) -> None:
    outside = _band_outside(demo.periods, units, values, BANDS[check])
    rows = demo.truth_for(check)
    assert {u[0] for u, _ in rows} == {"F", "D"}  # facilities and districts alike
    for unit, period in rows:
        assert outside.at[unit, period], (unit, period)


def test_default_seed_has_no_borderline_band_values(demo: DemoTruth) -> None:
    """Every district band value the injections move is clearly in or clearly out."""
    assert demo.borderline == frozenset()


def test_truth_holds_for_another_seed_and_shape(tmp_path: Path) -> None:
    result = generate(
        tmp_path,
        seed=7,
        provinces=3,
        districts_per_province=4,
        facilities=200,
        months=30,
        end="2025-06",
    )
    assert result.periods[0] == "2023-01" and len(result.periods) == 30
    assert set(result.truth["kind"]) == {"band", "bounds", "dropout", "relation", "silence"}
    _assert_truth_holds(result)


# ---- configuration and recipients ------------------------------------------------------


def test_demo_config_loads_and_keeps_the_example_checks(config: Config) -> None:
    example = load_config(EXAMPLE_CONFIG)
    assert config.data.levels == LEVELS
    assert config.data.units.name == "units.csv" and config.data.units.parent.name == "data"
    assert config.data.values.name == "values.csv"
    assert config.mail.recipients is not None and config.mail.recipients.name == "recipients.csv"
    mine = {c.name: c for c in config.check}
    for check in example.check:
        assert check.model_dump(exclude={"advice"}) == mine[check.name].model_dump(
            exclude={"advice"}
        )
    assert all(c.advice for c in config.check)
    assert {m.code for m in example.metric} <= {m.code for m in config.metric}
    assert (config.relay.host, config.relay.port, config.relay.security) == (
        "127.0.0.1",
        8025,
        "starttls",
    )


def test_every_key_of_the_demo_config_is_commented() -> None:
    for number, line in enumerate(DEMO_CONFIG.read_text(encoding="utf-8").splitlines(), 1):
        if re.match(r"^\s*\w+\s*=", line):
            assert " # " in line, f"line {number} has no comment: {line}"


def test_values_use_exactly_the_declared_metrics(values: pd.DataFrame, config: Config) -> None:
    assert set(values["metric"]) == {m.code for m in config.metric}


def test_recipients_are_invented_and_point_at_real_units(
    demo: DemoTruth, units: pd.DataFrame, config: Config
) -> None:
    people = pd.read_csv(demo.out_dir / "recipients.csv", dtype=str, keep_default_na=False)
    assert list(people.columns) == ["email", "name", "unit", "reach", "programmes", "min_severity"]
    level_of = dict(zip(units["id"], units["level"], strict=True))
    programmes = {c.programme for c in config.check}
    assert people["email"].is_unique
    assert people["email"].str.endswith(".example.org").all()
    for row in people.itertuples():
        assert row.unit in level_of
        assert LEVELS.index(row.reach) >= LEVELS.index(level_of[row.unit])
        assert row.programmes == "*" or set(row.programmes.split(";")) <= programmes
        assert row.min_severity in {"critical", "warning", "notice"}
    by_level = people["unit"].map(level_of).value_counts()
    assert by_level["country"] == 1
    assert by_level["province"] == (units["level"] == "province").sum()
    assert by_level["district"] == (units["level"] == "district").sum()
    assert (people["programmes"] != "*").sum() >= 2
    assert (people["min_severity"] == "warning").sum() >= 1


def test_committed_recipients_match_the_default_seed(demo: DemoTruth) -> None:
    committed = (ROOT / "demo" / "recipients.csv").read_bytes()
    assert committed == (demo.out_dir / "recipients.csv").read_bytes()


def test_stockout_district_officer_follows_malaria(demo: DemoTruth) -> None:
    people = pd.read_csv(demo.out_dir / "recipients.csv", dtype=str, keep_default_na=False)
    (district,) = {u for u, _ in demo.truth_for("rdt_stockouts", demo.end)}
    officer = people[people["unit"] == district]
    assert officer["programmes"].tolist() == ["*"]
    assert officer["min_severity"].tolist() == ["notice"]


def test_counts_are_integers(values: pd.DataFrame) -> None:
    assert (values["value"] >= 0).all()
    assert np.issubdtype(values["value"].dtype, np.integer)
