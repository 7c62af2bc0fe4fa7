"""Compare digest's loader with the prototype in bench/proposal_loading.py.

Run ``.venv/bin/python bench/loading_check.py [--facilities 10000 ...]`` after
``bench/stages.py`` has generated the data set (same options). It

1. checks that both loaders give the same Dataset, rejects and counts on a small file with
   every kind of bad row, as CSV and as Parquet, and on the benchmark data;
2. times reading and building on the benchmark data, each loader and source in a fresh
   process, with its peak RSS (``ru_maxrss``).
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import stages
from proposal_loading import build_dataset_fast, read_values_table

from digest.config import load_config
from digest.hierarchy import load_hierarchy
from digest.loading import Loaded, build_dataset, read_values_file

MESSY_UNITS = """id,name,parent,level
NAT,Country,,country
P1,Province,NAT,province
D1,District,P1,district
F1,Facility 1,D1,facility
F2,Facility 2,D1,facility
"""
MESSY_CONFIG = """[data]
units = "units.csv"
values = "{values}"
levels = ["country", "province", "district", "facility"]
max_reject_share = 1.0
[[metric]]
code = "a"
label = "A"
[[metric]]
code = "b"
label = "B"
count = false
[[derived]]
code = "c"
label = "C"
expr = "a + b"
"""
MESSY_ROWS = [
    ("F1", "a", "2024-01", "10"),
    (" F1 ", " a ", " 2024-02 ", " 12 "),  # padded
    ("F1", "a", "2024-03", "1e3"),
    ("F2", "a", "2024-01", "5"),
    ("F2", "a", "2024-01", "5"),  # exact duplicate: collapsed
    ("F2", "a", "2024-02", "6"),
    ("F2", "a", "2024-02", "7"),  # conflicting pair: both rejected
    ("F2", "b", "2024-02", "-3"),  # negative, but b is not a count
    ("F9", "a", "2024-01", "1"),  # unknown unit
    ("D1", "a", "2024-01", "1"),  # not a facility
    ("F1", "c", "2024-01", "1"),  # derived
    ("F1", "zz", "2024-01", "1"),  # unknown metric
    ("F1", "a", "2024-13", "1"),  # bad period
    ("F1", "a", "2024-04", ""),  # empty
    ("F1", "b", "2024-04", "abc"),  # not a number
    ("F1", "b", "2024-04", "inf"),  # not a number (not finite)
    ("F1", "a", "2024-05", "-1"),  # negative count
    ("F1", "b", "2024-06", "1"),
    ("F1", "b", "2024-06", "2"),  # the only rows of 2024-06 conflict: period dropped
]


def same(old: Loaded, new: Loaded) -> list[str]:
    problems = []
    if old.stats != new.stats:
        problems.append(f"stats {old.stats} != {new.stats}")
    a, b = old.dataset, new.dataset
    if not np.array_equal(a.periods, b.periods) or not np.array_equal(a.capture, b.capture):
        problems.append(f"periods/capture differ: {a.periods} vs {b.periods}")
    elif a.values.keys() != b.values.keys():
        problems.append("metrics differ")
    else:
        for code in a.values:
            if not np.array_equal(a.values[code], b.values[code], equal_nan=True):
                problems.append(f"values of {code} differ")
    try:
        pd.testing.assert_frame_equal(
            old.rejects.reset_index(drop=True), new.rejects.reset_index(drop=True)
        )
    except AssertionError as exc:
        problems.append(f"rejects differ: {exc}")
    return problems


def both(config_path: Path) -> tuple[Loaded, Loaded]:
    config = load_config(config_path)
    hierarchy = load_hierarchy(config.data.units, config.data.levels)
    path = config.data.values
    old = build_dataset(read_values_file(path), str(path), config, hierarchy)
    new = build_dataset_fast(read_values_table(path), str(path), config, hierarchy)
    return old, new


def check_messy() -> list[str]:
    problems = []
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        (folder / "units.csv").write_text(MESSY_UNITS)
        text = "unit,metric,period,value\n" + "".join(",".join(r) + "\n" for r in MESSY_ROWS)
        (folder / "values.csv").write_text(text)
        unit, metric, period, value = (list(c) for c in zip(*MESSY_ROWS, strict=True))
        numbers = [None if v.strip() in ("", "abc") else float(v) for v in value]
        table = {"unit": unit, "metric": metric, "period": period, "value": numbers}
        pq.write_table(pa.table(table), folder / "values.parquet")  # value as float64
        for source in ("csv", "parquet"):
            cfg = folder / f"{source}.toml"
            cfg.write_text(MESSY_CONFIG.format(values=f"values.{source}"))
            old, new = both(cfg)
            found = same(old, new)
            problems += [f"messy {source}: {p}" for p in found]
            print(
                f"messy {source}: {old.stats.rows_read} rows, {old.stats.rows_rejected} rejected,"
                f" {old.stats.duplicates_collapsed} collapsed:"
                f" {'same' if not found else 'DIFFERENT'}"
            )
    return problems


def child(folder: Path, source: str, loader: str) -> None:
    config = load_config(folder / f"digest-{source}.toml")
    hierarchy = load_hierarchy(config.data.units, config.data.levels)
    path = config.data.values
    start = time.perf_counter()
    raw = read_values_file(path) if loader == "current" else read_values_table(path)
    read = time.perf_counter() - start
    after_read = stages.peak_rss()
    build = build_dataset if loader == "current" else build_dataset_fast
    start = time.perf_counter()
    loaded = build(raw, str(path), config, hierarchy)
    built = time.perf_counter() - start
    stages.emit(
        {
            "read": read,
            "build": built,
            "peak_after_read": after_read,
            "peak": stages.peak_rss(),
            "vm_hwm": stages.vm_hwm(),
            "rows": loaded.stats.rows_loaded,
        }
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--facilities", type=int, default=10000)
    parser.add_argument("--metrics", type=int, default=20)
    parser.add_argument("--months", type=int, default=48)
    parser.add_argument("--seed", type=int, default=20240601)
    parser.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        return child(Path(args.child[0]), args.child[1], args.child[2])

    folder = stages.data_folder(args.facilities, args.metrics, args.months, args.seed)
    if not (folder / "meta.json").exists():
        sys.exit(f"{folder} is missing: run bench/stages.py with the same options first")
    # timings first, while this process is small: a child inherits its parent's ru_maxrss
    print(f"LOADING ({folder.name}; fresh process each; seconds; peak RSS in GB after the read")
    print("and at the end (ru_maxrss), VmHWM = the kernel's high-water mark)")
    print(
        f"{'source':8} {'loader':10} {'read':>7} {'build':>7} {'total':>7} {'read pk':>7} {'peak':>6} {'VmHWM':>6}"
    )
    results: dict[str, Any] = {}
    for source in ("parquet", "csv"):
        for loader in ("current", "proposed"):
            command = [sys.executable, __file__, "--child", str(folder), source, loader]
            out = subprocess.run(command, capture_output=True, text=True, check=True).stdout
            r = json.loads(out.splitlines()[-1][len(stages.RESULT_PREFIX) :])
            results[f"{source}/{loader}"] = r
            print(
                f"{source:8} {loader:10} {r['read']:7.2f} {r['build']:7.2f}"
                f" {r['read'] + r['build']:7.2f} {r['peak_after_read'] / 1e9:7.2f}"
                f" {r['peak'] / 1e9:6.2f} {stages.gb(r['vm_hwm']):>6}",
                flush=True,
            )
    print(f"load average {stages.load_average()}")
    problems = check_messy()
    for source in ("parquet", "csv"):
        old, new = both(folder / f"digest-{source}.toml")
        found = same(old, new)
        problems += [f"benchmark {source}: {p}" for p in found]
        print(f"benchmark {source}: {'same' if not found else 'DIFFERENT'}", flush=True)
        del old, new

    if problems:
        print("\nPROBLEMS:\n  " + "\n  ".join(problems))
        sys.exit(1)


if __name__ == "__main__":
    main()
