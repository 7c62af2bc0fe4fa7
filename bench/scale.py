"""How far one machine goes: the whole pipeline on tens of millions of values, local vs Dask.

Not a test. For each size it writes a synthetic data set (``bench/out/scale/f{N}_m{M}_t{T}``:
units.csv, values.parquet written block by block, config.toml) and runs the full pipeline
(load from Parquet in chunks, bands, rollup, evaluate; no mail) once per engine, each in
its own subprocess:

- ``local``: numpy/pandas in one process (the default engine);
- ``dask1`` / ``dask2``: ``[engine] kind = "dask"`` with a local cluster of 1 or 2 worker
  processes (one thread each).

Memory is measured two ways: ``ru_maxrss`` of the run's own process (the client, which
holds the loaded data and every result) and the peak of the summed RSS of its whole
process tree (client plus Dask workers), sampled every 0.2 s with psutil. The named peer
of every ratio is the local engine measured in the same run. From two sizes it fits
time and peak memory as a + b x values and reports the largest set that would fit in
24 GB (an extrapolation unless a run that large was measured; it says which).

    .venv/bin/python bench/scale.py                 # 13.8 M and 55 M values, ~15 min on 2 cores
    .venv/bin/python bench/scale.py --quick         # 1.4 M and 5.5 M values, ~2 min
    .venv/bin/python bench/scale.py --facilities 6250,25000 --engines local,dask2

Data: country > 10 provinces > districts of 100 facilities; ``--metrics`` count metrics
(default 40) over ``--months`` months (default 60, from 2021-01); Poisson counts around
facility size x metric rate x season; about 8 % of cells missing (2 % of facilities open
late, 2 % of facility-months not reported, 4 % single cells). Config: one mean_sd band
per metric at facility and district level with its band check, a relation check
(m01 <= m00), a bounds check on a share and a silence check.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import resource
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np

OUT = Path(__file__).resolve().parent / "out" / "scale"
BUDGET_GB = 24.0
START = 2021 * 12  # ordinal of 2021-01


# ---- data --------------------------------------------------------------------------------


def generate(folder: Path, facilities: int, metrics: int, months: int, seed: int = 7) -> int:
    """Write units.csv, values.parquet and config.toml; return the number of value rows."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    done = folder / "rows.txt"
    if done.exists():
        return int(done.read_text())
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    districts = max(1, facilities // 100)
    provinces = min(10, districts)
    fac_ids = [f"F{i:06d}" for i in range(facilities)]
    lines = ["id,name,parent,level,opened,closed", "C,Country,,country,,"]
    lines += [f"P{p:02d},Province {p},C,province,," for p in range(provinces)]
    lines += [f"D{d:04d},District {d},P{d % provinces:02d},district,," for d in range(districts)]
    lines += [
        f"{fid},Facility {i},D{i % districts:04d},facility,," for i, fid in enumerate(fac_ids)
    ]
    (folder / "units.csv").write_text("\n".join(lines) + "\n")

    codes = [f"m{m:02d}" for m in range(metrics)]
    labels = [f"{(START + t) // 12}-{(START + t) % 12 + 1:02d}" for t in range(months)]
    unit_dict = pa.array(fac_ids)
    metric_dict = pa.array(codes)
    period_dict = pa.array(labels)
    rate = rng.lognormal(0.0, 0.8, metrics) * 5
    season = 1 + 0.25 * np.sin(2 * np.pi * (np.arange(months) % 12) / 12)
    schema = pa.schema(
        [
            ("unit", pa.dictionary(pa.int32(), pa.string())),
            ("metric", pa.dictionary(pa.int32(), pa.string())),
            ("period", pa.dictionary(pa.int32(), pa.string())),
            ("value", pa.int32()),
        ]
    )
    rows = 0
    block = 500
    with pq.ParquetWriter(folder / "values.parquet", schema, compression="zstd") as writer:
        for start in range(0, facilities, block):
            n = min(block, facilities - start)
            size = rng.lognormal(0.0, 0.7, n)
            lam = size[:, None, None] * rate[None, :, None] * season[None, None, :]
            values = rng.poisson(lam).astype(np.int32)  # [facility x metric x month]
            if metrics > 1:  # m01 is a subset of m00 (the relation check holds)
                values[:, 1] = rng.binomial(values[:, 0], 0.7)
            present = rng.random(values.shape) >= 0.04
            present &= rng.random((n, 1, months)) >= 0.02  # a whole monthly report missing
            late = rng.random(n) < 0.02
            opened = np.where(late, rng.integers(1, months, n), 0)
            present &= np.arange(months)[None, None, :] >= opened[:, None, None]
            f, m, t = np.nonzero(present)
            table = pa.table(
                [
                    pa.DictionaryArray.from_arrays(pa.array(f + start, pa.int32()), unit_dict),
                    pa.DictionaryArray.from_arrays(pa.array(m, pa.int32()), metric_dict),
                    pa.DictionaryArray.from_arrays(pa.array(t, pa.int32()), period_dict),
                    pa.array(values[f, m, t]),
                ],
                schema=schema,
            )
            writer.write_table(table, row_group_size=1_000_000)
            rows += len(f)
    (folder / "config.toml").write_text(_config_text(codes))
    done.write_text(str(rows))
    return rows


def _config_text(codes: list[str]) -> str:
    parts = [
        "[data]",
        'units = "units.csv"',
        'values = "values.parquet"',
        'levels = ["country", "province", "district", "facility"]',
        "max_reject_share = 0.05",
        "",
    ]
    for code in codes:
        parts += ["[[metric]]", f'code = "{code}"', f'label = "Metric {code}"', ""]
    for code in codes:
        parts += ["[[band]]", f'name = "b_{code}"', f'metric = "{code}"', 'method = "mean_sd"',
                  'levels = ["facility", "district"]', ""]  # fmt: skip
        parts += ["[[check]]", f'name = "band_{code}"', 'kind = "band"', f'band = "b_{code}"',
                  'programme = "p"', 'levels = ["facility", "district"]', ""]  # fmt: skip
    parts += ["[[check]]", 'name = "m01_le_m00"', 'kind = "relation"', 'expr = "m01 <= m00"',
              'programme = "p"', 'levels = ["facility", "district"]', ""]  # fmt: skip
    parts += ["[[check]]", 'name = "m03_share"', 'kind = "bounds"',
              'expr = "m03 / (m02 + m03) * 100"', "max = 60", 'when = "m02 + m03 >= 20"',
              'programme = "p"', 'levels = ["facility", "district"]', ""]  # fmt: skip
    parts += ["[[check]]", 'name = "m00_silent"', 'kind = "silence"', 'metric = "m00"',
              'programme = "p"', 'levels = ["facility"]', ""]  # fmt: skip
    return "\n".join(parts)


# ---- one case, in a child process -----------------------------------------------------------


def run_case(folder: Path, engine: str, result_file: Path) -> None:
    import psutil

    from digest.config import EngineConfig, load_config
    from digest.pipeline import run_pipeline

    me = psutil.Process()
    peak = {"tree": 0}
    stop = threading.Event()

    def sample() -> None:
        while not stop.is_set():
            total = 0
            for proc in [me, *me.children(recursive=True)]:
                with contextlib.suppress(psutil.Error):  # a worker that just ended
                    total += proc.memory_info().rss
            peak["tree"] = max(peak["tree"], total)
            stop.wait(0.2)

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    config = load_config(folder / "config.toml")
    if engine.startswith("dask"):
        workers = int(engine[4:] or 2)
        settings = EngineConfig(kind="dask", workers=workers, threads_per_worker=1)
        config = config.model_copy(update={"engine": settings})
    start = time.perf_counter()
    result = run_pipeline(config, run_id="scale")
    wall = time.perf_counter() - start
    stop.set()
    sampler.join()
    children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    out = {
        "engine": engine,
        "values": result.loaded.stats.rows_loaded,
        "rows_read": result.loaded.stats.rows_read,
        "alerts": len(result.alerts),
        "wall_s": wall,
        "stages_s": result.timings,
        "client_maxrss_gb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20,
        "worker_maxrss_gb": children / 2**20,
        "tree_peak_gb": peak["tree"] / 2**30,
    }
    result_file.write_text(json.dumps(out))


# ---- the benchmark -------------------------------------------------------------------------


def _fit(points: list[tuple[float, float]]) -> tuple[float, float]:
    """a, b of y = a + b x through the points (least squares; exact for two)."""
    x, y = np.array([p[0] for p in points]), np.array([p[1] for p in points])
    if len(points) == 1:
        return 0.0, float(y[0] / x[0])
    b, a = np.polyfit(x, y, 1)
    return float(a), float(b)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--facilities", default=None, help="comma-separated sizes")
    parser.add_argument("--metrics", type=int, default=40)
    parser.add_argument("--months", type=int, default=60)
    parser.add_argument("--engines", default="local,dask1,dask2")
    parser.add_argument("--quick", action="store_true", help="small sizes, a couple of minutes")
    parser.add_argument("--case", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--engine", help=argparse.SUPPRESS)
    parser.add_argument("--result", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.case:
        run_case(args.case, args.engine, args.result)
        return 0
    sizes = [
        int(s) for s in (args.facilities or ("625,2500" if args.quick else "6250,25000")).split(",")
    ]
    engines = args.engines.split(",")
    OUT.mkdir(parents=True, exist_ok=True)
    results: list[dict[str, Any]] = []
    for facilities in sizes:
        folder = OUT / f"f{facilities}_m{args.metrics}_t{args.months}"
        t0 = time.perf_counter()
        rows = generate(folder, facilities, args.metrics, args.months)
        print(
            f"data {folder.name}: {rows:,} value rows ({time.perf_counter() - t0:.0f} s)",
            flush=True,
        )
        for engine in engines:
            result_file = folder / f"result-{engine}.json"
            t0 = time.perf_counter()
            done = subprocess.run(
                [sys.executable, __file__, "--case", str(folder), "--engine", engine,
                 "--result", str(result_file)],
                env={**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])},
                check=False,
            )  # fmt: skip
            if done.returncode:
                print(f"  {engine}: FAILED (exit {done.returncode})", flush=True)
                continue
            got = json.loads(result_file.read_text())
            got["facilities"] = facilities
            results.append(got)
            stages = ", ".join(f"{k} {v:.1f}" for k, v in got["stages_s"].items())
            print(
                f"  {engine:<6} {got['wall_s']:7.1f} s ({stages}); client peak "
                f"{got['client_maxrss_gb']:.2f} GB, process tree peak {got['tree_peak_gb']:.2f} GB; "
                f"{got['alerts']:,} alerts  [{time.perf_counter() - t0:.0f} s with start-up]",
                flush=True,
            )
    (OUT / "results.json").write_text(json.dumps(results, indent=2))
    _report(results, engines)
    return 0


def _report(results: list[dict[str, Any]], engines: list[str]) -> None:
    print(
        "\nengine  values      wall s  vs local  tree GB  values/GB   fit: 24 GB holds   time there"
    )
    local = {r["values"]: r["wall_s"] for r in results if r["engine"] == "local"}
    for engine in engines:
        mine = [r for r in results if r["engine"] == engine]
        if not mine:
            continue
        mem_a, mem_b = _fit([(r["values"], r["tree_peak_gb"]) for r in mine])
        time_a, time_b = _fit([(r["values"], r["wall_s"]) for r in mine])
        fits = (BUDGET_GB - mem_a) / mem_b if mem_b > 0 else float("inf")
        largest = max(r["values"] for r in mine)
        how = "measured" if fits <= largest else "extrapolated"
        for r in mine:
            ratio = r["wall_s"] / local[r["values"]] if r["values"] in local else float("nan")
            print(
                f"{engine:<7} {r['values']:>11,} {r['wall_s']:8.1f} {ratio:8.2f}x {r['tree_peak_gb']:8.2f}"
                f" {r['values'] / r['tree_peak_gb'] / 1e6:7.1f} M"
            )
        print(
            f"{'':<7} fit: {mem_b * 1e6 * 1000:.0f} MB per M values + {mem_a:.2f} GB; "
            f"24 GB ~ {fits / 1e6:,.0f} M values ({how}), "
            f"~{(time_a + time_b * fits) / 60:.0f} min"
        )


if __name__ == "__main__":
    raise SystemExit(main())
