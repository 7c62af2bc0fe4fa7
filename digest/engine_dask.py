"""Stages 1-3 on dask.distributed: bands per band, rollup per metric, evaluation per check.

``[engine] kind = "dask"`` runs the same stage functions as the local engine
(:func:`digest.bands.derive` and :func:`~digest.bands.learn_bands`,
:func:`digest.rollup.rollup`, :func:`digest.evaluate.evaluate`), each task on one part of
the work, so the results are the same arrays and the same alerts, bit for bit:

- the hierarchy is scattered to every worker once, and each metric's dense array once;
- derived metrics: one task each, on the arrays its expression names;
- bands: one task per ``[[band]]`` (all its levels), given only its metric's array;
- rollup: one task per metric (every level), plus one for the children expected to report;
- evaluate: one task per check, given the totals of the metrics and the bands it names.

Results stay on the workers between stages (the client keeps their futures), and are
gathered too, because a run's result holds every array. Everything a stage needs comes
as arguments; a task never reads files or the clock.

Without ``scheduler`` the engine starts a local cluster for the run (``workers`` processes
of ``threads_per_worker`` threads) and stops it afterwards. With ``scheduler``, the workers
of that cluster must have this same version of digest installed.
"""

from __future__ import annotations

import logging
import re
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from digest import bands as bands_stage
from digest import evaluate as evaluate_stage
from digest import rollup as rollup_stage
from digest.bands import BandArrays
from digest.config import Check, Config, EngineConfig
from digest.errors import ConfigError, DigestError
from digest.hierarchy import Hierarchy
from digest.loading import Dataset
from digest.periods import PeriodKind
from digest.rollup import LevelData, Totals

log = logging.getLogger("digest.engine_dask")
_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


class EngineError(DigestError):
    """The Dask cluster cannot be started or reached."""


# ---- tasks (module level, so workers import them by name) -----------------------------------


def _stub(
    hierarchy: Hierarchy, kind: PeriodKind, periods: np.ndarray, capture: np.ndarray
) -> Dataset:
    return Dataset(hierarchy, kind, periods, capture, {})


def _derive_task(config: Config, code: str, inputs: dict[str, np.ndarray]) -> np.ndarray:
    return bands_stage.derive(config, inputs)[code]


def _bands_task(
    config: Config,
    hierarchy: Hierarchy,
    kind: PeriodKind,
    periods: np.ndarray,
    capture: np.ndarray,
    metric: str,
    series: np.ndarray,
) -> dict[tuple[str, str], BandArrays]:
    dataset = _stub(hierarchy, kind, periods, capture)
    return bands_stage.learn_bands(config, dataset, {metric: series})


def _rollup_task(
    hierarchy: Hierarchy,
    kind: PeriodKind,
    periods: np.ndarray,
    capture: np.ndarray,
    levels: list[str],
    code: str,
    series: np.ndarray,
) -> dict[str, Totals]:
    got = rollup_stage.rollup(_stub(hierarchy, kind, periods, capture), {code: series}, levels)
    return {level: data.metrics[code] for level, data in got.items()}


def _expected_task(
    hierarchy: Hierarchy,
    kind: PeriodKind,
    periods: np.ndarray,
    capture: np.ndarray,
    levels: list[str],
) -> dict[str, LevelData]:
    return rollup_stage.rollup(_stub(hierarchy, kind, periods, capture), {}, levels)


def _evaluate_task(
    config: Config,
    hierarchy: Hierarchy,
    base: dict[str, LevelData],
    totals: dict[str, dict[str, Totals]],
    bands: list[dict[tuple[str, str], BandArrays]],
    column: int,
    period: str,
) -> pd.DataFrame:
    levels = {
        level: LevelData(
            level=level,
            units=data.units,
            metrics={code: per_level[level] for code, per_level in totals.items()},
            expected=data.expected,
        )
        for level, data in base.items()
    }
    merged: dict[tuple[str, str], BandArrays] = {}
    for part in bands:
        merged.update(part)
    return evaluate_stage.evaluate(config, hierarchy, levels, merged, column, period)


# ---- the engine -------------------------------------------------------------------------------


class DaskEngine:
    """Stages 1-3 on a dask.distributed cluster; same results as the local engine."""

    def __init__(self, settings: EngineConfig, client: Any | None = None) -> None:
        try:
            from dask import distributed
        except ImportError:
            raise ConfigError(
                "[engine] kind = 'dask' needs dask.distributed: pip install 'dask[distributed]'"
            ) from None
        self._cluster: Any = None
        self._own_client = client is None
        if client is not None:
            self.client = client
        elif settings.scheduler is not None:
            try:
                self.client = distributed.Client(settings.scheduler, timeout="15s")
            except OSError as exc:
                raise EngineError(
                    f"[engine] scheduler {settings.scheduler}: cannot reach the Dask scheduler "
                    f"({exc}); start it (dask scheduler) or fix the address"
                ) from None
        else:
            import dask

            # Dask starts worker processes with MALLOC_TRIM_THRESHOLD_=65536, which makes
            # glibc map and unmap every large temporary array: the stages' many mid-sized
            # numpy temporaries then ran 2-3 times slower in a worker than in this process
            # (bench/scale.py). Our local workers keep glibc's default; the statistical
            # profiler is off too (it samples the busy task thread every 10 ms).
            environ = dict(dask.config.get("distributed.nanny.pre-spawn-environ", {}))
            environ.pop("MALLOC_TRIM_THRESHOLD_", None)
            tuning = {
                "distributed.nanny.pre-spawn-environ": environ,
                "distributed.worker.profile.enabled": False,
            }
            with dask.config.set(tuning):
                self._cluster = distributed.LocalCluster(
                    n_workers=settings.workers,
                    threads_per_worker=settings.threads_per_worker,
                    processes=settings.processes,
                    dashboard_address=None,
                    silence_logs=logging.CRITICAL,  # a worker still beating as the cluster stops
                )
            self.client = distributed.Client(self._cluster)
        self._hierarchy: tuple[Hierarchy, Any] | None = None
        self._arrays: dict[int, tuple[np.ndarray, Any]] = {}  # id -> (array, its future)
        self._bands: tuple[Any, dict[str, Any]] | None = None  # (result, band name -> future)
        self._rollup: tuple[Any, Any, dict[str, Any]] | None = None  # (result, base, per metric)

    def close(self) -> None:
        if self._own_client:
            self.client.close()
        if self._cluster is not None:
            self._cluster.close()

    def __enter__(self) -> DaskEngine:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ---- data on the workers ----------------------------------------------------------------

    def _hierarchy_future(self, hierarchy: Hierarchy) -> Any:
        if self._hierarchy is None or self._hierarchy[0] is not hierarchy:
            future = self.client.scatter(hierarchy, broadcast=True, hash=False)
            self._hierarchy = (hierarchy, future)
        return self._hierarchy[1]

    def _array_futures(self, arrays: Mapping[str, np.ndarray]) -> dict[str, Any]:
        """A future per array, scattered once per array object."""
        missing = {code: a for code, a in arrays.items() if id(a) not in self._arrays}
        if missing:
            futures = self._scatter_each(missing)
            for code, array in missing.items():
                self._arrays[id(array)] = (array, futures[code])
        return {code: self._arrays[id(a)][1] for code, a in arrays.items()}

    def _scatter_each(self, items: Mapping[str, Any]) -> dict[str, Any]:
        """A future per value under a fresh random key. (Scattering a dict would use its
        keys as the cluster's keys, so a later run's "anc1_visits" would meet the old one.)"""
        if not items:
            return {}
        futures = self.client.scatter(list(items.values()), hash=False)
        return dict(zip(items, futures, strict=True))

    def _remember(self, arrays: Mapping[str, np.ndarray], futures: Mapping[str, Any]) -> None:
        for code, array in arrays.items():
            self._arrays[id(array)] = (array, futures[code])

    def _dataset_args(self, dataset: Dataset) -> tuple[Any, ...]:
        return (
            self._hierarchy_future(dataset.hierarchy),
            dataset.kind,
            dataset.periods,
            dataset.capture,
        )

    # ---- stage 1 --------------------------------------------------------------------------------

    def derive(self, config: Config, raw: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        # the first stage of a run: let the workers drop what an earlier run left there
        self._arrays.clear()
        self._bands = self._rollup = None
        if not config.derived:
            return bands_stage.derive(config, raw)
        known = self._array_futures(raw)
        first = next(iter(raw))  # every input set holds one raw array: it gives the shape
        pending: dict[str, Any] = {}
        for derived in config.derived:
            names = _names(derived.expr) & set(known)
            inputs = {n: known[n] for n in [first, *sorted(names)]}
            one = config.model_copy(update={"derived": [derived]})
            future = self.client.submit(_derive_task, one, derived.code, inputs, pure=False)
            known[derived.code] = pending[derived.code] = future
        computed = dict(zip(pending, self.client.gather(list(pending.values())), strict=True))
        self._remember(computed, pending)
        series = dict(raw)
        series.update((d.code, computed[d.code]) for d in config.derived)
        return series

    def learn_bands(
        self, config: Config, dataset: Dataset, series: dict[str, np.ndarray]
    ) -> dict[tuple[str, str], BandArrays]:
        futures = self._array_futures(series)
        args = self._dataset_args(dataset)
        submitted = {
            band.name: self.client.submit(
                _bands_task,
                config.model_copy(update={"band": [band]}),
                *args,
                band.metric,
                futures[band.metric],
                pure=False,
            )
            for band in config.band
        }
        parts = self.client.gather(list(submitted.values()))
        result: dict[tuple[str, str], BandArrays] = {}
        for part in parts:
            result.update(part)
        self._bands = (result, submitted)
        return result

    # ---- stage 2 --------------------------------------------------------------------------------

    def rollup(
        self, dataset: Dataset, series: dict[str, np.ndarray], levels: list[str]
    ) -> dict[str, LevelData]:
        futures = self._array_futures(series)
        args = (*self._dataset_args(dataset), list(levels))
        base = self.client.submit(_expected_task, *args, pure=False)
        per_metric = {
            code: self.client.submit(_rollup_task, *args, code, futures[code], pure=False)
            for code in series
        }
        got_base, *got = self.client.gather([base, *per_metric.values()])
        totals = dict(zip(per_metric, got, strict=True))
        result = {
            level: LevelData(
                level=level,
                units=data.units,
                metrics={code: totals[code][level] for code in series},
                expected=data.expected,
            )
            for level, data in got_base.items()
        }
        self._rollup = (result, base, per_metric)
        return result

    # ---- stage 3 --------------------------------------------------------------------------------

    def evaluate(
        self,
        config: Config,
        hierarchy: Hierarchy,
        levels: dict[str, LevelData],
        bands: dict[tuple[str, str], BandArrays],
        column: int,
        period: str,
    ) -> pd.DataFrame:
        base, per_metric = self._rollup_futures(levels)
        band_futures = self._band_futures(config, bands)
        h = self._hierarchy_future(hierarchy)
        codes = list(next(iter(levels.values())).metrics) if levels else []
        submitted = []
        for check in config.check:
            metrics, band_names = check_inputs(check, config, codes)
            submitted.append(
                self.client.submit(
                    _evaluate_task,
                    config.model_copy(update={"check": [check]}),
                    h,
                    base,
                    {code: per_metric[code] for code in metrics},
                    [band_futures[name] for name in band_names if name in band_futures],
                    column,
                    period,
                    pure=False,
                )
            )
        frames = [f for f in self.client.gather(submitted) if len(f)]
        if not frames:  # the empty frame exactly as the local engine gives it
            none = config.model_copy(update={"check": []})
            return evaluate_stage.evaluate(none, hierarchy, levels, bands, column, period)
        return evaluate_stage.sort_alerts(pd.concat(frames, ignore_index=True))

    def _rollup_futures(self, levels: dict[str, LevelData]) -> tuple[Any, dict[str, Any]]:
        """Futures of this rollup's parts: kept from :meth:`rollup`, or scattered now."""
        if self._rollup is not None and self._rollup[0] is levels:
            return self._rollup[1], self._rollup[2]
        base = {
            level: LevelData(level, data.units, {}, data.expected) for level, data in levels.items()
        }
        codes = list(next(iter(levels.values())).metrics) if levels else []
        per_metric = {
            code: {level: data.metrics[code] for level, data in levels.items()} for code in codes
        }
        return self._scatter_each({"base": base})["base"], self._scatter_each(per_metric)

    def _band_futures(
        self, config: Config, bands: dict[tuple[str, str], BandArrays]
    ) -> dict[str, Any]:
        if self._bands is not None and self._bands[0] is bands:
            return self._bands[1]
        grouped: dict[str, dict[tuple[str, str], BandArrays]] = {}
        for key, arrays in bands.items():
            grouped.setdefault(key[0], {})[key] = arrays
        return self._scatter_each(grouped)


def _names(text: str) -> set[str]:
    return set(_NAME.findall(text))


def check_inputs(check: Check, config: Config, codes: list[str]) -> tuple[list[str], list[str]]:
    """The metrics (in ``codes`` order) and bands a check names in any of its settings."""
    words: set[str] = set()
    for value in check.model_dump().values():
        if isinstance(value, str):
            words |= _names(value)
    band_names = [b.name for b in config.band if b.name in words]
    wanted = (words & set(codes)) | {config.band_named(b).metric for b in band_names}
    return [c for c in codes if c in wanted], band_names
