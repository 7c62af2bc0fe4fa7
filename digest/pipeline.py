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
from typing import TypeVar

import numpy as np
import pandas as pd

from digest.bands import BandArrays, derive, learn_bands
from digest.config import Config
from digest.errors import DataError, DigestError, StageError
from digest.evaluate import evaluate
from digest.hierarchy import Hierarchy, load_hierarchy
from digest.loading import Dataset, Loaded, load_values
from digest.periods import format_period, parse_period
from digest.rollup import LevelData, rollup

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


def new_run_id(now: datetime) -> str:
    return f"{now:%Y%m%dT%H%M%S}-{secrets.token_hex(2)}"


def run_pipeline(
    config: Config,
    *,
    run_id: str,
    as_of: str | None = None,
    progress: Progress | None = None,
) -> RunResult:
    """Load the data and run bands, rollup and evaluate for one period."""
    timings: dict[str, float] = {}
    with _stage("load", timings, progress):
        hierarchy = load_hierarchy(config.data.units, config.data.levels)
        loaded = load_values(config, hierarchy)
        loaded, column = _up_to(loaded, as_of, config)
    dataset = loaded.dataset
    period = format_period(int(dataset.periods[column]), dataset.kind)
    with _stage("bands", timings, progress):
        series = derive(config, dataset.values)
        bands = learn_bands(config, dataset, series)
    with _stage("rollup", timings, progress):
        levels = rollup(dataset, series, config.data.levels)
    with _stage("evaluate", timings, progress):
        alerts = evaluate(config, hierarchy, levels, bands, column, period)
    return RunResult(run_id, config, period, column, loaded, series, bands, levels, alerts, timings)


def _up_to(loaded: Loaded, as_of: str | None, config: Config) -> tuple[Loaded, int]:
    """Drop periods after ``as_of`` (default: the latest with data); return its column."""
    dataset = loaded.dataset
    if not len(dataset.periods):
        raise DataError(f"{config.data.values}: no valid rows to evaluate")
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
