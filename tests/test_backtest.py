"""digest backtest: replaying past periods under several settings, on the demo scenario."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from digest import backtest as bt
from digest.cli import main
from digest.config import Config, load_config
from digest.demo_data import DemoTruth, generate
from digest.errors import ConfigError, DataError
from digest.pipeline import run_pipeline

ROOT = Path(__file__).resolve().parents[1]
START, END = "2026-08", "2026-10"  # three months; the last holds most injected problems


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[DemoTruth, Config]:
    folder = tmp_path_factory.mktemp("demo")
    truth = generate(folder)
    text = (ROOT / "demo" / "config.toml").read_text(encoding="utf-8")
    for name in ("units", "values", "recipients"):
        assert f'"data/{name}.csv"' in text
        text = text.replace(f'"data/{name}.csv"', f'"{name}.csv"')
    (folder / "config.toml").write_text(text, encoding="utf-8")
    return truth, load_config(folder / "config.toml")


@pytest.fixture(scope="module")
def prepared(demo: tuple[DemoTruth, Config]) -> bt.Prepared:
    return bt.prepare(demo[1])


@pytest.fixture(scope="module")
def result(demo: tuple[DemoTruth, Config], prepared: bt.Prepared) -> bt.BacktestResult:
    truth, config = demo
    overrides = [bt.parse_set("band.k=3,3.5")]
    return bt.run_backtest(
        config, START, END, overrides, truth=truth.out_dir / "truth.csv", prepared=prepared
    )


# ---- settings -------------------------------------------------------------------------------


def test_parse_set_and_grid() -> None:
    k = bt.parse_set("band.k=2.5,3,3.5")
    method = bt.parse_set("band.method=mean_sd, median_mad")
    limit = bt.parse_set("check.penta_dropout.max=10,15")
    assert k.key == ("band", None, "k") and k.values == (2.5, 3, 3.5)
    assert method.values == ("mean_sd", "median_mad")
    assert limit.key == ("check", "penta_dropout", "max") and limit.target.endswith(".max")
    grid = bt.settings_grid([k, method, limit])
    assert len(grid) == 3 * 2 * 2
    assert grid[0] == {k.key: 2.5, method.key: "mean_sd", limit.key: 10}
    assert bt.settings_grid([]) == [{}]
    assert bt.setting_label(grid[-1]) == (
        "band.k=3.5 band.method=median_mad check.penta_dropout.max=15"
    )


@pytest.mark.parametrize("text", ["band.k", "band=3", "bands.k=3", "check.k=3", "band.k="])
def test_parse_set_refuses_bad_targets(text: str) -> None:
    with pytest.raises(ConfigError, match="--set"):
        bt.parse_set(text)


def test_apply_setting(demo: tuple[DemoTruth, Config]) -> None:
    config = demo[1]
    k = ("band", None, "k")
    updated = bt.apply_setting(config, {k: 2.5, ("check", "penta_dropout", "max"): 15})
    assert [b.k for b in updated.band] == [2.5, 2.5]
    dropout = next(c for c in updated.check if c.name == "penta_dropout")
    assert dropout.high == 15 and dropout.low == 0  # "max" is the file's name for high
    assert config.band[0].k == 3.0  # the original is untouched
    # switching method without k: the new method's own default width
    robust = bt.apply_setting(config, {("band", None, "method"): "median_mad"})
    assert {b.method for b in robust.band} == {"median_mad"}
    assert all(
        b.k == type(b).model_validate({**b.model_dump(exclude={"k"})}).k for b in robust.band
    )
    with pytest.raises(ConfigError, match=r"band\.k"):
        bt.apply_setting(config, {k: -1})
    with pytest.raises(ConfigError, match="no check named nope"):
        bt.apply_setting(config, {("check", "nope", "max"): 1})
    with pytest.raises(ConfigError, match="has no field"):
        bt.apply_setting(config, {("band", None, "width"): 1})
    with pytest.raises(ConfigError, match="min_points"):
        bt.apply_setting(config, {("band", None, "window"): 3})  # fewer than min_points = 6


# ---- the replay -----------------------------------------------------------------------------


def test_data_are_loaded_once(
    demo: tuple[DemoTruth, Config], monkeypatch: pytest.MonkeyPatch
) -> None:
    calls: list[int] = []
    real = bt.load_values

    def counting(*args: Any, **kwargs: Any) -> Any:
        calls.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(bt, "load_values", counting)
    out = bt.run_backtest(demo[1], END, END, [bt.parse_set("band.k=3,4")])
    assert len(calls) == 1 and len(out.outcomes) == 2


def test_a_replayed_period_equals_a_run_as_of_it(
    demo: tuple[DemoTruth, Config], result: bt.BacktestResult
) -> None:
    default = result.outcomes[0]
    assert default.label == "band.k=3"
    for period in (START, END):
        run = run_pipeline(demo[1], run_id="as-of", as_of=period).alerts
        replayed = default.alerts[default.alerts["period"] == period].reset_index(drop=True)
        pd.testing.assert_frame_equal(replayed, run.reset_index(drop=True), check_dtype=False)


def test_counts_per_recipient_follow_routing(result: bt.BacktestResult) -> None:
    for outcome in result.outcomes:
        counts = outcome.recipient_counts
        assert counts is not None and counts.shape == (3, 17)  # 3 months x 17 recipients
        assert outcome.recipient_max == counts.max()
        assert outcome.recipient_median == float(np.median(counts))
        # the national team (home unit the country, reach district) gets every district alert
        national = counts[:, 0]
        district = outcome.alerts[outcome.alerts["level"] != "facility"]
        per_period = district.groupby("period").size().reindex(result.periods, fill_value=0)
        assert national.tolist() == per_period.tolist()


def test_default_settings_find_every_band_truth_row(
    demo: tuple[DemoTruth, Config], result: bt.BacktestResult
) -> None:
    """The demo's band truth rows lie outside mean ± 3 SD of the previous 12 months (see
    digest/demo_data.py); the default band (k = 3) must find all of those in the range."""
    truth = demo[0].truth
    band_rows = truth[truth["kind"].eq("band") & truth["period"].isin(result.periods)]
    assert len(band_rows) >= 10
    default = result.outcomes[0]
    alerts = default.alerts
    raised = set(zip(alerts["check"], alerts["unit"], alerts["period"], strict=True))
    wanted = set(zip(band_rows["check"], band_rows["unit"], band_rows["period"], strict=True))
    assert wanted <= raised
    assert default.band_recall == 1.0 and default.band_truth_rows == len(wanted)
    assert default.recall == 1.0  # every other check finds its injected problems too
    # a wider band raises fewer alerts
    assert result.outcomes[1].total < default.total


def test_false_alarm_rate_uses_band_series_periods(result: bt.BacktestResult) -> None:
    default = result.outcomes[0]
    band_alerts = default.alerts[default.alerts["kind"] == "band"]
    assert default.band_false_alarms == len(band_alerts) - default.band_found
    assert default.band_false_per_100 == pytest.approx(
        100 * default.band_false_alarms / default.band_series_periods
    )
    # at most (facilities + districts) x 3 months x 2 band checks
    assert 0 < default.band_series_periods <= (300 + 12) * 3 * 2


def test_recommendation(result: bt.BacktestResult) -> None:
    assert result.recommended is not None
    fits = [o for o in result.outcomes if o.recipient_max <= result.cap]
    best = max(o.recall for o in fits)
    quietest = min(o.total for o in fits if o.recall == best)
    assert result.recommended.recall == best and result.recommended.total == quietest
    assert result.note.startswith(f"recommended: {result.recommended.label}")


def test_recommendation_when_nothing_fits(result: bt.BacktestResult) -> None:
    chosen, note = bt.recommend(result.outcomes, 0, True, True)
    assert chosen is None and note.startswith("no setting keeps every recipient")


def test_bad_range(demo: tuple[DemoTruth, Config], prepared: bt.Prepared) -> None:
    with pytest.raises(DataError, match="--from"):
        bt.run_backtest(demo[1], "2030-01", END, prepared=prepared)
    with pytest.raises(DataError, match="after --to"):
        bt.run_backtest(demo[1], END, START, prepared=prepared)


# ---- outputs ----------------------------------------------------------------------------------


def test_table_csv_and_chart(
    demo: tuple[DemoTruth, Config],
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    truth, config = demo
    out = tmp_path / "bt"
    code = main(
        [
            "backtest",
            "--config",
            str(config.source),
            "--from",
            START,
            "--to",
            END,
            "--set",
            "band.k=3,3.5",
            "--truth",
            str(truth.out_dir / "truth.csv"),
            "--out",
            str(out),
        ]
    )
    assert code == 0
    printed = capsys.readouterr().out
    print(printed)  # shown with -s: the table of the report
    assert f"backtest {START} to {END} (3 periods)" in printed
    assert "band.k=3 " in printed and "recommended: band.k=" in printed
    assert "anc1_out_of_band" in printed  # the per-check table
    summary = pd.read_csv(out / "backtest.csv")
    assert summary["setting"].tolist() == ["band.k=3", "band.k=3.5"]
    assert summary["band.k"].tolist() == [3, 3.5]
    assert summary["recall"].iloc[0] == 1.0 and summary["recommended"].sum() == 1
    assert {"alerts.anc1_out_of_band", "per_recipient_max", "false_alarms_per_100"} <= set(
        summary.columns
    )
    periods = pd.read_csv(out / "backtest_periods.csv")
    assert len(periods) == 2 * 3
    assert periods.groupby("setting")["alerts"].sum().to_dict() == dict(
        zip(summary["setting"], summary["alerts"], strict=True)
    )
    png = (out / "backtest.png").read_bytes()
    assert png.startswith(b"\x89PNG\r\n\x1a\n") and len(png) > 10_000


def test_default_out_folder(demo: tuple[DemoTruth, Config], prepared: bt.Prepared) -> None:
    result = bt.run_backtest(demo[1], END, END, prepared=prepared)
    assert result.outcomes[0].label == "as configured"
    paths = bt.write_files(result, demo[1].output.dir / "backtest")
    assert paths["csv"].parent == demo[1].output.dir / "backtest"
    assert all(p.exists() for p in paths.values())
