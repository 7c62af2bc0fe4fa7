"""The Dask engine gives the local engine's result, array for array, on the demo data.

The reference is digest's own local engine (numpy/pandas in one process), itself checked
against pandas in test_end_to_end and test_bands; equality here is exact (same dtypes,
same bits, NaN where NaN), because each task runs the same stage function on its part.
A local cluster of threads (``processes = false``) keeps the test fast; bench/scale.py
runs worker processes.
"""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

pytest.importorskip("dask.distributed", reason="the Dask engine needs dask[distributed]")

from digest import demo_data
from digest.config import BoundsCheck, Config, EngineConfig, load_config
from digest.engine_dask import DaskEngine, check_inputs
from digest.errors import StageError
from digest.pipeline import STAGES, RunResult, run_pipeline

DEMO = Path(__file__).resolve().parent.parent / "demo"
THREADS = EngineConfig(kind="dask", workers=2, threads_per_worker=1, processes=False)


@pytest.fixture(scope="module")
def config(tmp_path_factory: pytest.TempPathFactory) -> Config:
    folder = tmp_path_factory.mktemp("daskdemo")
    shutil.copyfile(DEMO / "config.toml", folder / "config.toml")
    demo_data.generate(folder / "data")
    return load_config(folder / "config.toml")


@pytest.fixture(scope="module")
def local(config: Config) -> RunResult:
    return run_pipeline(config, run_id="same")


@pytest.fixture(scope="module")
def engine() -> Iterator[DaskEngine]:
    with DaskEngine(THREADS) as dask_engine:
        yield dask_engine


def assert_same_result(got: RunResult, want: RunResult) -> None:
    pd.testing.assert_frame_equal(got.alerts, want.alerts)
    assert got.period == want.period and got.column == want.column
    assert list(got.series) == list(want.series)
    for code, arr in want.series.items():
        np.testing.assert_array_equal(got.series[code], arr)
    assert list(got.bands) == list(want.bands)
    for key, arrays in want.bands.items():
        for name in ("centre", "spread", "low", "high", "points", "method", "excluded"):
            a, b = getattr(arrays, name), getattr(got.bands[key], name)
            assert (a is None) == (b is None), (key, name)
            if a is not None:
                assert a.dtype == b.dtype, (key, name)
                np.testing.assert_array_equal(b, a, err_msg=f"{key} {name}")
    assert list(got.levels) == list(want.levels)
    for level, data in want.levels.items():
        mine = got.levels[level]
        np.testing.assert_array_equal(mine.units, data.units)
        np.testing.assert_array_equal(mine.expected, data.expected)
        assert list(mine.metrics) == list(data.metrics)
        for code, totals in data.metrics.items():
            np.testing.assert_array_equal(mine.metrics[code].values, totals.values)
            np.testing.assert_array_equal(mine.metrics[code].reported, totals.reported)
    pd.testing.assert_frame_equal(got.bands_frame(), want.bands_frame())


def test_engine_from_the_config_gives_the_local_result(config: Config, local: RunResult) -> None:
    dask_config = config.model_copy(update={"engine": THREADS})
    got = run_pipeline(dask_config, run_id="same")  # starts and stops its own local cluster
    assert len(local.alerts) > 0 and len(local.bands) > 0
    assert {c.kind for c in config.check} >= {"band", "bounds", "dropout", "relation", "silence"}
    assert_same_result(got, local)


def test_an_earlier_period_and_results_made_elsewhere(config: Config, engine: DaskEngine) -> None:
    local = run_pipeline(config, run_id="x", as_of="2026-08")
    assert_same_result(run_pipeline(config, run_id="x", as_of="2026-08", engine=engine), local)
    # stage 3 on levels and bands the engine did not make (sent to the workers then)
    alerts = engine.evaluate(
        config, local.hierarchy, local.levels, local.bands, local.column, local.period
    )
    pd.testing.assert_frame_equal(alerts, local.alerts)
    none = config.model_copy(update={"check": []})
    empty = engine.evaluate(
        none, local.hierarchy, local.levels, local.bands, local.column, "2026-08"
    )
    pd.testing.assert_frame_equal(empty, run_pipeline(none, run_id="x", as_of="2026-08").alerts)


def test_a_failing_task_fails_its_stage(config: Config, engine: DaskEngine) -> None:
    ghost = BoundsCheck.model_validate(
        {"name": "ghost", "kind": "bounds", "expr": "ghost_metric", "max": 1,
         "programme": "p", "levels": ["facility"]}
    )  # fmt: skip
    broken = config.model_copy(update={"check": [*config.check, ghost]})
    seen: list[str] = []
    with pytest.raises(StageError) as info:
        run_pipeline(broken, run_id="t", progress=seen.append, engine=engine)
    assert info.value.stage == "evaluate" and isinstance(info.value.cause, KeyError)
    assert seen == list(STAGES)


def test_check_inputs_name_what_each_task_needs(config: Config) -> None:
    codes = [m.code for m in config.metric] + [d.code for d in config.derived]
    by_name = {c.name: c for c in config.check}
    assert check_inputs(by_name["anc4_above_anc1"], config, codes) == (
        ["anc1_visits", "anc4_visits"],
        [],
    )
    assert check_inputs(by_name["anc1_out_of_band"], config, codes) == (
        ["anc1_visits"],
        ["anc1_usual"],
    )
    assert check_inputs(by_name["rdt_stockouts"], config, codes) == (["rdt_stockout_sites"], [])
    assert check_inputs(by_name["penta_dropout"], config, codes)[0] == [
        "penta1_doses",
        "penta3_doses",
    ]
