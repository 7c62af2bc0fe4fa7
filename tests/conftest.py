"""Shared fixtures: a small hierarchy writer and the issue's example configuration.

Kept small and generic on purpose: other test modules may use these too.
"""

from __future__ import annotations

import csv
import logging
import shutil
import tomllib
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import pytest

FIXTURES = Path(__file__).parent / "fixtures"
EXAMPLE_TOML = FIXTURES / "issue_example.toml"

LEVELS = ("country", "province", "district", "facility")
UNITS_HEADER = ("id", "name", "parent", "level", "opened", "closed")

# An invented country: 2 provinces, 3 districts, 6 facilities.
# F6 opened in March 2024 and F5 closed on 1 May 2024 (first day no longer open).
SMALL_UNITS: tuple[tuple[str, ...], ...] = (
    ("C", "Country", "", "country", "", ""),
    ("P1", "North", "C", "province", "", ""),
    ("P2", "South", "C", "province", "", ""),
    ("D1", "Hill district", "P1", "district", "", ""),
    ("D2", "Lake district", "P1", "district", "", ""),
    ("D3", "Coast district", "P2", "district", "", ""),
    ("F1", "Hill clinic", "D1", "facility", "", ""),
    ("F2", "Hill hospital", "D1", "facility", "", ""),
    ("F3", "Ridge post", "D1", "facility", "", ""),
    ("F4", "Lake clinic", "D2", "facility", "", ""),
    ("F5", "Old lake post", "D2", "facility", "", "2024-05-01"),
    ("F6", "Coast clinic", "D3", "facility", "2024-03-15", ""),
)


def write_csv(path: Path, header: Sequence[str], rows: Sequence[Sequence[Any]]) -> Path:
    """Write a CSV file (header on line 1, row i on line i + 2) and return its path."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with path.open("w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(header)
        writer.writerows(rows)
    return path


@pytest.fixture
def write_units(tmp_path: Path) -> Callable[..., Path]:
    """``write_units(rows=SMALL_UNITS, name="units.csv", header=UNITS_HEADER)`` -> path."""

    def write(
        rows: Sequence[Sequence[Any]] = SMALL_UNITS,
        name: str = "units.csv",
        header: Sequence[str] = UNITS_HEADER,
    ) -> Path:
        return write_csv(tmp_path / name, header, rows)

    return write


@pytest.fixture
def example_config_path(tmp_path: Path) -> Path:
    """The issue's example configuration, copied into a fresh folder."""
    target = tmp_path / "digest.toml"
    shutil.copyfile(EXAMPLE_TOML, target)
    return target


@pytest.fixture
def example_raw() -> dict[str, Any]:
    """The issue's example configuration as a fresh dict, to edit and pass to config_from_dict."""
    with EXAMPLE_TOML.open("rb") as fh:
        return tomllib.load(fh)


@pytest.fixture(autouse=True)
def _restore_logging():  # type: ignore[no-untyped-def]
    """Tests that call the CLI configure logging; put the root logger back afterwards."""
    root = logging.getLogger()
    handlers, level = list(root.handlers), root.level
    yield
    for handler in list(root.handlers):
        if handler not in handlers:
            root.removeHandler(handler)
    root.setLevel(level)
