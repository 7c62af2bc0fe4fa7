"""One run: load, then the three stages in order (bands, rollup, evaluate).

Each stage is a pure function of data; this module only sequences them, times them and
turns a failure into a :class:`StageError` naming the stage, so the stages after it do not
run. Reading the clock and files happens here and in the CLI, nowhere else.
"""

from __future__ import annotations

import secrets
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime
from typing import Protocol, TypeVar

import numpy as np
import pandas as pd

from digest import bands as bands_stage
from digest import evaluate as evaluate_stage
from digest import rollup as rollup_stage
from digest.bands import BandArrays
from digest.config import Config
from digest.errors import DataError, DigestError, StageError
from digest.hierarchy import Hierarchy
from digest.loading import Dataset, Loaded, load_values
from digest.periods import format_period, parse_period
from digest.rollup import LevelData

STAGES = ("load", "bands", "rollup", "evaluate")
T = TypeVar("T")
Progress = Callable[[str], None]


@dataclass
class RunResult:
    run_id: str
    config: Config
    period: str
    column: int
    loaded: Loaded
    series: dict[str, np.ndarray]
    bands: dict[tuple[str, str], BandArrays]
    levels: dict[str, LevelData]
    alerts: pd.DataFrame
    timings: dict[str, float] = field(default_factory=dict)

    @property
    def dataset(self) -> Dataset:
        return self.loaded.dataset

    @property
    def hierarchy(self) -> Hierarchy:
        return self.loaded.dataset.hierarchy

    def history(self, unit: int, metric: str, band: str = "", last: int = 12) -> pd.DataFrame:
        """The unit's recent values of ``metric`` up to the evaluated period, with its band."""
        level = self.hierarchy.level_of(unit)
        data = self.levels[level]
        row = int(np.searchsorted(data.units, unit))
        start = max(0, self.column - last + 1)
        cols = slice(start, self.column + 1)
        frame = pd.DataFrame(
            {
                "period": self.dataset.period_labels[cols],
                "value": data.metrics[metric].values[row, cols],
            }
        )
        arrays = self.bands.get((band, level)) if band else None
        for name in ("centre", "low", "high"):
            frame[name] = getattr(arrays, name)[row, cols] if arrays else np.nan
        return frame

    def bands_frame(self) -> pd.DataFrame:
        """Every band learned for the evaluated period (the content of bands.parquet)."""
        parts = []
        h = self.hierarchy
        c = self.column
        for (name, level), arrays in self.bands.items():
            units = h.at_level(level)
            learned = arrays.method[:, c] != ""
            parts.append(
                pd.DataFrame(
                    {
                        "unit": [h.ids[u] for u in units[learned]],
                        "unit_name": [h.names[u] for u in units[learned]],
                        "level": level,
                        "band": name,
                        "metric": self.config.band_named(name).metric,
                        "period": self.period,
                        "centre": arrays.centre[learned, c],
                        "low": arrays.low[learned, c],
                        "high": arrays.high[learned, c],
                        "spread": arrays.spread[learned, c],
                        "points": arrays.points[learned, c],
                        "method": arrays.method[learned, c].astype(str),
                    }
                )
            )
        if not parts:
            return pd.DataFrame(
                columns=[
                    "unit",
                    "unit_name",
                    "level",
                    "band",
                    "metric",
                    "period",
                    "centre",
                    "low",
                    "high",
                    "spread",
                    "points",
                    "method",
                ]
            )
        return pd.concat(parts, ignore_index=True)

    def totals_frame(self) -> pd.DataFrame:
        """Every level's totals in the evaluated period: value, children reported and expected.

        One row per unit and metric where a value was reported or a report was expected.
        """
        parts = []
        h = self.hierarchy
        c = self.column
        ids = np.array(h.ids, dtype=object)
        for level in self.config.data.levels:
            data = self.levels[level]
            expected = data.expected[:, c]
            for metric, totals in data.metrics.items():
                reported = totals.reported[:, c]
                keep = (reported > 0) | (expected > 0)
                parts.append(
                    pd.DataFrame(
                        {
                            "unit": ids[data.units[keep]],
                            "level": level,
                            "metric": metric,
                            "period": self.period,
                            "value": totals.values[keep, c],
                            "reported": reported[keep],
                            "expected": expected[keep],
                        }
                    )
                )
        columns = ["unit", "level", "metric", "period", "value", "reported", "expected"]
        if not parts:
            return pd.DataFrame(columns=columns)
        return pd.concat(parts, ignore_index=True)


class Engine(Protocol):
    """Where stages 1-3 run. Every engine gives the same results as :class:`LocalEngine`."""

    def derive(self, config: Config, raw: dict[str, np.ndarray]) -> dict[str, np.ndarray]: ...

    def learn_bands(
        self, config: Config, dataset: Dataset, series: dict[str, np.ndarray]
    ) -> dict[tuple[str, str], BandArrays]: ...

    def rollup(
        self, dataset: Dataset, series: dict[str, np.ndarray], levels: list[str]
    ) -> dict[str, LevelData]: ...

    def evaluate(
        self,
        config: Config,
        hierarchy: Hierarchy,
        levels: dict[str, LevelData],
        bands: dict[tuple[str, str], BandArrays],
        column: int,
        period: str,
    ) -> pd.DataFrame: ...

    def close(self) -> None: ...


class LocalEngine:
    """numpy and pandas in this process (the default)."""

    def derive(self, config: Config, raw: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        return bands_stage.derive(config, raw)

    def learn_bands(
        self, config: Config, dataset: Dataset, series: dict[str, np.ndarray]
    ) -> dict[tuple[str, str], BandArrays]:
        return bands_stage.learn_bands(config, dataset, series)

    def rollup(
        self, dataset: Dataset, series: dict[str, np.ndarray], levels: list[str]
    ) -> dict[str, LevelData]:
        return rollup_stage.rollup(dataset, series, levels)

    def evaluate(
        self,
        config: Config,
        hierarchy: Hierarchy,
        levels: dict[str, LevelData],
        bands: dict[tuple[str, str], BandArrays],
        column: int,
        period: str,
    ) -> pd.DataFrame:
        return evaluate_stage.evaluate(config, hierarchy, levels, bands, column, period)

    def close(self) -> None:
        pass


def open_engine(config: Config) -> Engine:
    """The engine named by ``[engine] kind``: the one place that chooses."""
    if config.engine.kind == "dask":
        from digest.engine_dask import DaskEngine

        return DaskEngine(config.engine)
    return LocalEngine()


def new_run_id(now: datetime) -> str:
    return f"{now:%Y%m%dT%H%M%S}-{secrets.token_hex(2)}"


def run_pipeline(
    config: Config,
    *,
    run_id: str,
    as_of: str | None = None,
    progress: Progress | None = None,
    engine: Engine | None = None,
) -> RunResult:
    """Load the data and run bands, rollup and evaluate for one period.

    ``engine``: where the stages run; by default the one ``[engine]`` names, opened for
    this run and closed after it (a caller passing its own engine closes it itself).
    """
    own = engine is None
    if engine is None:
        engine = open_engine(config)
    try:
        return _run(config, engine, run_id, as_of, progress)
    finally:
        if own:
            engine.close()


def _run(
    config: Config, engine: Engine, run_id: str, as_of: str | None, progress: Progress | None
) -> RunResult:
    from digest.sources import load_units

    timings: dict[str, float] = {}
    with _stage("load", timings, progress):
        hierarchy = load_units(config)
        loaded = load_values(config, hierarchy)
        loaded, column = _up_to(loaded, as_of, config)
    dataset = loaded.dataset
    period = format_period(int(dataset.periods[column]), dataset.kind)
    with _stage("bands", timings, progress):
        series = engine.derive(config, dataset.values)
        bands = engine.learn_bands(config, dataset, series)
    with _stage("rollup", timings, progress):
        levels = engine.rollup(dataset, series, config.data.levels)
    with _stage("evaluate", timings, progress):
        alerts = engine.evaluate(config, hierarchy, levels, bands, column, period)
    return RunResult(run_id, config, period, column, loaded, series, bands, levels, alerts, timings)


def _up_to(loaded: Loaded, as_of: str | None, config: Config) -> tuple[Loaded, int]:
    """Drop periods after ``as_of`` (default: the latest with data); return its column."""
    dataset = loaded.dataset
    if not len(dataset.periods):
        from digest.sources import source_label

        raise DataError(f"{source_label(config.data.values, 'values')}: no valid rows to evaluate")
    if as_of is None:
        return loaded, len(dataset.periods) - 1
    try:
        ordinal = parse_period(as_of, config.data.period)
    except ValueError as exc:
        raise DataError(f"--as-of: {exc}") from None
    try:
        column = dataset.column(ordinal)
    except ValueError as exc:  # a bad argument, not a failed stage
        raise DataError(f"--as-of: {exc}") from None
    trimmed = Dataset(
        dataset.hierarchy,
        dataset.kind,
        dataset.periods[: column + 1],
        dataset.capture,
        {code: arr[:, : column + 1] for code, arr in dataset.values.items()},
    )
    return Loaded(trimmed, loaded.rejects, loaded.stats), column


@contextmanager
def _stage(name: str, timings: dict[str, float], progress: Progress | None) -> Iterator[None]:
    if progress:
        progress(name)
    start = time.perf_counter()
    try:
        yield
    except DigestError:
        raise
    except Exception as exc:  # any other failure stops the run, named by its stage
        raise StageError(name, exc) from exc
    finally:
        timings[name] = time.perf_counter() - start
