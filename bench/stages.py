"""Benchmark digest's pipeline stages on a synthetic national data set.

Run ``.venv/bin/python bench/stages.py`` (options: ``--facilities --metrics --months --seed
--quick --profile``). See bench/README.md for what is measured and how to read the output.

The parent process generates (or reuses) the data set under bench/out/ and starts one fresh
child process per measurement (``--child ...``), so that each peak RSS
(``ru_maxrss``) belongs to one measurement only.
"""

from __future__ import annotations

import argparse
import csv
import inspect
import json
import os
import platform
import resource
import subprocess
import sys
import time
from collections.abc import Callable
from datetime import date
from pathlib import Path
from typing import Any

import numpy as np

HERE = Path(__file__).resolve().parent
OUT = HERE / "out"
GENERATOR_VERSION = 1

PROVINCES = 10
DISTRICTS = 100
FIRST_YEAR = 2022
WINDOW, GAP, MIN_POINTS, K = 12, 0, 6, 3.0
TOLERANCE = 1e-9  # |peer - ours| <= TOLERANCE * max(1, |ours|)
SLOW = 5.0  # seconds: a method slower than this is timed once
TARGET_SECONDS = {"parquet": 10.0, "csv": 20.0}
TARGET_PEAK_BYTES = 3e9  # 3 GB (10^9 bytes)
RESULT_PREFIX = "RESULT "


# ---- helpers ---------------------------------------------------------------------------


def peak_rss() -> int:
    """Peak resident set size of this process so far, in bytes (Linux reports KiB).

    Caveat, Linux: a child process starts with its parent's ``ru_maxrss`` (it is inherited
    across fork and exec), so this is only the child's own peak when the parent stayed
    small. The parent here therefore does no heavy work itself (even the data is generated
    in a child), and the children also report :func:`vm_hwm` as a cross-check.
    """
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return rss if sys.platform == "darwin" else rss * 1024


def vm_hwm() -> int | None:
    """Linux's per-process RSS high-water mark (VmHWM, not inherited), in bytes."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


def digest_state() -> str:
    """The commit measured, and which digest files differ from it (others may be editing)."""
    root = HERE.parent
    try:
        head = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"], cwd=root, capture_output=True, text=True
        ).stdout.strip()
        changed = subprocess.run(
            ["git", "status", "--porcelain", "--", "digest"],
            cwd=root,
            capture_output=True,
            text=True,
        ).stdout.split("\n")
    except OSError:
        return "unknown (no git)"
    names = sorted(Path(line[3:]).name for line in changed if line.strip())
    return f"commit {head or '?'}" + (
        f" + uncommitted changes to {', '.join(names)}" if names else " (clean)"
    )


def load_average() -> str:
    return " ".join(f"{x:.2f}" for x in os.getloadavg())


def emit(result: dict[str, Any]) -> None:
    print(RESULT_PREFIX + json.dumps(result), flush=True)


def timed(fn: Callable[[], Any], repeats: int) -> tuple[float, list[list[float]], Any]:
    """Best of ``repeats`` runs: (best wall seconds, [wall, CPU seconds] per run, last result).

    CPU seconds are this process's user+system time, all threads: above wall time for the
    multi-threaded peers, and less disturbed than wall time by other load on the machine.
    """
    runs: list[list[float]] = []
    result = None
    for _ in range(repeats):
        result = None  # free the previous result before the next run
        cpu = time.process_time()
        start = time.perf_counter()
        result = fn()
        runs.append([time.perf_counter() - start, time.process_time() - cpu])
    return min(r[0] for r in runs), runs, result


def metric_codes(metrics: int) -> list[str]:
    return [f"m{i + 1:02d}" for i in range(metrics)]


def month_label(ordinal: int) -> str:
    return f"{FIRST_YEAR + ordinal // 12:04d}-{ordinal % 12 + 1:02d}"


# ---- 1. synthetic data set -------------------------------------------------------------


def data_folder(facilities: int, metrics: int, months: int, seed: int) -> Path:
    return OUT / f"f{facilities}_m{metrics}_t{months}_s{seed}"


def ensure_data(folder: Path, facilities: int, metrics: int, months: int, seed: int) -> dict:
    meta_path = folder / "meta.json"
    if meta_path.exists():
        meta = json.loads(meta_path.read_text())
        if meta.get("version") == GENERATOR_VERSION and all(
            (folder / name).exists() for name in meta["files"]
        ):
            print(f"data: reusing {folder.relative_to(HERE.parent)}", flush=True)
            return meta
    print(f"data: generating into {folder.relative_to(HERE.parent)} ...", flush=True)
    start = time.perf_counter()
    sizes = ["--facilities", str(facilities), "--metrics", str(metrics)]
    sizes += ["--months", str(months), "--seed", str(seed)]
    result = run_child(["--child", "generate", "--dir", str(folder), *sizes])
    if "error" in result:  # in a child so that this process stays small (see peak_rss)
        sys.exit(f"data: {result['error']}")
    print(f"data: generated in {time.perf_counter() - start:.1f} s", flush=True)
    return json.loads(meta_path.read_text())


def generate(folder: Path, facilities: int, metrics: int, months: int, seed: int) -> dict:
    import pyarrow as pa
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    n_f, n_m, n_t = facilities, metrics, months
    t = np.arange(n_t)

    # hierarchy: every district gets at least one facility, the rest at random
    district_of = np.sort(
        np.concatenate([np.arange(DISTRICTS), rng.integers(0, DISTRICTS, n_f - DISTRICTS)])
    )
    late = rng.random(n_f) < 0.02  # opened during the series: nothing reported before
    opened_month = np.where(late, rng.integers(6, max(n_t - 6, 7), n_f), 0)
    unit_ids = [f"F{i + 1:05d}" for i in range(n_f)]
    with (folder / "units.csv").open("w", newline="") as fh:
        out = csv.writer(fh)
        out.writerow(["id", "name", "parent", "level", "opened", "closed"])
        out.writerow(["NAT", "Country", "", "country", "", ""])
        for p in range(PROVINCES):
            out.writerow([f"P{p + 1:02d}", f"Province {p + 1}", "NAT", "province", "", ""])
        per_province = DISTRICTS // PROVINCES
        for d in range(DISTRICTS):
            parent = f"P{d // per_province + 1:02d}"
            out.writerow([f"D{d + 1:03d}", f"District {d + 1}", parent, "district", "", ""])
        for i in range(n_f):
            o = int(opened_month[i])
            opened = date(FIRST_YEAR + o // 12, o % 12 + 1, 1).isoformat() if late[i] else ""
            parent = f"D{district_of[i] + 1:03d}"
            out.writerow([unit_ids[i], f"Facility {i + 1}", parent, "facility", opened, ""])

    # counts: facility size x metric rate x trend x season, negative binomial noise
    size = rng.lognormal(0.0, 0.8, n_f)
    hospital = rng.random(n_f) < 0.01  # large facilities: counts around 1e4-1e5
    size[hospital] = rng.uniform(20, 80, int(hospital.sum()))
    trend = np.exp(rng.normal(0.002, 0.004, n_f)[:, None] * t[None, :])
    rate = np.geomspace(1000, 2, n_m)
    if n_m >= 4:
        rate[3] = 0.4 * rate[2]  # m04 vs m03: the bounds check on m04's share
    cube = np.empty((n_m, n_f, n_t))
    for m in range(n_m):
        season = 1 + rng.uniform(0, 0.3) * np.sin(2 * np.pi * (t + rng.uniform(0, 12)) / 12)
        if m == 1:  # m02 is a subset of m01: the relation check m02 <= m01
            cube[m] = rng.binomial(cube[0].astype(np.int64), 0.6)
            continue
        mu = rate[m] * size[:, None] * trend * season[None, :]
        shape = rng.uniform(3, 30)
        cube[m] = rng.poisson(rng.gamma(shape, mu / shape))
    spikes = rng.random(cube.shape) < 0.003
    cube[spikes] = np.round(cube[spikes] * rng.uniform(3, 10, int(spikes.sum())))
    cube[rng.random(cube.shape) < 0.001] = 0.0

    # missing: before opening, whole monthly reports (facility completeness), single cells
    completeness = rng.beta(30, 1, n_f)
    report_missing = (late[:, None] & (t[None, :] < opened_month[:, None])) | (
        rng.random((n_f, n_t)) > completeness[:, None]
    )
    cube[:, report_missing] = np.nan
    cube[rng.random(cube.shape) < 0.01] = np.nan
    np.save(folder / "cube.npy", cube)

    # long rows, ordered by unit, period, metric
    by_unit = cube.transpose(1, 2, 0).reshape(-1)
    present = np.flatnonzero(~np.isnan(by_unit))
    u, p, m = np.unravel_index(present, (n_f, n_t, n_m))
    table = pa.table(
        {
            "unit": pa.array(unit_ids).take(pa.array(u.astype(np.int32))),
            "metric": pa.array(metric_codes(n_m)).take(pa.array(m.astype(np.int32))),
            "period": pa.array([month_label(i) for i in range(n_t)]).take(
                pa.array(p.astype(np.int32))
            ),
            "value": pa.array(by_unit[present].astype(np.int64)),
        }
    )
    pq.write_table(table, folder / "values.parquet")
    pacsv.write_csv(
        table, folder / "values.csv", write_options=pacsv.WriteOptions(quoting_style="none")
    )
    for source in ("csv", "parquet"):
        (folder / f"digest-{source}.toml").write_text(config_toml(n_m, f"values.{source}"))

    meta = {
        "version": GENERATOR_VERSION,
        "facilities": n_f,
        "metrics": n_m,
        "months": n_t,
        "seed": seed,
        "cells": int(cube.size),
        "rows": len(present),
        "missing_share": 1 - len(present) / cube.size,
        "max_value": float(np.nanmax(cube)),
        "values_ge_1e4": int((cube >= 1e4).sum()),
        "checksums": {
            code: [int((~np.isnan(cube[i])).sum()), float(np.nansum(cube[i]))]
            for i, code in enumerate(metric_codes(n_m))
        },
        "files": [
            "units.csv",
            "values.csv",
            "values.parquet",
            "cube.npy",
            "digest-csv.toml",
            "digest-parquet.toml",
        ],
    }
    (folder / "meta.json").write_text(json.dumps(meta, indent=1))
    return meta


def config_toml(metrics: int, values: str) -> str:
    codes = metric_codes(metrics)
    parts = [
        "# Generated by bench/stages.py.\n"
        f'[data]\nunits = "units.csv"\nvalues = "{values}"\nperiod = "month"\n'
        'levels = ["country", "province", "district", "facility"]\n'
    ]
    for code in codes:
        parts.append(f'[[metric]]\ncode = "{code}"\nlabel = "Metric {code[1:]}"\n')
    for code in codes:
        parts.append(
            f'[[band]]\nname = "{code}_usual"\nmetric = "{code}"\nmethod = "mean_sd"\n'
            f"k = {K}\nwindow = {WINDOW}\ngap = {GAP}\nmin_points = {MIN_POINTS}\n"
            'levels = ["facility", "district"]\n'
        )
    for code in codes:
        parts.append(
            f'[[check]]\nname = "{code}_out_of_band"\nkind = "band"\nband = "{code}_usual"\n'
            'programme = "bench"\nlevels = ["facility", "district"]\n'
        )
    if metrics >= 2:
        parts.append(
            '[[check]]\nname = "m02_within_m01"\nkind = "relation"\nexpr = "m02 <= m01"\n'
            'programme = "bench"\nlevels = ["facility", "district"]\n'
        )
    if metrics >= 4:
        parts.append(
            '[[check]]\nname = "m04_share"\nkind = "bounds"\n'
            'expr = "m04 / (m03 + m04) * 100"\nmin = 0\nmax = 60\nwhen = "m03 + m04 >= 20"\n'
            'severity = "notice"\nprogramme = "bench"\nlevels = ["facility", "district"]\n'
        )
    return "\n".join(parts)


# ---- 2. the real pipeline, end to end (child process) ----------------------------------


def child_pipeline(folder: Path, source: str, proposals: bool = False) -> None:
    import digest.bands
    import digest.pipeline
    from digest.config import load_config
    from digest.pipeline import run_pipeline

    if proposals:  # the prototypes in bench/, patched in for this process only
        import proposal
        import proposal_loading

        digest.pipeline.load_values = proposal_loading.load_values_fast  # type: ignore[assignment]
        digest.bands.METHODS["mean_sd"] = proposal.mean_sd_fast  # type: ignore[assignment]
    meta = json.loads((folder / "meta.json").read_text())
    config = load_config(folder / f"digest-{source}.toml")
    before = peak_rss()
    cpu = time.process_time()
    start = time.perf_counter()
    result = run_pipeline(config, run_id="bench")
    seconds = time.perf_counter() - start
    cpu = time.process_time() - cpu
    peak, hwm = peak_rss(), vm_hwm()
    # the run must have loaded exactly the generated data
    stats = result.loaded.stats
    problems = []
    if stats.rows_rejected or stats.rows_loaded != meta["rows"]:
        problems.append(f"rows loaded {stats.rows_loaded}, rejected {stats.rows_rejected}")
    for code, (count, total) in meta["checksums"].items():
        arr = result.dataset.values[code]
        got = [int((~np.isnan(arr)).sum()), float(np.nansum(arr))]
        if got != [count, total]:
            problems.append(f"{code}: loaded {got}, generated {[count, total]}")
    emit(
        {
            "source": source,
            "timings": result.timings,
            "seconds": seconds,
            "cpu_seconds": cpu,
            "peak_rss": peak,
            "vm_hwm": hwm,
            "rss_before_run": before,
            "rows": stats.rows_loaded,
            "alerts": len(result.alerts),
            "problems": problems,
        }
    )


def child_profile(folder: Path, source: str) -> None:
    """Where loading spends its time: the file read, then cProfile of build_dataset."""
    import cProfile
    import io
    import pstats

    from digest.config import load_config
    from digest.hierarchy import load_hierarchy
    from digest.loading import build_dataset, read_values_file

    config = load_config(folder / f"digest-{source}.toml")
    hierarchy = load_hierarchy(config.data.units, config.data.levels)
    start = time.perf_counter()
    frame = read_values_file(config.data.values)
    read_seconds = time.perf_counter() - start
    profiler = cProfile.Profile()
    start = time.perf_counter()
    profiler.enable()
    build_dataset(frame, str(config.data.values), config, hierarchy)
    profiler.disable()
    build_seconds = time.perf_counter() - start
    text = io.StringIO()
    stats = pstats.Stats(profiler, stream=text)
    stats.sort_stats("cumulative").print_stats(40)
    stats.sort_stats("tottime").print_stats(25)
    (folder / f"profile-{source}.txt").write_text(text.getvalue())
    raw = stats.stats  # type: ignore[attr-defined]
    # every digest function under build_dataset, by cumulative time (nested calls overlap)
    mine = sorted(
        (
            {"function": f"{Path(f).name}:{line}:{name}", "cumulative": v[3], "own": v[2]}
            for (f, line, name), v in raw.items()
            if "/digest/" in f.replace("\\", "/")
        ),
        key=lambda r: -r["cumulative"],
    )
    own = sorted(
        (
            {"function": f"{Path(f).name}:{line}:{name}", "own": v[2]}
            for (f, line, name), v in raw.items()
        ),
        key=lambda r: -r["own"],
    )
    dtypes = {c: str(frame[c].dtype) for c in frame.columns}
    emit(
        {
            "source": source,
            "read_seconds": read_seconds,
            "build_seconds_profiled": build_seconds,
            "frame_dtypes": dtypes,
            "digest_functions": mine[:16],
            "top_own_time": own[:10],
        }
    )


# ---- 3. stage 1 against pandas, DuckDB and Polars (child process) ----------------------


def child_stage1(folder: Path, repeats: int) -> None:
    import duckdb
    import pandas as pd
    import polars as pl
    import proposal

    from digest.bands import mean_sd, window_stats
    from digest.config import BandConfig

    cube = np.load(folder / "cube.npy")  # [metrics x facilities x periods], NaN = missing
    n_m, n_f, n_t = cube.shape
    settings: dict[str, Any] = {
        "name": "bench",
        "metric": "m01",
        "method": "mean_sd",
        "k": K,
        "window": WINDOW,
        "gap": GAP,
        "min_points": MIN_POINTS,
        "levels": ["facility"],
    }
    # Newer digest learns bands in period order and leaves flagged values out of later
    # baselines (exclude_flagged, on by default): a different statistic from the plain
    # trailing mean/SD the peers compute, so the reference turns it off; the default is
    # timed in a row of its own.
    has_exclusion = "exclude_flagged" in BandConfig.model_fields
    band = BandConfig(**settings, **({"exclude_flagged": False} if has_exclusion else {}))
    rows: list[dict[str, Any]] = []

    def to_long(per_metric: list[np.ndarray]) -> np.ndarray:
        """[metric][unit x period] arrays in the long order (unit, metric, period)."""
        return np.stack(per_metric).transpose(1, 0, 2).reshape(-1)

    # (a) ours, the reference every other method is checked against
    print("stage 1: ours (digest.bands.mean_sd) ...", file=sys.stderr, flush=True)
    best, times, bands = timed(lambda: [mean_sd(cube[m], band) for m in range(n_m)], repeats)
    ref_centre = to_long([b.centre for b in bands])
    ref_sd = to_long([b.spread for b in bands])
    rows.append(
        {
            "method": "ours: mean_sd" + (", exclude_flagged=false" if has_exclusion else ""),
            "kind": "ours",
            "seconds": best,
            "times": times,
            "bands": int((~np.isnan(ref_centre)).sum()),
        }
    )
    del bands

    def check(
        name: str,
        kind: str,
        best: float,
        times: list[list[float]],
        centre: np.ndarray,
        sd: np.ndarray,
    ) -> None:
        rows.append(
            {
                "method": name,
                "kind": kind,
                "seconds": best,
                "times": times,
                **agreement(ref_centre, ref_sd, centre, sd),
            }
        )

    def ours_like(name: str, kind: str, fn: Callable[[np.ndarray], tuple[np.ndarray, ...]]) -> None:
        print(f"stage 1: {name} ...", file=sys.stderr, flush=True)
        best, times, out = timed(lambda: [fn(cube[m]) for m in range(n_m)], 1)
        if best <= SLOW and repeats > 1:
            again, more, out = timed(lambda: [fn(cube[m]) for m in range(n_m)], repeats - 1)
            best, times = min(best, again), times + more
        check(name, kind, best, times, to_long([o[0] for o in out]), to_long([o[1] for o in out]))

    def masked(stats: tuple[np.ndarray, ...]) -> tuple[np.ndarray, np.ndarray]:
        count, mean, sd = stats
        enough = count >= MIN_POINTS
        return np.where(enough, mean, np.nan), np.where(enough, sd, np.nan)

    ours_like(
        "ours: window_stats only", "ours-core", lambda a: masked(window_stats(a, WINDOW, GAP))
    )
    if has_exclusion:
        default = BandConfig(**settings)
        ours_like(
            f"ours: mean_sd, exclude_flagged={str(default.exclude_flagged).lower()} (default)",
            "ours-default",
            lambda a: astuple(mean_sd(a, default)),
        )

    # the long, dense grid the peers work on: one row per (unit, metric, period), sorted,
    # NULL/NaN where nothing was reported, so ROWS frames are period frames
    grid = {
        "unit": np.repeat(np.arange(n_f, dtype=np.int32), n_m * n_t),
        "metric": np.tile(np.repeat(np.arange(n_m, dtype=np.int16), n_t), n_f),
        "period": np.tile(np.arange(n_t, dtype=np.int16), n_f * n_m),
        "value": cube.transpose(1, 0, 2).reshape(-1),
    }
    for name, peer in PEERS.items():
        print(f"stage 1: {name} ...", file=sys.stderr, flush=True)
        check(name, "peer", *peer(grid, (n_f, n_m, n_t), repeats))

    # proposals (bench/proposal.py), not part of digest
    ours_like(
        "proposal A: mean_sd_fast + slices",
        "proposal",
        lambda a: astuple(proposal.mean_sd_fast(a, band, proposal.window_stats_slices)),
    )
    ours_like(
        "proposal A: window_stats_slices",
        "proposal-core",
        lambda a: masked(proposal.window_stats_slices(a, WINDOW, GAP)),
    )
    ours_like(
        "proposal B: mean_sd_fast + cumsum",
        "proposal",
        lambda a: astuple(proposal.mean_sd_fast(a, band, proposal.window_stats_cumsum)),
    )
    ours_like(
        "proposal B: window_stats_cumsum",
        "proposal-core",
        lambda a: masked(proposal.window_stats_cumsum(a, WINDOW, GAP)),
    )

    emit(
        {
            "rows": rows,
            "cells": int(cube.size),
            "peak_rss": peak_rss(),
            "vm_hwm": vm_hwm(),
            "polars_threads": pl.thread_pool_size(),
            "versions": {
                "numpy": np.__version__,
                "pandas": pd.__version__,
                "duckdb": duckdb.__version__,
                "polars": pl.__version__,
            },
        }
    )


Grid = dict[str, np.ndarray]
PeerResult = tuple[float, list[list[float]], np.ndarray, np.ndarray]


def scatter(n: int, position: np.ndarray, *columns: np.ndarray) -> list[np.ndarray]:
    """Put result rows back in grid order (untimed: each tool returns rows its own way)."""
    out = []
    for column in columns:
        full = np.full(n, np.nan)
        full[position] = column
        out.append(full)
    return out


def peer_pandas(grid: Grid, shape: tuple[int, int, int], repeats: int) -> PeerResult:
    """Long frame: groupby(unit, metric) + shift + rolling(window, min_periods)."""
    import pandas as pd

    frame = pd.DataFrame(grid)

    def run() -> tuple[pd.Series, pd.Series]:
        past = frame.groupby(["unit", "metric"], sort=False)["value"].shift(GAP + 1)
        rolling = past.groupby([frame["unit"], frame["metric"]], sort=False).rolling(
            WINDOW, min_periods=MIN_POINTS
        )
        return rolling.mean(), rolling.std()

    best, times, (centre, sd) = timed(run, 1)
    if best <= SLOW and repeats > 1:
        again, more, (centre, sd) = timed(run, repeats - 1)
        best, times = min(best, again), times + more
    position = centre.index.get_level_values(-1).to_numpy()
    c, s = scatter(len(frame), position, centre.to_numpy(), sd.to_numpy())
    return best, times, c, s


def peer_duckdb(grid: Grid, shape: tuple[int, int, int], repeats: int) -> PeerResult:
    """A native DuckDB table (loaded untimed), then one query with three window aggregates."""
    import duckdb
    import pyarrow as pa

    _, n_m, n_t = shape
    con = duckdb.connect()
    source = pa.table({**grid, "value": pa.array(grid["value"], from_pandas=True)})  # NaN->NULL
    con.register("source", source)
    con.execute("CREATE TABLE v AS SELECT * FROM source")
    con.unregister("source")
    del source
    query = f"""
        SELECT unit, metric, period,
               CASE WHEN n >= {MIN_POINTS} THEN centre END AS centre,
               CASE WHEN n >= {MIN_POINTS} THEN sd END AS sd
        FROM (
            SELECT unit, metric, period,
                   COUNT(value) OVER w AS n,
                   AVG(value) OVER w AS centre,
                   STDDEV_SAMP(value) OVER w AS sd
            FROM v
            WINDOW w AS (PARTITION BY unit, metric ORDER BY period
                         ROWS BETWEEN {WINDOW + GAP} PRECEDING AND {GAP + 1} PRECEDING)
        )
    """

    def run() -> Any:
        relation = con.sql(query)
        fetch = getattr(relation, "to_arrow_table", None) or relation.arrow
        return fetch()

    best, times, table = timed(run, repeats)
    con.close()
    position = (
        table["unit"].to_numpy().astype(np.int64) * n_m + table["metric"].to_numpy()
    ) * n_t + table["period"].to_numpy()
    c, s = scatter(len(grid["value"]), position, table["centre"].to_numpy(), table["sd"].to_numpy())
    return best, times, c, s


def peer_polars(grid: Grid, shape: tuple[int, int, int], repeats: int) -> PeerResult:
    """Dense sorted frame: shift(1).rolling_mean/rolling_std(min_samples).over(unit, metric)."""
    import polars as pl

    params = inspect.signature(pl.Expr.rolling_mean).parameters
    minimum = {("min_samples" if "min_samples" in params else "min_periods"): MIN_POINTS}
    frame = pl.DataFrame({**grid, "value": pl.Series("value", grid["value"], nan_to_null=True)})
    past = pl.col("value").shift(GAP + 1)
    keys = ["unit", "metric"]

    def run() -> pl.DataFrame:
        return frame.select(
            past.rolling_mean(WINDOW, **minimum).over(keys).alias("centre"),
            past.rolling_std(WINDOW, **minimum).over(keys).alias("sd"),
        )

    best, times, out = timed(run, repeats)
    return best, times, out["centre"].to_numpy(), out["sd"].to_numpy()


PEERS: dict[str, Callable[[Grid, tuple[int, int, int], int], PeerResult]] = {
    "pandas: groupby+shift+rolling": peer_pandas,
    "duckdb: AVG/STDDEV_SAMP OVER ROWS": peer_duckdb,
    "polars: rolling_mean/std .over": peer_polars,
}


def astuple(bands: Any) -> tuple[np.ndarray, np.ndarray]:
    return bands.centre, bands.spread


def agreement(
    ref_centre: np.ndarray, ref_sd: np.ndarray, centre: np.ndarray, sd: np.ndarray
) -> dict[str, Any]:
    """Where bands exist (same cells?) and how far centre and SD are from ours there."""
    ours = ~np.isnan(ref_centre)
    theirs = ~np.isnan(centre)
    both = ours & theirs
    result: dict[str, Any] = {
        "bands": int(theirs.sum()),
        "where_differs": int((ours != theirs).sum()),
    }
    worst = 0.0
    for name, mine, other in (("centre", ref_centre, centre), ("sd", ref_sd, sd)):
        a, b = other[both], mine[both]
        nan_differs = int((np.isnan(a) != np.isnan(b)).sum())
        ok = ~np.isnan(a) & ~np.isnan(b)
        diff = np.abs(a[ok] - b[ok])
        size = np.abs(b[ok])
        big = size >= 1.0
        result[f"{name}_nan_differs"] = nan_differs
        result[f"{name}_max_abs"] = float(diff.max()) if diff.size else 0.0
        result[f"{name}_max_rel"] = float((diff[big] / size[big]).max()) if big.any() else 0.0
        err = float((diff / np.maximum(size, 1.0)).max()) if diff.size else 0.0
        result[f"{name}_max_err"] = err
        worst = max(worst, err)
        result["where_differs"] += nan_differs
    result["agrees"] = result["where_differs"] == 0 and worst <= TOLERANCE
    return result


# ---- parent: run the children, print the tables ----------------------------------------


def run_child(args: list[str], timeout: float = 1200) -> dict[str, Any]:
    command = [sys.executable, str(Path(__file__).resolve()), *args]
    start = time.perf_counter()
    proc = subprocess.run(command, capture_output=True, text=True, timeout=timeout)
    wall = time.perf_counter() - start
    found = [ln for ln in proc.stdout.splitlines() if ln.startswith(RESULT_PREFIX)]
    if proc.returncode != 0 or not found:
        sys.stderr.write(proc.stdout + proc.stderr)
        return {
            "error": f"child {' '.join(args)} failed with exit code {proc.returncode}",
            "process_wall": wall,
        }
    result = json.loads(found[-1][len(RESULT_PREFIX) :])
    result["process_wall"] = wall
    return result


def gb(value: int | None) -> str:
    return "n/a" if value is None else f"{value / 1e9:.2f}"


def fmt_s(seconds: float) -> str:
    return f"{seconds:8.3f}"


def print_pipeline(runs: dict[str, dict[str, Any]], proposed: dict[str, dict[str, Any]]) -> None:
    print("\nPIPELINE (digest.pipeline.run_pipeline, one fresh process per source; seconds)")
    print(
        f"{'source':12} {'load':>8} {'bands':>8} {'rollup':>8} {'evaluate':>8} {'total':>8}"
        f" {'cpu':>8} {'process':>8} {'peak RSS':>9} {'VmHWM':>7} {'rows':>10} {'alerts':>7}"
    )
    for source, run in {**runs, **proposed}.items():
        if "error" in run:
            print(f"{source:12} ERROR: {run['error']}")
            continue
        t = run["timings"]
        print(
            f"{source:12}"
            + "".join(fmt_s(t[s]) + " " for s in ("load", "bands", "rollup", "evaluate"))
            + f"{fmt_s(run['seconds'])} {fmt_s(run['cpu_seconds'])} {fmt_s(run['process_wall'])}"
            f" {run['peak_rss'] / 1e9:7.2f}GB {gb(run['vm_hwm']):>7} {run['rows']:>10,}"
            f" {run['alerts']:>7,}"
        )
        for problem in run["problems"]:
            print(f"  DATA PROBLEM: {problem}")
    print(
        "total = load+bands+rollup+evaluate inside run_pipeline (wall); cpu = CPU seconds of"
        " that call; process = wall time of the child incl. interpreter start, imports, config;"
        " peak RSS = ru_maxrss of the child, VmHWM = the kernel's own high-water mark (GB)"
    )
    if proposed:
        print(
            "+prop = the same run with bench/proposal_loading.py's loader and bench/proposal.py's"
            " mean_sd patched in (not digest's code; not judged against the targets)"
        )


def print_stage1(result: dict[str, Any]) -> float | None:
    if "error" in result:
        print(f"\nSTAGE 1 comparison ERROR: {result['error']}")
        return None
    rows = result["rows"]
    ours = rows[0]["seconds"]
    print(
        f"\nSTAGE 1 (facility level, {result['cells']:,} cells = all periods of all series;"
        f" window {WINDOW}, gap {GAP}, min_points {MIN_POINTS}; best of runs shown)"
    )
    print(
        f"{'method':46} {'seconds':>8} {'ratio':>7} {'cpu s':>7}  {'runs':>4}  {'bands':>10}"
        f"  {'where≠':>6}  {'centre abs/rel':>19}  {'sd abs/rel':>19}  agrees"
    )
    for row in rows:
        line = (
            f"{row['method']:46} {fmt_s(row['seconds'])} {row['seconds'] / ours:7.2f}"
            f" {min(row['times'])[1]:7.2f}  {len(row['times']):>4}  {row['bands']:>10,}"
        )
        if row["kind"] == "ours-default":
            line += (
                f"  {row['where_differs']:>6}  (a different statistic: values outside their"
                " own band are left out of later baselines)"
            )
        elif "agrees" in row:
            line += (
                f"  {row['where_differs']:>6}"
                f"  {row['centre_max_abs']:9.1e}/{row['centre_max_rel']:9.1e}"
                f"  {row['sd_max_abs']:9.1e}/{row['sd_max_rel']:9.1e}"
                f"  {'yes' if row['agrees'] else 'NO'}"
            )
        else:
            line += "  (reference)"
        print(line)
    print(
        f"ratio = method seconds / ours seconds (> 1: slower than ours); agrees = same band"
        f" cells and |diff| <= {TOLERANCE:g} x max(1, |ours|); rel = over |ours| >= 1"
    )
    print(
        f"child peak RSS {result['peak_rss'] / 1e9:.2f} GB (VmHWM {gb(result['vm_hwm'])});"
        " polars threads"
        f" {result['polars_threads']}; versions {result['versions']}"
    )
    return ours


def print_targets(stage1: dict[str, Any], runs: dict[str, dict[str, Any]]) -> list[str]:
    print("\nTARGETS")
    misses = []

    def verdict(name: str, ok: bool | None, detail: str) -> None:
        word = "n/a " if ok is None else ("PASS" if ok else "MISS")
        if ok is False:
            misses.append(name)
        print(f"  {word}  {name:28} {detail}")

    if "error" in stage1:
        verdict("stage 1 vs fastest peer", None, "comparison failed")
    else:
        rows = stage1["rows"]
        ours = rows[0]["seconds"]
        peers = [r for r in rows if r["kind"] == "peer"]
        fastest = min(peers, key=lambda r: r["seconds"])
        verdict(
            "stage 1 vs fastest peer",
            ours <= fastest["seconds"],
            f"ours {ours:.3f} s vs {fastest['method']} {fastest['seconds']:.3f} s",
        )
        print(
            f"        (CPU seconds: ours {min(rows[0]['times'])[1]:.2f}, {fastest['method']}"
            f" {min(fastest['times'])[1]:.2f}; the peers use {os.cpu_count()} cores, ours 1)"
        )
        for row in rows:
            if row["kind"] == "ours-default":
                print(
                    f"        (digest's default, {row['method'][6:]}: {row['seconds']:.3f} s,"
                    f" {'faster' if row['seconds'] <= fastest['seconds'] else 'slower'}"
                    " than the fastest peer; not the same statistic, so not the target)"
                )
        bad = [r["method"] for r in peers if not r["agrees"]]
        verdict(
            "stage 1 peers agree w/ ours",
            not bad,
            "all within tolerance" if not bad else "disagree: " + ", ".join(bad),
        )
    for source, limit in TARGET_SECONDS.items():
        run = runs.get(source, {})
        if "seconds" not in run:
            verdict(f"run from {source} < {limit:g} s", None, run.get("error", "not run"))
        else:
            verdict(
                f"run from {source} < {limit:g} s",
                run["seconds"] < limit,
                f"{run['seconds']:.2f} s",
            )
    peaks = {s: r["peak_rss"] for s, r in runs.items() if "peak_rss" in r}
    if peaks:
        worst = max(peaks, key=lambda s: peaks[s])
        verdict(
            f"peak memory < {TARGET_PEAK_BYTES / 1e9:g} GB",
            peaks[worst] < TARGET_PEAK_BYTES,
            ", ".join(f"{s} {p / 1e9:.2f} GB" for s, p in peaks.items()),
        )
    return misses


def print_profiles(profiles: dict[str, dict[str, Any]], folder: Path) -> None:
    for source, prof in profiles.items():
        if "error" in prof:
            print(f"\nLOAD PROFILE {source}: ERROR {prof['error']}")
            continue
        print(
            f"\nLOAD PROFILE {source}: read_values_file {prof['read_seconds']:.2f} s,"
            f" build_dataset {prof['build_seconds_profiled']:.2f} s under cProfile;"
            f" dtypes {prof['frame_dtypes']}"
        )
        print("  cumulative s  own s  digest function (cProfile; nested calls overlap)")
        for row in prof["digest_functions"]:
            print(f"  {row['cumulative']:12.2f} {row['own']:6.2f}  {row['function']}")
        print("  own s         hottest functions (own time)")
        for row in prof["top_own_time"]:
            print(f"  {row['own']:12.2f}  {row['function']}")
        print(f"  full listing: {(folder / f'profile-{source}.txt').relative_to(HERE.parent)}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--facilities", type=int, default=None, help="facilities (default 10000; 1000 with --quick)"
    )
    parser.add_argument("--metrics", type=int, default=20)
    parser.add_argument("--months", type=int, default=48)
    parser.add_argument("--seed", type=int, default=20240601)
    parser.add_argument(
        "--repeats",
        type=int,
        default=None,
        help="runs per stage-1 method, best kept (default 3; 1 with --quick)",
    )
    parser.add_argument(
        "--quick", action="store_true", help="small data (1000 facilities) and one run per method"
    )
    parser.add_argument(
        "--profile",
        choices=["auto", "always", "never"],
        default="auto",
        help="cProfile the loader: auto = when a run target is missed",
    )
    parser.add_argument(
        "--child", choices=["generate", "pipeline", "stage1", "profile"], help=argparse.SUPPRESS
    )
    parser.add_argument(
        "--no-proposals", action="store_true", help="skip the pipeline runs with the prototypes"
    )
    parser.add_argument("--proposals", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--dir", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--source", choices=["csv", "parquet"], help=argparse.SUPPRESS)
    args = parser.parse_args()

    if args.child == "generate":
        generate(args.dir, args.facilities, args.metrics, args.months, args.seed)
        return emit({"generated": str(args.dir)})
    if args.child == "pipeline":
        return child_pipeline(args.dir, args.source, args.proposals)
    if args.child == "profile":
        return child_profile(args.dir, args.source)
    if args.child == "stage1":
        return child_stage1(args.dir, args.repeats)

    facilities = args.facilities or (1000 if args.quick else 10000)
    repeats = args.repeats or (1 if args.quick else 3)
    if facilities < DISTRICTS or args.metrics < 1 or args.months < 2:
        parser.error(f"need at least {DISTRICTS} facilities, 1 metric and 2 months")
    started = time.perf_counter()
    folder = data_folder(facilities, args.metrics, args.months, args.seed)
    meta = ensure_data(folder, facilities, args.metrics, args.months, args.seed)
    print(
        f"data: {meta['facilities']:,} facilities x {meta['metrics']} metrics x"
        f" {meta['months']} months = {meta['cells']:,} cells, {meta['rows']:,} rows"
        f" ({meta['missing_share']:.1%} missing), largest value {meta['max_value']:,.0f},"
        f" {meta['values_ge_1e4']:,} values >= 1e4; "
        f"values.csv {(folder / 'values.csv').stat().st_size / 1e6:.0f} MB, "
        f"values.parquet {(folder / 'values.parquet').stat().st_size / 1e6:.0f} MB"
    )
    print(
        f"machine: {os.cpu_count()} cores, Python {platform.python_version()},"
        f" load average {load_average()} (other work on the machine inflates wall times)",
        flush=True,
    )

    print(f"digest: {digest_state()}", flush=True)
    runs: dict[str, dict[str, Any]] = {}
    for source in ("parquet", "csv"):
        print(f"pipeline from {source} ...", flush=True)
        runs[source] = run_child(["--child", "pipeline", "--dir", str(folder), "--source", source])
    proposed: dict[str, dict[str, Any]] = {}
    if not args.no_proposals:
        for source in ("parquet", "csv"):
            print(f"pipeline from {source} with the bench/ proposals patched in ...", flush=True)
            proposed[source] = run_child(
                ["--child", "pipeline", "--dir", str(folder), "--source", source, "--proposals"]
            )
    print("stage 1 comparison ...", flush=True)
    stage1 = run_child(["--child", "stage1", "--dir", str(folder), "--repeats", str(repeats)])

    print(f"load average after the measurements: {load_average()}")
    print_pipeline(runs, {f"{s} +prop": r for s, r in proposed.items()})
    print_stage1(stage1)
    misses = print_targets(stage1, runs)

    missed_runs = [s for s in TARGET_SECONDS if f"run from {s} < {TARGET_SECONDS[s]:g} s" in misses]
    if args.profile == "always":
        missed_runs = list(TARGET_SECONDS)
    elif args.profile == "never":
        missed_runs = []
    profiles = {}
    for source in missed_runs:
        print(f"\nprofiling load from {source} ...", flush=True)
        profiles[source] = run_child(
            ["--child", "profile", "--dir", str(folder), "--source", source]
        )
    print_profiles(profiles, folder)

    summary = {
        "meta": {k: v for k, v in meta.items() if k != "checksums"},
        "digest": digest_state(),
        "runs": runs,
        "proposed_runs": proposed,
        "stage1": stage1,
        "misses": misses,
        "profiles": profiles,
    }
    (folder / "results.json").write_text(json.dumps(summary, indent=1))
    print(
        f"\n{len(misses)} target(s) missed{': ' + ', '.join(misses) if misses else ''};"
        f" results in {(folder / 'results.json').relative_to(HERE.parent)};"
        f" benchmark took {time.perf_counter() - started:.0f} s"
    )


if __name__ == "__main__":
    main()
