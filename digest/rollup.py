"""Stage 2: totals up the hierarchy.

One summing function, :func:`level_totals`, turns capture-level series into the series
of any level: a sparse unit-to-ancestor matrix times the values, counting only children
that reported. Stage 1 calls it for the levels its bands need; stage 2 calls it for every
metric at every level.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from digest.hierarchy import Hierarchy
from digest.loading import Dataset


@dataclass(frozen=True)
class Totals:
    """One metric at one level: sums and how many children reported [units x periods]."""

    values: np.ndarray  # float, NaN where no child reported
    reported: np.ndarray  # int, children with a value


@dataclass(frozen=True)
class LevelData:
    """Every metric at one level, plus how many children were expected to report."""

    level: str
    units: np.ndarray  # hierarchy indices, row order
    metrics: dict[str, Totals]
    expected: np.ndarray  # int [units x periods]: children open in the period


def level_totals(
    values: np.ndarray, hierarchy: Hierarchy, members: np.ndarray, level: str
) -> Totals:
    """Sum capture-level ``values`` [members x periods] up to ``level``."""
    reported_mask = ~np.isnan(values)
    if level == hierarchy.capture_level:
        return Totals(values, reported_mask.astype(np.int64))
    matrix = hierarchy.rollup_matrix(members, level)
    sums = np.asarray(matrix @ np.where(reported_mask, values, 0.0))
    reported = np.rint(np.asarray(matrix @ reported_mask.astype(np.float64))).astype(np.int64)
    sums[reported == 0] = np.nan
    return Totals(sums, reported)


def rollup(
    dataset: Dataset, series: Mapping[str, np.ndarray], levels: list[str] | tuple[str, ...]
) -> dict[str, LevelData]:
    """Stage 2: every series in ``series`` (raw and derived) at every level."""
    hierarchy = dataset.hierarchy
    open_mask = hierarchy.open_mask(dataset.capture, dataset.periods, dataset.kind)
    result: dict[str, LevelData] = {}
    for level in levels:
        opened = level_totals(open_mask.astype(np.float64), hierarchy, dataset.capture, level)
        metrics = {
            code: level_totals(arr, hierarchy, dataset.capture, level)
            for code, arr in series.items()
        }
        result[level] = LevelData(
            level=level,
            units=hierarchy.at_level(level),
            metrics=metrics,
            expected=np.nan_to_num(opened.values).astype(np.int64),
        )
    return result
