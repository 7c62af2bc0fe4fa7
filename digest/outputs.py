"""Write a run's files: alerts.csv, bands.parquet and rejects.csv.

Every file is written under a temporary name in the same folder and renamed into place,
so a reader never sees half a file. With ``[output] table``, the bands and the totals per
level are also written to a database, replacing that period's rows in one transaction
(:func:`digest.sources.write_back`).
"""

from __future__ import annotations

import io
import os
import tempfile
from collections.abc import Callable
from pathlib import Path

import pandas as pd

from digest.message import alerts_csv
from digest.pipeline import RunResult


def write_atomic(path: Path, write: Callable[[io.BufferedWriter], None]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def alerts_csv_bytes(alerts: pd.DataFrame) -> bytes:
    """alerts.csv: the same writer as the digest's attachment, plain UTF-8, 6 significant digits."""
    return alerts_csv(alerts, encoding="utf-8", float_format="%.6g")


def write_outputs(result: RunResult, out_dir: Path) -> dict[str, Path]:
    paths = {
        "alerts": out_dir / "alerts.csv",
        "bands": out_dir / "bands.parquet",
        "rejects": out_dir / "rejects.csv",
    }
    write_atomic(paths["alerts"], lambda fh: fh.write(alerts_csv_bytes(result.alerts)))
    bands = result.bands_frame()
    write_atomic(paths["bands"], lambda fh: bands.to_parquet(fh, index=False))
    rejects = result.loaded.rejects
    write_atomic(
        paths["rejects"], lambda fh: rejects.to_csv(fh, index=False, lineterminator="\r\n")
    )
    if result.config.output.table is not None:
        from digest.sources import write_back

        write_back(result, result.config.output.table)
    return paths
